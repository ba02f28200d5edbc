"""Standard errors on the unconstrained scale and their delta-method map to reported rows.

* Hessian:   V = H^-1, with H the Hessian of the negative log-likelihood at the optimum.
* Sandwich (subject-clustered):  V = c * H^-1 (sum_g s_g s_g') H^-1, s_g the score of cluster
  g, with the small-sample factor c = G/(G-1) * (N-1)/(N-k) (the CR1 correction of Cameron &
  Miller 2015, J. Human Resources 50(2), from memory; statsmodels' default, checked in tests).
* Delta method: se(g(z)) = |g'(z)| se(z) for a reported row that maps one coefficient.

A Hessian that is not positive definite gives NaN standard errors and a warning, never numbers;
so does a degenerate clustered sandwich (fewer than 3 clusters, or cluster scores that span
fewer directions than there are coefficients, e.g. identical subjects).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from stopwise.estimation.matrices import is_positive_definite
from stopwise.estimation.ml.problem import Problem, Reported, report_derivatives, report_values

NORMAL_95 = float(special.ndtri(0.975))  # the normal quantile (scipy.stats loads slowly)


def hessian_covariance(h: np.ndarray) -> np.ndarray | None:
    """H^-1 when H is positive definite, else None."""
    if not is_positive_definite(h):
        return None
    return np.linalg.inv(0.5 * (h + h.T))


def sandwich_covariance(
    h: np.ndarray, scores: np.ndarray, n_obs: int, small_sample: bool = True
) -> np.ndarray | None:
    """Cluster-robust V = c H^-1 (S'S) H^-1 (module docstring); None if H is not PD."""
    bread = hessian_covariance(h)
    if bread is None:
        return None
    g, k = scores.shape
    meat = scores.T @ scores
    factor = 1.0
    if small_sample and g > 1 and n_obs > k:
        factor = g / (g - 1.0) * (n_obs - 1.0) / (n_obs - k)
    return factor * bread @ meat @ bread


MIN_CLUSTERS = 3
SANDWICH_RATIO = 1e-8  # smallest eigenvalue of H^-1/2 (S'S) H^-1/2 accepted


def degenerate_sandwich(h: np.ndarray, scores: np.ndarray) -> str | None:
    """Why a clustered sandwich would be degenerate, or None. With G clusters the scores
    s_g sum to zero at the optimum, so S'S has rank at most G - 1: fewer than MIN_CLUSTERS
    clusters, or clusters whose scores span fewer than k directions (identical subjects),
    leave directions with (near-)zero sandwich variance. Measured as the smallest
    eigenvalue of L^-1 (S'S) L^-T with H = L L' (the sandwich-to-Hessian variance ratio,
    about 1 under a correct model), below SANDWICH_RATIO."""
    g, k = scores.shape
    if g < MIN_CLUSTERS:
        return f"only {g} cluster(s) (subjects): a clustered sandwich needs at least {MIN_CLUSTERS}"
    try:
        chol = np.linalg.cholesky(0.5 * (h + h.T))
    except np.linalg.LinAlgError:
        return None  # the Hessian check reports this case
    root = np.linalg.solve(chol, scores.T)  # L^-1 S'
    ratio = float(np.linalg.eigvalsh(root @ root.T).min())
    if not np.isfinite(ratio) or ratio < SANDWICH_RATIO:
        return (
            f"the {g} clusters' scores span fewer than the {k} estimated directions "
            f"(smallest sandwich-to-Hessian variance ratio {ratio:.2g}; identical subjects "
            "or too few clusters), so the clustered sandwich would report near-zero "
            "standard errors"
        )
    return None


@dataclass
class RowTable:
    """Reported estimates with standard errors and 95% intervals."""

    names: list[str]
    estimate: np.ndarray
    se: np.ndarray
    ci_low: np.ndarray
    ci_high: np.ndarray
    scale: list[str]


def wald_rows(reported: list[Reported], z: np.ndarray, cov: np.ndarray | None) -> RowTable:
    """Delta-method SEs; intervals are z +- 1.96 se(z) mapped through the (monotone)
    transform, so they respect the parameter bounds."""
    est = report_values(reported, z)
    n = len(reported)
    if cov is None:
        nan = np.full(n, np.nan)
        return RowTable(
            [r.name for r in reported],
            est,
            nan,
            nan.copy(),
            nan.copy(),
            [r.scale for r in reported],
        )
    se_z = np.sqrt(np.clip(np.diag(cov), 0.0, None))[[r.index for r in reported]]
    deriv = report_derivatives(reported, z)
    se = np.abs(deriv) * se_z
    lows, highs = np.empty(n), np.empty(n)
    for j, r in enumerate(reported):
        zl, zh = z.copy(), z.copy()
        zl[r.index] = z[r.index] - NORMAL_95 * se_z[j]
        zh[r.index] = z[r.index] + NORMAL_95 * se_z[j]
        a, b = report_values([r], zl)[0], report_values([r], zh)[0]
        lows[j], highs[j] = min(a, b), max(a, b)
    return RowTable([r.name for r in reported], est, se, lows, highs, [r.scale for r in reported])


def covariance_for(
    problem: Problem, z: np.ndarray, h: np.ndarray, method: str | None
) -> tuple[np.ndarray | None, list[str], dict[str, object]]:
    """Covariance of z by ``method`` ("hessian" or "robust"), warnings, and details."""
    warnings: list[str] = []
    info: dict[str, object] = {}
    if method is None:
        return None, warnings, info
    if method == "robust":  # the clusters are the subjects, whether or not the SEs exist
        info["clusters"] = problem.n_clusters
    if not is_positive_definite(h):
        eig = np.linalg.eigvalsh(0.5 * (h + h.T)) if np.all(np.isfinite(h)) else [np.nan]
        warnings.append(
            "the Hessian at the optimum is not positive definite (smallest eigenvalue "
            f"{float(np.min(eig)):.3g}): standard errors are NaN; the model may be "
            "unidentified on these data or the optimiser stopped short"
        )
        return None, warnings, info
    if method == "hessian":
        return hessian_covariance(h), warnings, info
    if method == "robust":
        scores = problem.cluster_scores(z)
        degenerate = degenerate_sandwich(h, scores)
        if degenerate:
            warnings.append(
                degenerate + ": standard errors are NaN; use se='hessian' or more subjects"
            )
            return None, warnings, info
        if problem.n_clusters < 30:
            warnings.append(
                f"only {problem.n_clusters} clusters (subjects): the clustered sandwich "
                "understates uncertainty below about 30 clusters"
            )
        return sandwich_covariance(h, scores, problem.n_obs), warnings, info
    raise ValueError(f"unknown covariance method {method!r}")
