"""The maximum-likelihood wing: optimisation, standard errors, per-subject fits, mixtures,
joint fits, prediction, comparison and recovery. Imports the estimation core, never the Bayes
wing."""
