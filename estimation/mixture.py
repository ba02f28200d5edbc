"""Finite mixtures by direct maximum likelihood: each subject belongs to one of K types
(K parameter vectors of one model, or K different models), with shares pi_k:

    ln L = sum_g ln sum_k pi_k exp(L_gk),   L_gk = sum_{i in g} ll_i(theta_k),
    pi = softmax(0, eta_2, ..., eta_K),

maximised over (z_1, ..., z_K, eta) with exact JAX derivatives (several starts). Each
subject's posterior type probabilities are  P(k | g) = pi_k exp(L_gk) / sum_j pi_j exp(L_gj)
(computed in log space). Types of one model are ordered by their first parameter so that
labels are comparable across runs. Rows of the likelihood are subjects, so the sandwich and
the bootstrap cluster by subject automatically.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
from scipy import stats

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.covariance import RowTable
from stopwise.estimation.mle import _strip, run_fit
from stopwise.estimation.optimize import start_design
from stopwise.estimation.problem import (
    Layout,
    Problem,
    check_kind,
    make_layout,
    natural_np,
    pad_rows,
    padded_size,
    reported_rows,
    start_vector,
    subject_index,
    subject_labels,
    theta_scalars,
)
from stopwise.estimation.results import Fit


@dataclass(frozen=True)
class MixtureRows:
    """Per-subject mixture log-likelihood ln sum_k pi_k exp(L_gk); args = (data, w, subj)."""

    layouts: tuple[Layout, ...]
    n_subjects: int

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


def mixture_starts(layouts: Sequence[Layout], n_starts: int, seed: int) -> np.ndarray:
    """Start 0: type k at its spec start shifted by (k - (K-1)/2) on every coordinate (types
    spread apart), equal shares; then a scrambled Sobol design around it."""
    k_types = len(layouts)
    base = np.concatenate(
        [start_vector(lay) + (k - (k_types - 1) / 2.0) for k, lay in enumerate(layouts)]
        + [np.zeros(k_types - 1)]
    )
    return start_design(base, n_starts, seed, spread=1.5)


def _share_rows(
    z: np.ndarray, cov: np.ndarray | None, n_model: int, k_types: int
) -> tuple[np.ndarray, np.ndarray]:
    """Shares pi = softmax(0, eta) and delta-method SEs: J = d pi / d eta."""
    eta = np.concatenate([[0.0], z[n_model:]])
    pi = np.exp(eta - np.logaddexp.reduce(eta))
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
) -> Fit:
    """Mixture of ``k`` types of one model, or of the given list of models (module
    docstring). The Fit's ``extras["posterior"]`` holds each subject's type probabilities."""
    model_list = list(models) if isinstance(models, (list, tuple)) else [models] * int(k or 2)
    if len(model_list) < 2:
        raise StopwiseInputError("a mixture needs at least two types")
    for m in model_list:
        check_kind(m, data)
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
    fit = run_fit(
        problem,
        name,
        g,
        se=se,
        starts=mixture_starts(layouts, starts, seed),
        seed=seed,
        max_iter=max_iter,
        progress=False,
    )
    if same_model:
        fit = _order_types(fit, problem, rows, se)
    _add_shares(fit, problem, n_model, len(layouts), se)
    comps = np.asarray(_components(rows, jnp.asarray(fit.z), problem.args))
    post = np.exp(comps - np.logaddexp.reduce(comps, axis=1, keepdims=True))
    labels = subject_labels(data)
    fit.extras["posterior"] = pd.DataFrame(
        post,
        index=pd.Index(labels, name="subject"),
        columns=[f"type{t + 1}" for t in range(len(layouts))],
    )
    fit.notes.append("each subject's posterior type probabilities: fit.extras['posterior']")
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
    return run_fit(
        problem,
        fit.model,
        fit.n_subjects,
        se=se,
        starts=z_new[None, :],
        seed=fit.seed,
        progress=False,
    )


def _add_shares(fit: Fit, problem: Problem, n_model: int, k_types: int, se: str | None) -> None:
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
    if se == "bootstrap":
        fit.notes.append("type shares carry delta-method (not bootstrap) uncertainty: NaN here")
