"""The outward result-JSON contract of ../shared/DESIGN.md, written out once for the tests
(kept here, not imported from the package, so the tests check the code against the design)."""

DESIGN_KEYS = frozenset(
    {
        "model",
        "method",
        "converged",
        "n_obs",
        "n_subjects",
        "loglik",
        "aic",
        "bic",
        "params",
        "se_method",
        "warnings",
        "versions",
        "seed",
    }
)
