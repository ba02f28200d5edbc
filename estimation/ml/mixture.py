"""Finite mixtures by direct maximum likelihood: each subject belongs to one of K types
(K parameter vectors of one model, or K different models), with shares pi_k:

    ln L = sum_g ln sum_k pi_k exp(L_gk),   L_gk = sum_{i in g} ll_i(theta_k),
    pi = softmax(0, eta_2, ..., eta_K),

maximised over (z_1, ..., z_K, eta) with exact JAX derivatives (several starts). Each
subject's posterior type probabilities are  P(k | g) = pi_k exp(L_gk) / sum_j pi_j exp(L_gj)
(computed in log space). Types of one model are ordered by their first parameter so that
labels are comparable across runs. Rows of the likelihood are subjects, so the sandwich and
the bootstrap cluster by subject automatically.

Shares get delta-method standard errors (d pi / d eta = diag(pi) - pi pi') or, with
se="bootstrap", the spread of the shares over subject-level bootstrap replications with
percentile intervals. Label switching in the bootstrap is undone by one stated rule: each
replication's types are matched to the full-sample types by the assignment that minimises
the summed squared distance of their coefficient vectors on the unconstrained scale
(Hungarian algorithm, scipy.optimize.linear_sum_assignment); types of different models are
never matched to each other.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence
from dataclasses import dataclass
from functools import partial
from typing import Any, ClassVar

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
from scipy import stats
from scipy.optimize import linear_sum_assignment

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.limits import MAX_TYPES
from stopwise.estimation.cells import subject_labels
from stopwise.estimation.ml.bootstrap import bootstrap_table, percentile_table
from stopwise.estimation.ml.covariance import RowTable
from stopwise.estimation.ml.mle import run_fit
from stopwise.estimation.ml.optimize import start_design
from stopwise.estimation.ml.problem import (
    Layout,
    Problem,
    check_kind,
    make_layout,
    natural_np,
    pad_rows,
    padded_size,
    report_values,
    reported_rows,
    start_vector,
    subject_index,
    theta_scalars,
)
from stopwise.estimation.ml.response import _strip
from stopwise.estimation.ml.results import Fit


@dataclass(frozen=True)
class MixtureRows:
    """Per-subject mixture log-likelihood ln sum_k pi_k exp(L_gk); args = (data, w, subj)."""

    layouts: tuple[Layout, ...]
    n_subjects: int
    # many optima (label switching, vanishing shares): scipy trust-exact's path is kept
    # (mle.optimise); the compiled Newton reached a vanishing share where it found more
    multimodal: ClassVar[bool] = True

    @property
    def offsets(self) -> tuple[int, ...]:
        return tuple(int(x) for x in np.cumsum([0] + [lay.size for lay in self.layouts])[:-1])

    @property
    def n_model_coef(self) -> int:
        return int(sum(lay.size for lay in self.layouts))

    def components(self, z: Any, args: Any) -> Any:
        """ln pi_k + L_gk, shape (G, K)."""
        data, w, subj = args
        per_type = []
        for lay, off in zip(self.layouts, self.offsets):
            ll = lay.model.loglik_obs(theta_scalars(lay, z[off : off + lay.size]), data)
            ll = jnp.where(w > 0, w * ll, 0.0)
            per_type.append(jax.ops.segment_sum(ll, subj, num_segments=self.n_subjects))
        eta = jnp.concatenate([jnp.zeros(1), z[self.n_model_coef :]])
        log_pi = jax.nn.log_softmax(eta)
        return log_pi[None, :] + jnp.stack(per_type, axis=1)

    def __call__(self, z: Any, args: Any) -> Any:
        return jax.scipy.special.logsumexp(self.components(z, args), axis=1)


@partial(jax.jit, static_argnums=0)
def _components(rows: MixtureRows, z: Any, args: Any) -> Any:
    return rows.components(z, args)


def check_type_count(k_types: int, n_subjects: int) -> None:
    """Refuse more than MAX_TYPES types (README, "Limits"), and as many types as subjects or
    more: types are told apart by subjects, so K >= subjects cannot be identified."""
    if k_types > MAX_TYPES:
        raise StopwiseInputError(
            f"a mixture of {k_types} types is beyond the documented limit of {MAX_TYPES} "
            "types (README, 'Limits')"
        )
    if k_types >= n_subjects:
        raise StopwiseInputError(
            f"a mixture of {k_types} types needs more subjects than types; the data have "
            f"{n_subjects} subject(s), so use at most {max(n_subjects - 1, 1)} types (or fit "
            "--by subject)"
        )


def mixture_starts(layouts: Sequence[Layout], n_starts: int, seed: int) -> np.ndarray:
    """Start 0: type k at its spec start shifted by (k - (K-1)/2) on every coordinate (types
    spread apart), equal shares; then a scrambled Sobol design around it."""
    k_types = len(layouts)
    base = np.concatenate(
        [start_vector(lay) + (k - (k_types - 1) / 2.0) for k, lay in enumerate(layouts)]
        + [np.zeros(k_types - 1)]
    )
    return start_design(base, n_starts, seed, spread=1.5)


def shares_of(z: np.ndarray, n_model: int) -> np.ndarray:
    """pi = softmax(0, eta_2, ..., eta_K) from the trailing coefficients (log space)."""
    eta = np.concatenate([[0.0], np.asarray(z)[n_model:]])
    return np.exp(eta - np.logaddexp.reduce(eta))


def _share_rows(
    z: np.ndarray, cov: np.ndarray | None, n_model: int, k_types: int
) -> tuple[np.ndarray, np.ndarray]:
    """Shares pi = softmax(0, eta) and delta-method SEs: J = d pi / d eta."""
    pi = shares_of(z, n_model)
    if cov is None:
        return pi, np.full(k_types, np.nan)
    jac = (np.diag(pi) - np.outer(pi, pi))[:, 1:]  # d pi_k / d eta_j, j = 2..K
    cov_eta = cov[n_model:, n_model:]
    return pi, np.sqrt(np.clip(np.diag(jac @ cov_eta @ jac.T), 0.0, None))


def fit_mixture(
    models: Any | Sequence[Any],
    data: Any,
    *,
    k: int | None = None,
    se: str | None = "auto",
    starts: int = 8,
    seed: int = 0,
    max_iter: int = 300,
    bootstrap_reps: int = 200,
    progress: bool = False,
) -> Fit:
    """Mixture of ``k`` types of one model, or of the given list of models (module
    docstring). The Fit's ``extras["posterior"]`` holds each subject's type probabilities.
    ``se``: "auto", "robust", "hessian", "bootstrap" (``bootstrap_reps`` subject-level
    replications, shares included) or None."""
    model_list = list(models) if isinstance(models, (list, tuple)) else [models] * int(k or 2)
    if len(model_list) < 2:
        raise StopwiseInputError("a mixture needs at least two types")
    for m in model_list:
        check_kind(m, data)
    check_type_count(len(model_list), data.n_subjects)
    same_model = all(m is model_list[0] for m in model_list)
    layouts = tuple(make_layout(m) for m in model_list)
    g = data.n_subjects
    size = padded_size(data.n_obs)
    padded = pad_rows(_strip(data), size)
    w = np.zeros(size)
    w[: data.n_obs] = 1.0
    subj = np.zeros(size, dtype=np.int64)
    subj[: data.n_obs] = subject_index(data)
    rows = MixtureRows(layouts, g)
    reported = []
    for t, (lay, off) in enumerate(zip(layouts, rows.offsets)):
        prefix = f"type{t + 1}:" if same_model else f"type{t + 1}[{lay.model.name}]:"
        reported += reported_rows(lay, prefix=prefix, offset=off)
    n_model = rows.n_model_coef
    z0 = mixture_starts(layouts, 1, seed)[0]
    problem = Problem(
        rows,
        (padded, jnp.asarray(w), jnp.asarray(subj)),
        np.ones(g),
        np.arange(g),
        g,
        data.n_obs,
        z0,
        reported,
        [r.name for r in reported] + [f"eta{j + 2}" for j in range(len(layouts) - 1)],
    )
    name = (
        f"mixture of {len(layouts)} x {model_list[0].name}"
        if same_model
        else "mixture of " + " | ".join(m.name for m in model_list)
    )
    analytic_se = None if se == "bootstrap" else se
    fit = run_fit(
        problem,
        name,
        g,
        se=analytic_se,
        starts=mixture_starts(layouts, starts, seed),
        seed=seed,
        max_iter=max_iter,
        progress=False,
    )
    if same_model:
        fit = _order_types(fit, problem, rows, analytic_se)
    if se == "bootstrap":
        _bootstrap_with_shares(fit, problem, rows, bootstrap_reps, progress)
    else:
        _add_shares(fit, n_model, len(layouts))
    comps = np.asarray(_components(rows, jnp.asarray(fit.z), problem.args))
    post = np.exp(comps - np.logaddexp.reduce(comps, axis=1, keepdims=True))
    labels = subject_labels(data)
    fit.extras["posterior"] = pd.DataFrame(
        post,
        index=pd.Index(labels, name="subject"),
        columns=[f"type{t + 1}" for t in range(len(layouts))],
    )
    fit.notes.append(
        "each subject's posterior type probabilities: the JSON key type_probabilities "
        "(Python: fit.extras['posterior'])"
    )
    return fit


def _order_types(fit: Fit, problem: Problem, rows: MixtureRows, se: str | None) -> Fit:
    """Reorder the types by their first parameter (natural scale), then refit the SEs."""
    lay = rows.layouts[0]
    spec = lay.specs()[0]
    firsts = [float(natural_np(spec, fit.z[off])) for off in rows.offsets]
    order = np.argsort(firsts)
    if np.all(order == np.arange(len(order))):
        return fit
    blocks = [fit.z[off : off + lay.size] for off in rows.offsets]
    eta = np.concatenate([[0.0], fit.z[rows.n_model_coef :]])[order]
    z_new = np.concatenate([blocks[i] for i in order] + [eta[1:] - eta[0]])
    ordered = run_fit(
        problem,
        fit.model,
        fit.n_subjects,
        se=se,
        starts=z_new[None, :],
        seed=fit.seed,
        progress=False,
    )
    keep = ("starts", "spread", "start_logliks", "start_outcomes")
    ordered.optimizer.update({k: fit.optimizer[k] for k in keep if k in fit.optimizer})
    ordered.notes = list(fit.notes) + [n for n in ordered.notes if n not in fit.notes]
    return ordered


def _add_shares(fit: Fit, n_model: int, k_types: int) -> None:
    """Append the shares with delta-method SEs and Wald intervals clipped to [0, 1]."""
    pi, se_pi = _share_rows(fit.z, fit.cov_z, n_model, k_types)
    q = stats.norm.ppf(0.975)
    t = fit.table
    fit.table = RowTable(
        t.names + [f"share:type{j + 1}" for j in range(k_types)],
        np.concatenate([t.estimate, pi]),
        np.concatenate([t.se, se_pi]),
        np.concatenate([t.ci_low, np.clip(pi - q * se_pi, 0.0, 1.0)]),
        np.concatenate([t.ci_high, np.clip(pi + q * se_pi, 0.0, 1.0)]),
        t.scale + ["natural"] * k_types,
    )


def match_types(z: np.ndarray, z_ref: np.ndarray, rows: MixtureRows) -> np.ndarray:
    """Order of z's types that best matches the reference types: the permutation p
    minimising sum_k |block_{p(k)}(z) - block_k(z_ref)|^2 (unconstrained coefficients;
    types of different models cost 1e12, so they are never swapped)."""
    k_types = len(rows.layouts)
    cost = np.empty((k_types, k_types))
    for k, (lay_k, off_k) in enumerate(zip(rows.layouts, rows.offsets)):
        for j, (lay_j, off_j) in enumerate(zip(rows.layouts, rows.offsets)):
            if lay_k.model is not lay_j.model or lay_k.free != lay_j.free:
                cost[k, j] = 1e12
                continue
            diff = z[off_j : off_j + lay_j.size] - z_ref[off_k : off_k + lay_k.size]
            cost[k, j] = float(diff @ diff)
    _, order = linear_sum_assignment(cost)
    return np.asarray(order)


def relabel(z: np.ndarray, order: np.ndarray, rows: MixtureRows) -> np.ndarray:
    """Coefficients with type k taken from type order[k] of z (shares follow their type:
    eta' = eta[order] - eta[order[0]], so pi' = pi[order])."""
    blocks = [z[off : off + lay.size] for lay, off in zip(rows.layouts, rows.offsets)]
    eta = np.concatenate([[0.0], z[rows.n_model_coef :]])[order]
    return np.concatenate([blocks[i] for i in order] + [eta[1:] - eta[0]])


def coinciding_types(z: np.ndarray, rows: MixtureRows, tol: float = 1e-3) -> list[str]:
    """Warnings for pairs of types of one model whose coefficient vectors lie within ``tol``
    (Euclidean, unconstrained scale): their shares are not identified separately, and no
    relabelling rule can make their bootstrap spreads meaningful."""
    out = []
    pairs = zip(rows.layouts, rows.offsets)
    for (k, (lay_k, off_k)), (j, (lay_j, off_j)) in itertools.combinations(enumerate(pairs), 2):
        if lay_k.model is not lay_j.model or lay_k.free != lay_j.free:
            continue
        gap = float(np.linalg.norm(z[off_k : off_k + lay_k.size] - z[off_j : off_j + lay_j.size]))
        if gap < tol:
            out.append(
                f"types {k + 1} and {j + 1} coincide (coefficients {gap:.2g} apart): their "
                "shares are not identified separately; fit fewer types"
            )
    return out


def _bootstrap_with_shares(
    fit: Fit, problem: Problem, rows: MixtureRows, reps: int, progress: bool
) -> None:
    """Subject-level bootstrap of every reported row and every share, replications relabelled
    to the full-sample types first (module docstring); percentile intervals."""
    _, info, warnings = bootstrap_table(problem, fit.z, reps, fit.seed, progress)
    orders = [match_types(z, fit.z, rows) for z in info["z"]]
    z_b = np.array([relabel(z, o, rows) for z, o in zip(info["z"], orders)])
    n_switched = sum(1 for o in orders if np.any(o != np.arange(len(o))))
    n_model, k_types = rows.n_model_coef, len(rows.layouts)

    def reported_with_shares(z: np.ndarray) -> np.ndarray:
        return np.concatenate([report_values(problem.reported, z), shares_of(z, n_model)])

    values = np.array([reported_with_shares(z) for z in z_b]).reshape(len(z_b), -1)
    fit.table = percentile_table(
        [r.name for r in problem.reported] + [f"share:type{j + 1}" for j in range(k_types)],
        [r.scale for r in problem.reported] + ["natural"] * k_types,
        reported_with_shares(fit.z),
        values,
    )
    fit.se_method = "bootstrap"
    fit.clusters = problem.n_clusters
    fit.warnings += warnings + coinciding_types(fit.z, rows)
    fit.extras["bootstrap"] = {**info, "z": z_b, "relabelled": n_switched}
    fit.notes.append(
        f"subject-level bootstrap: {info['replications']} replications "
        f"({info['converged']} converged), percentile 95% intervals for parameters and "
        f"shares; {n_switched} replications had their types relabelled to match the "
        "full-sample types (closest coefficient vectors)"
    )
