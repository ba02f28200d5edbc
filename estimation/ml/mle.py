"""Maximum likelihood for any model of the contract (models/base.py).

    z_hat = argmax_z  sum_i ll_i(theta(z)),   theta_p = to_natural_p(z_p)   (or, with a
    formula, theta_p[i] = to_natural_p(x_p[i]' b_p))

maximised on the unconstrained scale with exact JAX gradients and Hessians (several starts
in one compiled damped-Newton program, estimation/ml/compiled_multistart.py, with scipy's
trust-exact as the fallback for a start it does not bring to convergence); estimates are
reported on the natural scale with delta-method standard errors (Hessian, subject-clustered sandwich, or subject-level bootstrap).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.cells import split_into_cells
from stopwise.estimation.formulas import build_designs, cells_from_designs
from stopwise.estimation.ml.bootstrap import bootstrap_table
from stopwise.estimation.ml.compiled_multistart import compiled_multistart, compiled_path_suits
from stopwise.estimation.ml.covariance import covariance_for, wald_rows
from stopwise.estimation.ml.optimize import (
    OptimumRecord,
    multistart,
    optimizer_message,
    start_design,
)
from stopwise.estimation.ml.problem import (
    CellRows,
    Layout,
    PooledRows,
    Problem,
    check_kind,
    make_layout,
    natural_np,
    pad_rows,
    padded_size,
    reported_rows,
    start_vector,
    subject_index,
    unconstrained_np,
)
from stopwise.estimation.ml.response import _make_predictor, _strip
from stopwise.estimation.ml.results import Fit
from stopwise.estimation.ml.start_accounting import account_starts

SE_METHODS = ("auto", "robust", "hessian", "bootstrap", None)
BOUND_Z = 12.0  # |z| beyond this counts as "at a bound" (e.g. logit 1 - 6e-6 of the range)


def build_problem(
    model: Any,
    data: Any,
    *,
    formulas: Sequence[str] | Mapping[str, str] | None = None,
    covariate_frame: pd.DataFrame | None = None,
    fixed: Mapping[str, float] | None = None,
) -> tuple[Problem, Layout, dict[str, Any]]:
    """The Problem (estimation/ml/problem.py) for a pooled fit, with covariate formulas if any."""
    check_kind(model, data)
    bare = _strip(data)
    if not formulas:
        layout = make_layout(model, fixed)
        size = padded_size(data.n_obs)
        args = pad_rows(bare, size)
        weights = np.zeros(size)
        weights[: data.n_obs] = 1.0
        cluster = np.zeros(size, dtype=np.int64)
        cluster[: data.n_obs] = subject_index(data)
        problem = Problem(
            PooledRows(layout),
            args,
            weights,
            cluster,
            data.n_subjects,
            data.n_obs,
            start_vector(layout),
            reported_rows(layout),
            list(_coef_names(layout, {})),
        )
        return problem, layout, {}
    columns = covariate_frame if covariate_frame is not None else data.covariates
    designs = build_designs(
        formulas, [n for n in model.param_names if n not in (fixed or {})], columns
    )
    if covariate_frame is not None and len(covariate_frame) != data.n_obs:
        raise StopwiseInputError(
            f"the covariate table has {len(covariate_frame)} rows but the data have "
            f"{data.n_obs} decisions"
        )
    n_coef = {p: f.design.shape[1] for p, f in designs.items()}
    layout = make_layout(model, fixed, n_coef)
    cell_of_row, unique = cells_from_designs(designs, data.n_obs)
    cells = split_into_cells(bare, cell_of_row)
    blocks, col = [], 0
    widths = {p: f.design.shape[1] for p, f in designs.items()}
    offsets: dict[str, int] = {}
    for p in designs:
        offsets[p] = col
        col += widths[p]
    for name in layout.free:
        if name in designs:
            blocks.append(jnp.asarray(unique[:, offsets[name] : offsets[name] + widths[name]]))
        else:
            blocks.append(jnp.ones((cells.n_cells, 1)))
    coef_names = {p: f.columns for p, f in designs.items()}
    z0 = start_vector(layout)
    for spec, off, n in zip(layout.specs(), layout.offsets, layout.n_coef):
        if spec.name in coef_names and "Intercept" not in coef_names[spec.name]:
            z0[off : off + n] = unconstrained_np(spec, spec.start)
    weights = cells.mask.reshape(-1).astype(np.float64)
    cluster = np.asarray(cells.data.subject).reshape(-1).astype(np.int64)
    problem = Problem(
        CellRows(layout),
        (cells.data, tuple(blocks)),
        weights,
        cluster,
        data.n_subjects,
        data.n_obs,
        z0,
        reported_rows(layout, coef_names),
        list(_coef_names(layout, coef_names)),
    )
    return problem, layout, {"cells": cells, "designs": designs, "blocks": blocks}


def _coef_names(layout: Layout, coef_names: Mapping[str, tuple[str, ...]]) -> list[str]:
    out = []
    for name, n in zip(layout.free, layout.n_coef):
        cols = coef_names.get(name, ("Intercept",))
        out += [f"{name}:{c}" if c != "Intercept" else name for c in cols[:n]]
    return out


def starts_from(problem: Problem, layout: Layout, starts: Any, seed: int) -> np.ndarray:
    """Start matrix from an int (spec start + Sobol design) or a list of natural-scale dicts."""
    if isinstance(starts, (int, np.integer)):
        return start_design(problem.z0, max(int(starts), 1), seed)
    rows = []
    for theta in starts:
        z = problem.z0.copy()
        for spec, off in zip(layout.specs(), layout.offsets):
            if spec.name in theta:
                value = float(theta[spec.name])
                if not spec.lower < value < spec.upper:
                    raise StopwiseInputError(
                        f"start {spec.name}={value} lies outside ({spec.lower}, {spec.upper})"
                    )
                z[off] = unconstrained_np(spec, value)
        rows.append(z)
    return np.vstack(rows)


def optimise(
    problem: Problem, starts: np.ndarray, max_iter: int = 200, weights: np.ndarray | None = None
) -> tuple[OptimumRecord, list[OptimumRecord]]:
    """Best of several runs on negll (optionally with other row weights): every start in
    one compiled call, scipy trust-exact for a start that does not converge there. Row
    functions the compiled loop does not suit (finite mixtures, host callbacks:
    compiled_multistart.compiled_path_suits) keep scipy's trust-exact path."""
    if not compiled_path_suits(problem.rows):
        return multistart(
            lambda z: problem.value(z, weights),
            lambda z: problem.grad(z, weights),
            lambda z: problem.hess(z, weights),
            starts,
            max_iter,
        )
    return compiled_multistart(problem, starts, max_iter, [weights])[0]


def bound_flags(problem: Problem, z: np.ndarray) -> list[str]:
    """Reported natural-scale parameters whose coefficient sits at (or runs off to) a bound."""
    out = []
    for r in problem.reported:
        if r.spec is None:
            continue
        zi = float(z[r.index])
        value = float(natural_np(r.spec, zi))
        near = [
            b
            for b in (r.spec.lower, r.spec.upper)
            if np.isfinite(b) and abs(value - b) <= 1e-6 * (1.0 + abs(b))
        ]
        if near or (r.spec.transform != "identity" and abs(zi) > BOUND_Z) or abs(zi) > 25:
            out.append(r.name)
    return out


def run_fit(
    problem: Problem,
    model_name: str,
    n_subjects: int,
    *,
    se: str | None,
    starts: np.ndarray,
    seed: int,
    max_iter: int = 200,
    bootstrap_reps: int = 200,
    progress: bool = True,
    method: str = "mle",
    workers: int | None = 0,
    scheduler: str | None = None,
) -> Fit:
    """Optimise a Problem and compute standard errors: the engine behind every pooled fit.
    ``workers``/``scheduler``: where bootstrap refits run (estimation/distributed.py)."""
    if se not in SE_METHODS:
        raise StopwiseInputError(
            f"unknown standard-error method {se!r}; choose one of "
            "robust, hessian, bootstrap (or none)"
        )
    if se == "auto":
        se = "robust" if n_subjects > 1 else "hessian"
    if se == "robust" and problem.n_clusters < 2:
        se = "hessian"
    best, runs = optimise(problem, starts, max_iter)
    z = best.z
    h = problem.hess(z)
    warnings: list[str] = []
    notes: list[str] = []
    if not best.converged:
        warnings.append(
            f"the optimiser did not converge: max |gradient| = {best.grad_norm:.3g} after "
            f"{best.iterations} iterations ({best.message}); estimates are not reliable"
        )
    account = account_starts(runs)
    spread = account.spread
    if account.note():
        notes.append(str(account.note()))
    clusters = None
    extras: dict[str, Any] = {"problem": problem, "hessian_z": np.asarray(h, np.float64)}
    se_label = se
    if se == "bootstrap":
        table, info, boot_warn = bootstrap_table(
            problem, z, bootstrap_reps, seed, progress, workers=workers, scheduler=scheduler
        )
        warnings += boot_warn
        clusters = problem.n_clusters
        cov = None
        extras["bootstrap"] = info
        notes.append(
            f"subject-level bootstrap: {info['replications']} replications "
            f"({info['converged']} converged), percentile 95% intervals, "
            "vectorised with jax.vmap over replications"
        )
    else:
        cov, cov_warn, info = covariance_for(problem, z, h, se)
        warnings += cov_warn
        clusters = info.get("clusters")  # type: ignore[assignment]
        table = (
            wald_rows(problem.reported, z, cov)
            if se is not None
            else wald_rows(problem.reported, z, None)
        )
    at_bound = bound_flags(problem, z)
    for name in at_bound:
        warnings.append(
            f"{name} is at (or runs off to) a bound of its range: its standard "
            "error and interval are not meaningful"
        )
    optimizer = {
        "algorithm": best.algorithm,
        "start_algorithms": [r.algorithm for r in runs],
        "grad_norm": best.grad_norm,
        "iterations": best.iterations,
        "message": optimizer_message(best),
        "starts": len(runs),
        "spread": spread,
        "start_logliks": [-r.value for r in runs],
        "start_outcomes": list(account.outcomes),
    }
    return Fit(
        model=model_name,
        method=method,
        converged=best.converged,
        n_obs=problem.n_obs,
        n_subjects=n_subjects,
        loglik=-best.value,
        k=problem.k,
        table=table,
        se_method=se_label,
        warnings=warnings,
        seed=int(seed),
        clusters=clusters,
        optimizer=optimizer,
        at_bound=at_bound,
        notes=notes,
        z=z,
        cov_z=cov,
        extras=extras,
    )


def fit_mle(
    model: Any,
    data: Any,
    *,
    se: str | None = "auto",
    formulas: Sequence[str] | Mapping[str, str] | None = None,
    covariate_frame: pd.DataFrame | None = None,
    starts: int | Sequence[Mapping[str, float]] = 3,
    seed: int = 0,
    fixed: Mapping[str, float] | None = None,
    bootstrap_reps: int = 200,
    max_iter: int = 200,
    progress: bool = True,
    workers: int | None = 0,
    scheduler: str | None = None,
) -> Fit:
    """Pooled maximum-likelihood fit (module docstring). ``se``: "auto" (clustered sandwich
    with more than one subject, else Hessian), "robust", "hessian", "bootstrap" or None;
    ``workers``/``scheduler`` say where bootstrap refits run.
    ``formulas``: e.g. ["r ~ 1 + treatment"]; covariate columns come from ``covariate_frame``
    (rows aligned with the data) or the bundle's covariates."""
    problem, layout, extra = build_problem(
        model, data, formulas=formulas, covariate_frame=covariate_frame, fixed=fixed
    )
    start_matrix = starts_from(problem, layout, starts, seed)
    fit = run_fit(
        problem,
        model.name,
        data.n_subjects,
        se=se,
        starts=start_matrix,
        seed=seed,
        max_iter=max_iter,
        bootstrap_reps=bootstrap_reps,
        progress=progress,
        workers=workers,
        scheduler=scheduler,
    )
    fit.extras.update(extra)
    fit.extras["layout"] = layout
    if fixed:
        fit.notes.append("held fixed: " + ", ".join(f"{k}={v}" for k, v in fixed.items()))
    fit.predictor = _make_predictor(model, layout, fit, data, extra)
    return fit


__all__ = ["build_problem", "fit_mle", "optimise", "run_fit", "start_design"]
