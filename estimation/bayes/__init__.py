"""The Bayesian wing: the NumPyro model density, priors, start values, the NUTS run, the
truncation check, posterior summaries, predictive checks and leave-one-subject-out. Imports the
estimation core, never the maximum-likelihood wing."""
