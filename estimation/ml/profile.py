"""Profile-likelihood interval for one reported parameter.

With the coefficient z_j held at t and the others re-maximised,
    pl(t) = max_{z_-j} ln L(z_-j, z_j = t),
the level-(1 - a) interval is {t : 2 (ln L(z_hat) - pl(t)) <= chi2_1(1 - a)} (Venzon &
Moolgavkar 1988; Pawitan 2001; from memory), found by root finding on each side of z_hat_j and
mapped to the natural scale (the map is monotone, so the interval maps end to end).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from scipy import optimize as sopt

from stopwise.estimation.ml.optimize import minimize_one
from stopwise.estimation.ml.problem import Problem, report_values

if TYPE_CHECKING:  # annotations only: results imports this module for Fit.profile
    from stopwise.estimation.ml.results import Fit


def profile_loglik(problem: Problem, z_hat: np.ndarray, j: int, t: float) -> float:
    """pl(t): the log-likelihood maximised over the other coefficients with z_j = t."""
    others = [i for i in range(problem.k) if i != j]

    def full(rest: np.ndarray) -> np.ndarray:
        z = np.empty(problem.k)
        z[others] = rest
        z[j] = t
        return z

    if not others:
        return -problem.value(full(np.zeros(0)))
    run = minimize_one(
        lambda r: problem.value(full(r)),
        lambda r: problem.grad(full(r))[others],
        lambda r: problem.hess(full(r))[np.ix_(others, others)],
        z_hat[others],
    )
    return -run.value


def profile_interval(
    fit: Fit, name: str, level: float = 0.95, max_steps: int = 40
) -> tuple[float, float]:
    """(low, high) of the profile-likelihood interval of reported parameter ``name``; an end
    that the likelihood never crosses (a flat side) is returned as the parameter's bound
    (or +-inf)."""
    problem: Problem = fit.extras["problem"]
    rows = [r for r in problem.reported if r.name == name]
    if not rows:
        raise KeyError(f"no parameter {name!r}; reported: {[r.name for r in problem.reported]}")
    row = rows[0]
    j = row.index
    z_hat = np.asarray(fit.z)
    from scipy import stats  # 0.7 s more at start-up for every fit: only here

    cutoff = float(stats.chi2.ppf(level, 1)) / 2.0
    ll_hat = fit.loglik

    def excess(t: float) -> float:
        return ll_hat - profile_loglik(problem, z_hat, j, t) - cutoff

    h = problem.hess(z_hat)
    step = 1.0 / np.sqrt(h[j, j]) if np.isfinite(h[j, j]) and h[j, j] > 0 else 0.5
    ends = []
    for direction in (-1.0, 1.0):
        a, b = z_hat[j], z_hat[j] + direction * step
        found = None
        for _ in range(max_steps):
            if excess(b) > 0:
                found = sopt.brentq(excess, min(a, b), max(a, b), xtol=1e-8)
                break
            a, b = b, b + direction * step
            step *= 1.5
        if found is None:
            found = direction * np.inf
        ends.append(found)
    z_lo, z_hi = z_hat.copy(), z_hat.copy()
    z_lo[j], z_hi[j] = ends
    lo = report_values([row], z_lo)[0] if np.isfinite(ends[0]) else _limit(row, -1)
    hi = report_values([row], z_hi)[0] if np.isfinite(ends[1]) else _limit(row, 1)
    return float(min(lo, hi)), float(max(lo, hi))


def _limit(row: object, direction: int) -> float:
    spec = getattr(row, "spec", None)
    if spec is None:
        return direction * np.inf
    return spec.lower if direction < 0 else spec.upper
