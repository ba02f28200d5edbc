"""Checks a fitted model must pass before its estimates are presented as valid.

A logit-QRE contest likelihood solves a fixed point per contest condition,
log sigma = log_softmax(lambda U(sigma)) (McKelvey & Palfrey 1995). The likelihood follows a
fixed continuation schedule that can miss the fixed point at high precision x payoff range;
the residual max |log sigma - log_softmax(lambda U(sigma))| at the estimate certifies it.
Sequential contests (agent logit play by backward induction, no fixed point) are certified
by recomputing the likelihood's stop probabilities with an independent numpy solver.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from stopwise.models.base import Model

QRE_RESIDUAL_TOLERANCE = 1e-6
SEQUENTIAL_CHECK_TOLERANCE = 1e-8  # stop probabilities: likelihood vs independent solver


def qre_residual_warning(residuals: np.ndarray, tolerance: float = QRE_RESIDUAL_TOLERANCE) -> str:
    """The warning for per-condition fixed-point residuals above ``tolerance`` ('' if none:
    NaN entries are conditions without a fixed point, e.g. solo rows)."""
    finite = residuals[np.isfinite(residuals)]
    if finite.size == 0 or float(np.max(finite)) <= tolerance:
        return ""
    bad = int(np.sum(finite > tolerance))
    return (
        f"the QRE fixed point inside the likelihood is not solved at the estimate in {bad} of "
        f"{finite.size} contest conditions (max residual {float(np.max(finite)):.3g} > "
        f"{tolerance:g}): the log-likelihood, estimates and standard errors are not "
        "certified and the fit is marked not converged; try a smaller --max-target, or "
        "start values nearer the data's precision"
    )


def certify_fixed_points(model: Model, bundle: Any, result: Any) -> None:
    """For a pooled fit of a model that reports its fixed-point residual
    (``options["fixed_point_residual"](theta, data)``): record the largest residual in
    ``result.extras["qre_residual"]`` and, above the tolerance, warn and mark the fit not
    converged. Other results are left as they are."""
    residual_of = (model.options or {}).get("fixed_point_residual")
    estimates = getattr(result, "estimates", None)
    if not callable(residual_of) or not callable(estimates) or not hasattr(result, "converged"):
        return
    theta = estimates()
    if not theta or not all(np.isfinite(v) for v in theta.values()):
        return
    residuals = np.asarray(residual_of(theta, bundle), dtype=float)
    finite = residuals[np.isfinite(residuals)]
    if finite.size:
        result.extras["qre_residual"] = float(np.max(finite))
    warning = qre_residual_warning(residuals)
    if warning:
        result.warnings.append(warning)
        result.converged = False
    certify_sequential(model, bundle, result, theta)


def sequential_warning(check: float, tolerance: float = SEQUENTIAL_CHECK_TOLERANCE) -> str:
    """The warning for a sequential-contest certificate above ``tolerance`` ('' if none)."""
    if not np.isfinite(check) or check <= tolerance:
        return ""
    return (
        "the sequential-contest likelihood disagrees with the independent backward-induction "
        f"solver at the estimate (max |difference| of stop probabilities {check:.3g} > "
        f"{tolerance:g}): the estimates are not certified and the fit is marked not converged"
    )


def certify_sequential(model: Model, bundle: Any, result: Any, theta: dict[str, float]) -> None:
    """For data with sequential contests: recompute the likelihood's stop probabilities at
    the estimate with the numpy solver (models/contest/sequential_certify.py), record the
    largest difference in ``result.extras["sequential_check"]`` and, above the tolerance,
    warn and mark the fit not converged."""
    check_of = (model.options or {}).get("sequential_check")
    if not callable(check_of):
        return
    check = float(check_of(theta, bundle))
    if not np.isfinite(check):
        return
    result.extras["sequential_check"] = check
    warning = sequential_warning(check)
    if warning:
        result.warnings.append(warning)
        result.converged = False
