"""Subject-level (cluster) bootstrap.

Replication b draws G subjects with replacement; subject g enters with multiplicity m_bg,
so the replication's objective is  negll_b(z) = -sum_i m_b,g(i) ll_i(z)  on the original
rows (no data are copied). Replications are solved together by the vmapped damped Newton of
estimation/ml/optimize.py, started at the full-sample estimate: one compilation for all of them,
and XLA spreads each batch over the machine's cores. Standard error = standard deviation of
the replicated estimates; interval = their 2.5% and 97.5% percentiles (Efron & Tibshirani
1993, percentile interval; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp
import numpy as np

from stopwise.estimation.distributed import StudyRun, plan_for, run_tasks
from stopwise.estimation.ml.covariance import RowTable
from stopwise.estimation.ml.optimize import batched_newton
from stopwise.estimation.ml.problem import Problem, _negll, report_values


@dataclass(frozen=True)
class WeightedNegll:
    """fun(z, w, args) = -sum_i w_i ll_i(z) for the batched optimiser (hashable)."""

    rows: Any

    def __call__(self, z: Any, w: Any, args: Any) -> Any:
        return _negll(self.rows, z, args, w)


def bootstrap_counts(n_clusters: int, reps: int, seed: int) -> np.ndarray:
    """Multiplicities m_bg (reps x G) of a cluster bootstrap (multinomial draws)."""
    rng = np.random.default_rng(seed)
    return rng.multinomial(n_clusters, np.full(n_clusters, 1.0 / n_clusters), size=reps)


ROW_REPLICATES_PER_CALL = 20_000_000  # rows x replications one in-process device call holds
CHUNK = 16  # replications per task on a cluster (and the least per in-process call)
IN_PROCESS_CHUNK = 40  # replications per device call without a cluster


def in_process_chunk(reps: int, n_obs: int) -> int:
    """Replications per device call when no cluster is used: IN_PROCESS_CHUNK (fewer when
    reps x n_obs would exceed ROW_REPLICATES_PER_CALL; never fewer than CHUNK). Each
    replication's Newton path is its own (done ones are masked), so the grouping changes no
    estimate. Measured 2026-12-02 (benchmarks/bootstrap_calls.py, load 7-10, CPU seconds of
    200 resamples, best of 3) for chunks of 16 / 40 / 100 / 200: crra+planner+logit 3.16 /
    2.41 / 2.23 / 2.33 s, crra+myopic+logit 0.096 / 0.081 / 0.154 / 0.149 s -- the planner's
    policy solves vectorise over many replications, the myopic rows fall out of cache."""
    budget = ROW_REPLICATES_PER_CALL // max(int(n_obs), 1)
    return max(CHUNK, min(int(reps), IN_PROCESS_CHUNK, budget))


def gradient_tolerance(n_obs: int) -> float:
    """Stationarity tolerance for a sum over n_obs rows (the gradient scales with n)."""
    return 1e-7 * max(1.0, float(n_obs))


@dataclass(frozen=True)
class ChunkPayload:
    """What every chunk of replications shares: the problem, the start and the settings."""

    problem: Problem
    z_hat: np.ndarray
    chunk: int
    max_iter: int


def refit_chunk(block: np.ndarray, payload: ChunkPayload) -> tuple[np.ndarray, np.ndarray]:
    """Re-estimate z for the replications in ``block`` (rows of multiplicities m_bg): the
    vmapped damped Newton on negll_b(z) = -sum_i w_i m_b,g(i) ll_i(z) from z_hat. A short
    block is padded with copies of its first row (discarded) to keep one batch shape."""
    problem = payload.problem
    n_real, chunk = len(block), payload.chunk
    if n_real < chunk:
        block = np.vstack([block, np.repeat(block[:1], chunk - n_real, axis=0)])
    w = jnp.asarray(problem.weights[None, :] * block[:, problem.cluster])
    z0 = jnp.tile(jnp.asarray(payload.z_hat), (chunk, 1))
    fun = WeightedNegll(problem.rows)
    gtol = gradient_tolerance(problem.n_obs)
    z, _, _, _, _, ok = batched_newton(fun, z0, w, problem.on_device()[0], payload.max_iter, gtol)
    return np.asarray(z)[:n_real], np.asarray(ok)[:n_real]


def bootstrap_estimates(
    problem: Problem,
    z_hat: np.ndarray,
    reps: int,
    seed: int,
    progress: bool = True,
    chunk: int | None = None,
    max_iter: int = 50,
    workers: int | None = 0,
    scheduler: str | None = None,
) -> tuple[np.ndarray, np.ndarray, StudyRun]:
    """Re-estimated z for every replication (reps x k; NaN where a chunk failed on every
    attempt), whether each converged, and the runner's record of the chunks. ``chunk``
    (replications per task) defaults to CHUNK on a cluster and to in_process_chunk in
    process."""
    counts = bootstrap_counts(problem.n_clusters, reps, seed)
    if chunk is None:
        in_process = plan_for(workers, scheduler, -(-reps // CHUNK)).kind == "in-process"
        chunk = in_process_chunk(reps, problem.n_obs) if in_process else CHUNK
    inputs = [{"block": counts[lo : lo + chunk]} for lo in range(0, reps, chunk)]
    payload = ChunkPayload(problem, np.asarray(z_hat, dtype=np.float64), chunk, max_iter)
    run = run_tasks(
        refit_chunk,
        inputs,
        workers=workers,
        scheduler=scheduler,
        progress=progress,
        desc="bootstrap chunks",
        shared={"payload": payload},
    )
    zs, conv = [], []
    for task, result in zip(inputs, run.results):
        n_real = len(task["block"])
        if result is None:  # failed twice: reported in run.failures, never silently dropped
            result = (np.full((n_real, len(z_hat)), np.nan), np.zeros(n_real, dtype=bool))
        zs.append(result[0])
        conv.append(result[1])
    return np.vstack(zs), np.concatenate(conv), run


def percentile_table(
    names: list[str], scale: list[str], estimate: np.ndarray, values: np.ndarray
) -> RowTable:
    """Point estimates as given; se = sd of the replicated values (ddof 1); 95% interval =
    their 2.5% and 97.5% percentiles (NaN with fewer than two replications)."""
    if len(values) < 2:
        nan = np.full(len(estimate), np.nan)
        return RowTable(list(names), estimate, nan, nan.copy(), nan.copy(), list(scale))
    return RowTable(
        list(names),
        estimate,
        values.std(axis=0, ddof=1),
        np.percentile(values, 2.5, axis=0),
        np.percentile(values, 97.5, axis=0),
        list(scale),
    )


def bootstrap_table(
    problem: Problem,
    z_hat: np.ndarray,
    reps: int,
    seed: int,
    progress: bool = True,
    workers: int | None = 0,
    scheduler: str | None = None,
) -> tuple[RowTable, dict[str, Any], list[str]]:
    """Point estimates from z_hat; se = sd of replicated estimates; percentile intervals.
    ``info["z"]`` keeps the converged replications' coefficients (reps_ok x k); ``workers``
    and ``scheduler`` choose where the chunks of replications run."""
    warnings: list[str] = []
    if problem.n_clusters < 2:
        raise ValueError("the subject bootstrap needs at least two subjects")
    z_b, ok, run = bootstrap_estimates(
        problem, z_hat, reps, seed, progress, workers=workers, scheduler=scheduler
    )
    if not run.complete:
        warnings.append(
            "bootstrap replications lost with their chunk: " + run.summary_line("chunks")
        )
    values = np.array([report_values(problem.reported, z) for z in z_b[ok]])
    est = report_values(problem.reported, z_hat)
    n_ok = int(ok.sum())
    if n_ok < reps:
        warnings.append(
            f"{reps - n_ok} of {reps} bootstrap replications did not converge and were dropped"
        )
    if problem.n_clusters < 30:
        warnings.append(f"only {problem.n_clusters} subjects: bootstrap intervals are rough")
    table = percentile_table(
        [r.name for r in problem.reported], [r.scale for r in problem.reported], est, values
    )
    info = {
        "replications": reps,
        "converged": n_ok,
        "seed": seed,
        "parallelism": f"jax.vmap over chunks of replications; chunks ran {run.where}",
        "z": z_b[ok],
    }
    return table, info, warnings
