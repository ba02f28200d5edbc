"""Identification of learning models (spec part ``learn``): can the design tell the prior
from risk attitude?

A pessimistic or strong prior and a high risk aversion both make a participant draw less
early on; only the change of behaviour with experience separates them. From the fit's
covariance (inverse Hessian or sandwich, on the unconstrained scale, where the diagonal
transform leaves correlations unchanged to first order) the correlation
    rho = cov(a, b) / sqrt(var(a) var(b))
of each prior parameter with each utility-curvature parameter is read off; |rho| >= 0.9, or a
prior parameter without a finite standard error, is reported as a warning.
"""

from __future__ import annotations

from typing import Any

import numpy as np

PRIOR_PARAMETERS = ("prior_strength", "prior_mean")
RISK_PARAMETERS = ("r", "a", "alpha", "beta", "loss_aversion")
CONFOUND_CORRELATION = 0.9


def prior_risk_correlations(names: list[str], cov: np.ndarray) -> dict[tuple[str, str], float]:
    """rho(prior, risk) for every prior and risk parameter among ``names`` (module docstring)."""
    out: dict[tuple[str, str], float] = {}
    sd = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    for prior in PRIOR_PARAMETERS:
        for risk in RISK_PARAMETERS:
            if prior in names and risk in names:
                i, j = names.index(prior), names.index(risk)
                denominator = sd[i] * sd[j]
                out[(prior, risk)] = float(cov[i, j] / denominator) if denominator > 0 else np.nan
    return out


def learning_warnings(fit: Any) -> list[str]:
    """Warnings when prior and risk attitude cannot be told apart on this design."""
    names = list(getattr(getattr(fit, "table", None), "names", []))
    cov = getattr(fit, "cov_z", None)
    if not any(p in names for p in PRIOR_PARAMETERS):
        return []
    if cov is None or np.shape(cov)[0] != len(names):
        return [
            "learning model: no covariance of the estimates, so whether the prior and the "
            "risk attitude are told apart could not be checked"
        ]
    cov = np.asarray(cov, dtype=np.float64)
    messages = []
    for (prior, risk), rho in prior_risk_correlations(names, cov).items():
        if not np.isfinite(rho) or abs(rho) >= CONFOUND_CORRELATION:
            shown = "undefined" if not np.isfinite(rho) else f"{rho:+.2f}"
            messages.append(
                f"{prior} and {risk} cannot be told apart on this design (correlation of the "
                f"estimates {shown}): a prior and a risk attitude that explain early caution "
                "equally well; more trials per subject with untold odds, or some trials with "
                "told odds, separate them"
            )
    return messages
