"""Per-subject maximum likelihood, vectorised across subjects.

Rows are split into one padded cell per subject (estimation/cells.py) and every subject's

    negll_g(z) = - sum_{i in g} mask_i ll_i(theta(z))

is minimised at once by the vmapped damped Newton method of estimation/ml/optimize.py (one
compilation for all subjects). Standard errors: inverse Hessian per subject (NaN with a flag
when it is not positive definite). Flags mark subjects whose data cannot identify the model:
a subject who never draws or never stops (stopping data), who always picks the same option
(lottery data), choices predicted almost perfectly (mean -ll per row below 1e-3), an
estimate at a bound, a Hessian that is not positive definite, or no convergence.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.arrays import LotteryData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.cells import split_into_cells, subject_labels
from stopwise.estimation.ml.covariance import hessian_covariance, wald_rows
from stopwise.estimation.ml.mle import BOUND_Z
from stopwise.estimation.ml.optimize import batched_newton, start_design
from stopwise.estimation.ml.problem import (
    Layout,
    check_kind,
    make_layout,
    natural_np,
    reported_rows,
    start_vector,
    theta_scalars,
)
from stopwise.estimation.ml.response import _strip
from stopwise.estimation.ml.results import Fit, FitBySubject

SEPARATION = 1e-3  # mean -ll per row below this: every choice predicted with p > 0.999


@dataclass(frozen=True)
class SubjectNegll:
    """fun(z, (cell bundle, mask), None) = -sum_i mask_i ll_i(theta(z)) (hashable)."""

    layout: Layout

    def __call__(self, z: Any, batch: Any, shared: Any) -> Any:
        data, mask = batch
        ll = self.layout.model.loglik_obs(theta_scalars(self.layout, z), data)
        return -jnp.sum(jnp.where(mask > 0, mask * ll, 0.0))


def data_flags(data: Any, rows: np.ndarray) -> list[str]:
    """Flags from a subject's raw choices alone."""
    if isinstance(data, LotteryData):
        chose_b = np.asarray(data.choice_b)[rows]
        if chose_b.min() == chose_b.max():
            return [f"always chose {'B' if chose_b[0] > 0 else 'A'}"]
        return []
    draw = np.asarray(data.draw)[rows]
    if draw.sum() == 0:
        return ["never draws"]
    if draw.min() > 0:
        return ["never stops (every trial ends in a bust or at the cap)"]
    return []


def fit_by_subject(
    model: Any,
    data: Any,
    *,
    se: str | None = "hessian",
    seed: int = 0,
    fixed: Mapping[str, float] | None = None,
    max_iter: int = 100,
    retry: bool = True,
) -> FitBySubject:
    """One maximum-likelihood fit per subject (module docstring)."""
    check_kind(model, data)
    if se not in ("hessian", "auto", None):
        raise StopwiseInputError(
            f"per-subject fits report Hessian standard errors; --se {se} is not available "
            "with --by subject"
        )
    layout = make_layout(model, fixed)
    cells = split_into_cells(_strip(data), np.asarray(data.subject))
    fun = SubjectNegll(layout)
    batch = (cells.data, jnp.asarray(cells.mask))
    z0 = start_vector(layout)
    n = cells.n_cells
    z, v, _g, h, iters, ok = (
        np.asarray(a)
        for a in batched_newton(fun, jnp.tile(jnp.asarray(z0), (n, 1)), batch, None, max_iter, 1e-6)
    )
    if retry and not ok.all():  # a second start for the subjects that did not converge
        z_alt = start_design(z0, 2, seed)[1]
        z2, v2, _g2, h2, it2, ok2 = (
            np.asarray(a)
            for a in batched_newton(
                fun, jnp.tile(jnp.asarray(z_alt), (n, 1)), batch, None, max_iter, 1e-6
            )
        )
        better = (~ok & ok2) | (ok2 & (v2 < v - 1e-9))
        z = np.where(better[:, None], z2, z)
        v = np.where(better, v2, v)
        h = np.where(better[:, None, None], h2, h)
        iters = np.where(better, it2, iters)
        ok = ok | ok2
    reported = reported_rows(layout)
    labels = subject_labels(data)
    fits, flags = [], {}
    for c in range(n):
        subject_id = int(cells.labels[c])
        label = labels[subject_id] if subject_id < len(labels) else subject_id
        rows = cells.rows[c][cells.rows[c] >= 0]
        cov = hessian_covariance(h[c]) if se is not None else None
        table = wald_rows(reported, z[c], cov)
        subject_flags = data_flags(data, rows)
        if float(v[c]) < SEPARATION * len(rows) and not subject_flags:
            subject_flags.append(
                "choices predicted almost perfectly (separation): the noise "
                "parameter runs off towards determinism"
            )
        at_bound = [r.name for r in reported if _at_bound(r.spec, z[c][r.index])]
        subject_flags += [f"{name} at a bound" for name in at_bound]
        warnings = []
        if se is not None and cov is None:
            subject_flags.append("Hessian not positive definite")
            warnings.append("the Hessian is not positive definite: standard errors are NaN")
        if not ok[c]:
            subject_flags.append("did not converge")
            warnings.append("the optimiser did not converge")
        fits.append(
            (
                label,
                Fit(
                    model=model.name,
                    method="mle",
                    converged=bool(ok[c]),
                    n_obs=len(rows),
                    n_subjects=1,
                    loglik=-float(v[c]),
                    k=layout.size,
                    table=table,
                    se_method="hessian" if se is not None else None,
                    warnings=warnings,
                    seed=seed,
                    optimizer={"algorithm": "vmapped damped Newton", "iterations": int(iters[c])},
                    at_bound=at_bound,
                    z=z[c],
                    cov_z=cov,
                ),
            )
        )
        flags[label] = subject_flags
    n_flag = sum(bool(f) for f in flags.values())
    warnings = [f"{n_flag} of {n} subjects are flagged (see flags)"] if n_flag else []
    return FitBySubject(model=model.name, fits=fits, flags=flags, seed=seed, warnings=warnings)


def _at_bound(spec: Any, z: float) -> bool:
    value = float(natural_np(spec, z))
    near = any(
        np.isfinite(b) and abs(value - b) <= 1e-6 * (1.0 + abs(b)) for b in (spec.lower, spec.upper)
    )
    return bool(near or (spec.transform != "identity" and abs(z) > BOUND_Z) or abs(z) > 25)
