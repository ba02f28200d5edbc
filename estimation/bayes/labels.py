"""Names of the quantities a Bayesian fit reports: one wording for table, JSON and README.

A hierarchical fit describes a population of subjects whose parameter k is
x_sk = to_natural(mu_k + u_sk), u_s ~ Normal(0, Sigma) on the unconstrained scale. Its rows:

  "<k>: population median"            to_natural(mu_k) (covariates at 0): half the subjects
                                      lie below it, since to_natural is increasing
  "<k>: population mean"              E[x_sk] over subjects (natural scale)
  "<k>: between-subject sd"           sd of x_sk over subjects (natural scale)
  "<k>: between-subject sd (unconstrained scale)"          sd_k = sqrt(Sigma_kk)
  "<j>, <k>: between-subject correlation (unconstrained scale)"   Sigma_jk / (sd_j sd_k)

Everything is on the parameter's natural scale unless the name says otherwise. A pooled fit
reports "<k>", the one parameter every subject shares. Covariate effects keep the ML
engine's "<k>:<column>" (unconstrained scale, like the ML table).
"""

from __future__ import annotations

UNCONSTRAINED = " (unconstrained scale)"


def pooled_parameter(name: str) -> str:
    return name


def population_median(name: str) -> str:
    return f"{name}: population median"


def population_mean(name: str) -> str:
    return f"{name}: population mean"


def between_subject_sd(name: str) -> str:
    return f"{name}: between-subject sd"


def between_subject_sd_unconstrained(name: str) -> str:
    return f"{name}: between-subject sd{UNCONSTRAINED}"


def between_subject_correlation(first: str, second: str) -> str:
    return f"{first}, {second}: between-subject correlation{UNCONSTRAINED}"


def covariate_effect(name: str, column: str) -> str:
    return f"{name}:{column}"


def scale_of(label: str) -> str:
    """ "unconstrained" for a covariate effect or a label that says so, else "natural"."""
    if label.endswith(UNCONSTRAINED):
        return "unconstrained"
    head = label.split(": ", 1)[0]
    return "unconstrained" if ":" in head else "natural"
