"""Per-subject whitening of a hierarchical fit's subject sites: a fixed affine change of the
sampler's coordinates that removes the correlation between one subject's parameters.

A subject's parameters are correlated in its posterior: for crra+planner+logit on the 120
demo subjects the per-subject ML correlation of (z_r, z_precision) has median 0.83 (a ridge
precision ~ 1 - r). NUTS's mass matrix for the subject sites is diagonal (a dense one over
all subjects is too large to adapt from a short warm-up), so the step size follows the
narrow direction of each ridge and the trajectory its long one: many leapfrog steps per
draw. The cure used here is the sampler-coordinate version of a block-diagonal dense mass
matrix with one K x K block per subject, fixed at the start.

With x_s in R^K the subject's sampled site values (parameter k centred: z_subject_<k>[s];
non-centred: eta_<k>[s]; estimation/bayes/density.py) the sampler draws w_s and sets

    x_s = a_s + A_s w_s,

a_s the start point and A_s the lower Cholesky factor of S_s = P_s^-1, the normal
approximation of x_s's posterior covariance at the start (population at its start values,
Omega = I, T = diag(sd)):

    P_s = D H_s D + diag(q),   D = diag(d),  d_k = 1 (centred) or sd_k (non-centred),
                               q_k = 1 / sd_k^2 (centred) or 1 (non-centred),

H_s the inverse of the subject's ML covariance of z (0 where it is unknown or not positive
definite: then S_s is the population prior's diagonal). The Jacobian |det A_s| is constant,
so the posterior of x (and of everything built from it) is unchanged; only the geometry
NUTS sees changes. After sampling, the draws of w are mapped back to the original sites
(``unwhiten_samples``), so every later step reads the same sites as an unwhitened fit.

Off by default (``fit_bayes(whiten_subjects=...)``): on the 120 demo subjects
(crra+planner+logit, r centred, precision non-centred, 2 chains x 600 draws after 400
warm-up, 2026-12-02, load average 10) it cut the leapfrog steps per draw from 31 to 21 but
the min bulk ESS (precision's between-subject sd) from 690 to 203, R-hat 1.03: fewer
effective draws per gradient. A likely cause, not tested: A_s is fixed at the start's
population sd and Omega = I, while the subject sites' posterior moves with both.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

WHITE_SITE = "w_subject"


@dataclass(frozen=True)
class SubjectWhitening:
    """a (n, K) start point and A (n, K, K) lower-triangular factors of x_s = a_s + A_s w_s."""

    offset: Any
    tril: Any


jax.tree_util.register_pytree_node(
    SubjectWhitening,
    lambda w: ((w.offset, w.tril), None),
    lambda _, c: SubjectWhitening(*c),
)


def subject_site_names(names: tuple[str, ...], centred: tuple[bool, ...]) -> tuple[str, ...]:
    """The subject site of each parameter: z_subject_<k> (centred) or eta_<k>."""
    return tuple(f"z_subject_{n}" if c else f"eta_{n}" for n, c in zip(names, centred, strict=True))


def whitening_precision(
    cov: np.ndarray | None, sd: np.ndarray, centred: tuple[bool, ...]
) -> np.ndarray:
    """P_s = D H_s D + diag(q) for every subject (module docstring), shape (n, K, K);
    ``cov`` (n, K, K) the per-subject ML covariances of z (NaN rows where unknown)."""
    sd = np.asarray(sd, np.float64)
    c = np.asarray(centred, bool)
    d = np.where(c, 1.0, sd)
    q = np.where(c, 1.0 / sd**2, 1.0)
    k = len(sd)
    n = 0 if cov is None else len(cov)
    prec = np.zeros((n, k, k))
    for s in range(n):
        h = likelihood_precision(cov[s])
        prec[s] = d[:, None] * h * d[None, :]
    return prec + np.diag(q)[None, :, :]


def likelihood_precision(cov: np.ndarray) -> np.ndarray:
    """H = cov^-1 over the parameters with a finite variance (the others, e.g. held fixed
    in the ML fit, get 0: no information), or 0 when that block is not finite and
    positive definite."""
    cov = np.asarray(cov, np.float64)
    k = cov.shape[0]
    h = np.zeros((k, k))
    known = np.flatnonzero(np.isfinite(np.diag(cov)))
    block = cov[np.ix_(known, known)]
    if known.size == 0 or not np.all(np.isfinite(block)):
        return h
    sym = 0.5 * (block + block.T)
    if np.linalg.eigvalsh(sym)[0] <= 0:
        return h
    inv = np.linalg.inv(sym)
    h[np.ix_(known, known)] = 0.5 * (inv + inv.T)
    return h


def build_whitening(
    start_x: np.ndarray, cov: np.ndarray | None, sd: np.ndarray, centred: tuple[bool, ...]
) -> SubjectWhitening:
    """a_s = start_x[s], A_s = chol(P_s^-1) (module docstring); subjects without a
    covariance get P_s = diag(q)."""
    start_x = np.asarray(start_x, np.float64)
    n, k = start_x.shape
    if cov is None:
        cov = np.full((n, k, k), np.nan)
    prec = whitening_precision(cov, sd, centred)
    tril = np.linalg.cholesky(np.linalg.inv(prec))
    return SubjectWhitening(offset=start_x, tril=tril)


def sites_from_white(w: Any, whitening: SubjectWhitening) -> Any:
    """x = a + A w per subject: w (n, K) -> x (n, K) (JAX or numpy arrays)."""
    return whitening.offset + jnp.einsum("skj,sj->sk", whitening.tril, w)


def white_from_sites(x: np.ndarray, whitening: SubjectWhitening) -> np.ndarray:
    """w = A^-1 (x - a) per subject, the inverse of ``sites_from_white`` (numpy)."""
    diff = np.asarray(x, np.float64) - np.asarray(whitening.offset)
    tril = np.asarray(whitening.tril)
    return np.stack([np.linalg.solve(tril[s], diff[s]) for s in range(len(diff))])


def unwhiten_samples(
    samples: Mapping[str, np.ndarray], whitening: SubjectWhitening, site_names: tuple[str, ...]
) -> dict[str, np.ndarray]:
    """Draws of w (chains, draws, n, K) mapped to the original subject sites x = a + A w,
    one array (chains, draws, n) per site; other sites unchanged, w dropped."""
    out = {k: v for k, v in samples.items() if k != WHITE_SITE}
    w = np.asarray(samples[WHITE_SITE], np.float64)
    x = np.asarray(whitening.offset)[None, None] + np.einsum(
        "skj,cdsj->cdsk", np.asarray(whitening.tril), w
    )
    for k, site in enumerate(site_names):
        out[site] = x[..., k]
    return out
