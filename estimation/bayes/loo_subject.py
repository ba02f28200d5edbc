"""Leave-one-subject-out predictive accuracy that is trustworthy for every subject.

The unit is the subject: elpd = sum_s log p(y_s | y_-s), the log predictive density of a
whole subject's decisions given everyone else's (a new person, not new trials of known
people). PSIS-LOO (Vehtari, Gelman & Gabry 2017) estimates each term from the full posterior
with the log-likelihood summed per subject; where its Pareto k exceeds 0.7 the estimate is
unreliable, and the term is computed exactly instead by fitting again without the subject:

  pooled:        log p(y_s | y_-s) = log mean_d exp(sum_i log p(y_si | theta_d)),
                 theta_d drawn from p(theta | y_-s)
  hierarchical:  the held-out subject is a new member of the population,
                 z = mu_d + diag(sd_d) L_d eta,  eta ~ Normal(0, I), M draws per posterior
                 draw d: log mean_{d,m} exp(sum_i log p(y_si | to_natural(z_dm)))

One refit per flagged subject while there are at most ``MAX_EXACT_REFITS`` of them;
otherwise K-fold cross-validation by subject (``K_FOLDS`` folds of whole subjects, one refit
per fold) replaces every term. The result says which was done and how many refits it took.
Covariate formulas are not supported by the refits (the held-out subject's parameters would
need its design rows): their PSIS terms stay, and the result says so.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from scipy.special import logsumexp

PARETO_K_MAX = 0.7  # Vehtari et al. 2017/2024: k > 0.7 makes the PSIS estimate unreliable
MAX_EXACT_REFITS = 10
K_FOLDS = 10
NEW_SUBJECT_DRAWS = 8  # M above


@dataclass
class SubjectLoo:
    """Per-subject elpd terms after repairs, and what was done."""

    elpd_i: np.ndarray
    method: str
    refits: int
    repaired: list[int] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def elpd(self) -> float:
        return float(np.sum(self.elpd_i))

    @property
    def se(self) -> float:
        """sqrt(n var(elpd_i)), the usual standard error of a sum of pointwise terms."""
        n = self.elpd_i.size
        return float(math.sqrt(n * np.var(self.elpd_i, ddof=1))) if n > 1 else math.nan


def subject_rows(data: Any, subject: int) -> np.ndarray:
    return np.flatnonzero(np.asarray(data.subject) == subject)


def without_subjects(data: Any, drop: Sequence[int]) -> Any:
    """The bundle without the subjects coded in ``drop``; subject codes renumbered 0..n-1
    and the labels kept in step."""
    subject = np.asarray(data.subject)
    keep_rows = np.flatnonzero(~np.isin(subject, np.asarray(drop)))
    kept = data.take(keep_rows)
    old_codes = np.unique(subject[keep_rows])
    recode = np.full(int(subject.max()) + 1, -1, np.int64)
    recode[old_codes] = np.arange(old_codes.size)
    labels = None
    if data.subject_labels is not None:
        labels = np.asarray(data.subject_labels)[old_codes]
    new_subject = recode[np.asarray(kept.subject)].astype(np.asarray(data.subject).dtype)
    return replace(kept, subject=new_subject, subject_labels=labels)


def held_out_elpd(post: Any, held: Any, seed: int) -> float:
    """log p(y_held | data of the fit ``post``) by the module docstring's formulas."""
    setup = post.setup
    flat = post._samples
    bare = replace(held, covariates={})
    loglik = setup.model.loglik_obs
    names = setup.names
    if not setup.hierarchical:
        z = jnp.stack([jnp.asarray(flat[f"z_{n}"]) for n in names], axis=1)  # (D, K)
    else:
        z = new_subject_z(setup, flat, seed)
    specs = setup.specs

    def subject_total(z_row: Any) -> Any:
        theta = {s.name: s.to_natural(z_row[k]) for k, s in enumerate(specs)}
        return jnp.sum(loglik(theta, bare))

    totals = np.asarray(jax.jit(jax.vmap(subject_total))(z))
    return float(logsumexp(totals) - math.log(totals.size))


def new_subject_z(setup: Any, flat: Mapping[str, np.ndarray], seed: int) -> Any:
    """z_dm = mu_d + diag(sd_d) L_d eta_dm for M new-subject draws per posterior draw,
    stacked to (D * M, K)."""
    k = len(setup.names)
    mu = jnp.stack([jnp.asarray(flat[f"z_{n}"]) for n in setup.names], axis=1)  # (D, K)
    sd = jnp.asarray(flat["sd_z"])  # (D, K)
    chol = jnp.asarray(flat["L_corr"]) if k > 1 else jnp.ones((mu.shape[0], 1, 1))
    eta = jax.random.normal(jax.random.PRNGKey(seed), (mu.shape[0], NEW_SUBJECT_DRAWS, k))
    u = jnp.einsum("dij,dmj->dmi", sd[:, :, None] * chol, eta)
    return (mu[:, None, :] + u).reshape(-1, k)


def repair(
    post: Any,
    psis_elpd_i: np.ndarray,
    pareto_k: np.ndarray,
    refit: Callable[[Any, int], Any],
    *,
    has_formulas: bool,
    k_max: float = PARETO_K_MAX,
    max_exact: int = MAX_EXACT_REFITS,
    folds: int = K_FOLDS,
) -> SubjectLoo:
    """Replace unreliable PSIS terms (Pareto k > k_max) by exact refits, or all terms by
    K-fold by subject when more than ``max_exact`` subjects are flagged. ``refit(data,
    seed)`` fits the same model with the same settings to other data."""
    elpd_i = np.asarray(psis_elpd_i, np.float64).copy()
    flagged = [int(s) for s in np.flatnonzero(~(np.asarray(pareto_k) <= k_max))]
    data = post.data
    code = np.unique(np.asarray(data.subject))  # unit i is the subject coded code[i]
    seed = int(post.run["seed"])
    if not flagged:
        return SubjectLoo(elpd_i, "PSIS-LOO (every Pareto k <= 0.7)", 0)
    if has_formulas:
        note = (
            f"{len(flagged)} subjects have Pareto k > {k_max}; refits without them are not "
            "available with covariate formulas, so their PSIS terms are not trustworthy"
        )
        return SubjectLoo(elpd_i, "PSIS-LOO (unrepaired)", 0, [], [note])
    n = elpd_i.size
    if len(flagged) <= max_exact and n > 1:
        for i, s in enumerate(flagged):
            fit = refit(without_subjects(data, [code[s]]), seed + 1 + i)
            held = data.take(subject_rows(data, code[s]))
            elpd_i[s] = held_out_elpd(fit, held, seed + 1 + i)
        method = f"PSIS-LOO, {len(flagged)} subjects with Pareto k > {k_max} refitted exactly"
        return SubjectLoo(elpd_i, method, len(flagged), flagged)
    k = min(folds, n)
    fold_of = np.random.default_rng(seed).permutation(n) % k
    for f in range(k):
        held = [int(s) for s in np.flatnonzero(fold_of == f)]
        fit = refit(without_subjects(data, code[held]), seed + 1 + f)
        for s in held:
            rows = data.take(subject_rows(data, code[s]))
            elpd_i[s] = held_out_elpd(fit, rows, seed + 1 + f)
    method = (
        f"{k}-fold cross-validation by subject ({len(flagged)} subjects had Pareto k > "
        f"{k_max}, more than {max_exact} exact refits)"
    )
    return SubjectLoo(elpd_i, method, k, list(range(n)))


def corrected_elpd(psis: Any, result: SubjectLoo) -> Any:
    """ArviZ's ELPDData with the repaired terms: loo_i, elpd_loo = sum, se, p_loo = lppd -
    elpd_loo (lppd from the full posterior); Pareto k of a repaired term is NaN (no
    importance sampling was used for it)."""
    out = psis.copy(deep=True)
    lppd = float(psis["elpd_loo"]) + float(psis["p_loo"])
    out["loo_i"] = psis["loo_i"].copy(data=result.elpd_i)
    out["elpd_loo"] = result.elpd
    out["se"] = result.se
    out["p_loo"] = lppd - result.elpd
    if result.repaired:
        k = np.asarray(psis["pareto_k"].values, np.float64).copy()
        k[result.repaired] = np.nan
        out["pareto_k"] = psis["pareto_k"].copy(data=k)
        out["warning"] = bool(np.any(k > PARETO_K_MAX))
    return out
