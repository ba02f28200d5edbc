"""Where a pooled sampler starts when the data say little: the mode of the Laplace posterior.

The ML fit gives the likelihood's normal approximation N(z_hat, C) on the unconstrained
scale (C the ML covariance, H = C^-1). With the prior p(z) the approximate posterior is

  q(z) ∝ exp(-1/2 (z - z_hat)^T H (z - z_hat)) p(z),

whose mode z* minimises f(z) = 1/2 (z - z_hat)^T H (z - z_hat) - log p(z) and whose
curvature there is H + P(z*), P = -d^2 log p / dz^2. With thousands of decisions H dominates
and z* = z_hat; with sixteen contest decisions H is nearly singular in some direction, z_hat
may lie far out in the prior's tail (issue 16: z_precision 4.5 with an ML sd of 1,972 on a
replication of the crra+ch calibration study), and a sampler started there, jittered by
the ML sd, diverged on every transition. Starting at z* with the jitter and mass matrix of
(H + P(z*))^-1 puts the chains where the posterior is.

Newton's method on f with the step Δ = -(H + P₊)^-1 ∇f, P₊ being P with its negative
eigenvalues set to 0 (so the step always descends), halved until f is finite and falls by
the Armijo fraction (Nocedal & Wright 2006, Algorithm 3.1, backtracking line search). Where
the prior curves upwards (P has a negative eigenvalue) and the data say little, the full
step can overshoot by orders of magnitude (a replication of the calibration study asked for
880 units in z_tau, where the prior's density underflows); the halving brings it back.

Where the ML Hessian is not positive definite (a direction the data leave flat, so no ML
covariance exists) the search takes H as that Hessian's positive part: the prior fills the
flat directions as long as H + P₊ stays positive definite (``laplace_mode_from_precision``).
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.estimation.matrices import (
    is_positive_definite,
    positive_part,
    symmetric_inverse,
)

# (log p(z), d log p / dz, -d^2 log p / dz^2) at a flat z
PriorTerms = Callable[[np.ndarray], tuple[float, np.ndarray, np.ndarray]]

ARMIJO = 1e-4  # sufficient-decrease fraction of the line search
MAX_NEWTON_STEPS = 50
STEP_TOLERANCE = 1e-9  # stop when the largest Newton step is below this (unconstrained units)


@dataclass(frozen=True)
class LaplaceMode:
    """The mode z* of the Laplace posterior, its covariance (H + P₊(z*))^-1, the Newton
    steps taken and whether the search ended at a stationary point (last Newton step below
    STEP_TOLERANCE, or below 1e-6 where rounding stopped the line search). Where the prior
    is undefined at z_hat: z_hat and the ML covariance, not converged."""

    mode: np.ndarray
    cov: np.ndarray
    steps: int
    converged: bool


def laplace_mode(z_hat: np.ndarray, ml_cov: np.ndarray, prior: PriorTerms) -> LaplaceMode:
    """Minimise f(z) = 1/2 (z - z_hat)^T H (z - z_hat) - log p(z), H = ml_cov^-1, by damped
    Newton steps from z_hat; return z* and (H + P₊(z*))^-1. Where the prior is undefined at
    z_hat: z_hat and ml_cov, not converged."""
    ml_cov = np.asarray(ml_cov, np.float64)
    found = laplace_mode_from_precision(z_hat, symmetric_inverse(ml_cov), prior)
    if found is None:
        return LaplaceMode(np.asarray(z_hat, np.float64), ml_cov, 0, False)
    return found


def laplace_mode_from_precision(
    z_hat: np.ndarray,
    precision: np.ndarray,
    prior: PriorTerms,
    other_starts: Iterable[np.ndarray] = (),
) -> LaplaceMode | None:
    """The same search with the likelihood's curvature H given directly. H may be singular
    (the positive part of an ML Hessian that is not positive definite: a direction the data
    leave flat), as long as H + P₊ is positive definite along the way, the prior filling the
    flat directions. The search starts at z_hat, or at the first of ``other_starts`` where
    f is finite and H + P₊ positive definite: an ML point that ran off along the flat
    direction lies where the prior's log density is nearly linear (P₊ = 0), and Newton
    cannot step from there. ``other_starts`` is read lazily: a start after the first that
    qualifies is never computed. None where no start qualifies."""
    z_hat = np.asarray(z_hat, np.float64)
    h = 0.5 * (np.asarray(precision, np.float64) + np.asarray(precision, np.float64).T)

    def terms(z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        log_p, grad_log_p, prior_precision = prior(z)
        finite = np.isfinite(log_p) and np.all(np.isfinite(grad_log_p))
        if not (finite and np.all(np.isfinite(prior_precision))):  # beyond the prior's range
            return np.inf, np.full_like(z, np.nan), np.full((z.size, z.size), np.nan)
        d = z - z_hat
        return 0.5 * d @ h @ d - log_p, h @ d - grad_log_p, h + positive_part(prior_precision)

    for candidate in itertools.chain((z_hat,), other_starts):
        z = np.asarray(candidate, np.float64).copy()
        f, grad, curvature = terms(z)
        if np.isfinite(f) and is_positive_definite(curvature):
            break
    else:
        return None
    steps, converged = 0, False
    while steps < MAX_NEWTON_STEPS and np.isfinite(f):
        step = -np.linalg.solve(curvature, grad)
        if np.max(np.abs(step)) < STEP_TOLERANCE:
            converged = True
            break
        t = 1.0
        while t > 1e-12:
            trial = terms(z + t * step)
            if (
                np.isfinite(trial[0])
                and trial[0] <= f + ARMIJO * t * (grad @ step)
                and is_positive_definite(trial[2])
            ):
                break
            t *= 0.5
        else:  # no decrease along a descent direction: rounding; stationary if the step is small
            converged = bool(np.max(np.abs(step)) < 1e-6)
            break
        z = z + t * step
        f, grad, curvature = trial
        steps += 1
    return LaplaceMode(z, symmetric_inverse(curvature), steps, converged)


def flat_sizes(sites: Sequence[str], values: Mapping[str, Any]) -> list[int]:
    """Number of coordinates of each site (a z_<k> site is a scalar, b_<k> a vector)."""
    return [int(np.size(values[s])) for s in sites]


def prior_terms(
    log_prior: Callable[[Mapping[str, Any]], Any], sites: Sequence[str], sizes: Sequence[int]
) -> PriorTerms:
    """(log p, ∇ log p, -∇² log p) of ``log_prior`` over the flattened ``sites`` (in that
    order, ``sizes`` coordinates each), compiled once for the calls of one start."""

    def log_density(x: Any) -> Any:
        parts = jnp.split(x, np.cumsum(sizes)[:-1])
        return log_prior({s: (p[0] if s.startswith("z_") else p) for s, p in zip(sites, parts)})

    @jax.jit
    def all_terms(x: Any) -> tuple[Any, Any, Any]:
        return log_density(x), jax.grad(log_density)(x), -jax.hessian(log_density)(x)

    def evaluate(z: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
        log_p, grad, precision = all_terms(jnp.asarray(z, jnp.float64))
        return float(log_p), np.asarray(grad), np.asarray(precision)

    return evaluate
