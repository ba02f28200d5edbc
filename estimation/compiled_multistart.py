"""A whole multistart, and all cross-validation folds of one model, as ONE compiled program.

For every row-weight vector w_f (the full sample, or the training subjects of fold f) and
every start z_s, a damped Newton method minimises

    negll_f(z) = - sum_i w_f,i ll_i(z)

with its exact gradient g and Hessian H (forward mode, estimation/optimize.py). Each
iteration takes the step

    dz = -V diag(1 / ((1 + mu) |lambda| + mu)) V' g,    H = V diag(lambda) V',

capped at a length ``radius`` (a descent direction even where H is indefinite; the radius
starts at 1, doubles after an accepted step up to 5 and falls to a quarter after a rejected
one, as a trust region's does). A step is accepted when
negll falls, or when it rises by no more than rounding, 1e-10 (1 + |negll|), while max |g|
falls (the polish of optimize.newton_polish: near the optimum Newton's quadratic convergence
brings the gradient to rounding level, so the estimate does not depend on the path to it).
mu shrinks tenfold after an accepted step (to 1e-12: then the step is Newton's) and grows
tenfold after a rejected one; each direction is damped relative to its own curvature, so a
direction of negative curvature is followed even where another curvature is huge. A run
stops when max |g| < POLISH_TOL, when a step is rejected with max |g| already below
STALL_TOL (rounding level reached), when mu exceeds 1e8 or the radius falls below 1e-12
(stuck), or after max_iter iterations.

The folds x starts runs are vmapped inside one ``lax.while_loop``, so a multistart costs one
device call instead of ~50 host round trips through scipy. Runs that do not reach
max |g| < GRAD_TOL here are rerun from their start by scipy's trust-exact
(optimize.minimize_one), and every run records which optimiser produced it. The best run of
each fold is re-evaluated by the ordinary step program (problem.value_grad_hess) on the host:
its value and gradient, not the loop's, certify convergence.
"""

from __future__ import annotations

from dataclasses import replace
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.estimation.optimize import (
    GRAD_TOL,
    Z_LIMIT,
    OptimumRecord,
    best_run,
    minimize_one,
    value_grad_hess_forward,
)
from stopwise.estimation.problem import Problem, _negll

COMPILED = "compiled damped Newton (exact JAX gradient and Hessian, one device call)"
FALLBACK = "scipy trust-exact (exact JAX gradient and Hessian), fallback after the compiled Newton run did not converge"
POLISH_TOL = 1e-10  # max |g| at which a run stops polishing
STALL_TOL = 1e-6  # below this max |g|, a rejected step means rounding level is reached
STEP_CAP = 5.0  # longest step on the unconstrained scale
FIRST_RADIUS = 1.0  # longest first step (scipy's initial trust radius)


def damped_step(g: Any, h: Any, mu: Any, radius: Any) -> Any:
    """dz = -V diag(1 / ((1 + mu) |lambda| + mu)) V' g, scaled to length <= radius."""
    lam, vec = jnp.linalg.eigh(h)
    scale = (1.0 + mu) * jnp.abs(lam) + mu
    step = -vec @ ((vec.T @ g) / scale)
    length = jnp.sqrt(jnp.sum(step**2))
    return step * jnp.minimum(1.0, radius / jnp.maximum(length, 1e-300))


def _all_finite(value: Any, grad: Any, hess: Any) -> Any:
    return (
        jnp.isfinite(value)
        & jnp.all(jnp.isfinite(grad), -1)
        & jnp.all(jnp.isfinite(hess), (-2, -1))
    )


@partial(jax.jit, static_argnums=0)
def newton_runs(rows: Any, starts: Any, args: Any, weights: Any, max_iter: Any) -> tuple[Any, ...]:
    """Minimise negll_f from every start for every weight vector (module docstring).

    starts (S, k), weights (F, n): returns z (F, S, k), negll (F, S), max |g| (F, S) and
    iterations (F, S)."""
    n_folds, n_starts, k = weights.shape[0], starts.shape[0], starts.shape[1]

    def one(z: Any, w: Any) -> tuple[Any, Any, Any]:
        return value_grad_hess_forward(lambda zz: _negll(rows, zz, args, w), z)

    per_fold = jax.vmap(jax.vmap(one, in_axes=(0, None)), in_axes=(0, 0))

    def evaluate(z: Any) -> tuple[Any, Any, Any, Any]:
        v, g, h = per_fold(z.reshape(n_folds, n_starts, k), weights)
        v, g, h = v.reshape(-1), g.reshape(-1, k), h.reshape(-1, k, k)
        ok = _all_finite(v, g, h)
        gmax = jnp.where(ok, jnp.max(jnp.abs(g), axis=-1), jnp.inf)
        return jnp.where(ok, v, jnp.inf), g, h, gmax

    z0 = jnp.tile(starts, (n_folds, 1))
    v, g, h, gmax = evaluate(z0)
    n = z0.shape[0]
    state = (
        jnp.asarray(0),
        z0,
        v,
        g,
        h,
        gmax,
        jnp.full(n, 1e-6),
        jnp.full(n, FIRST_RADIUS),
        gmax < POLISH_TOL,
        jnp.zeros(n, dtype=jnp.int32),
    )

    def cond(s: tuple[Any, ...]) -> Any:
        return (s[0] < max_iter) & ~jnp.all(s[8])

    def body(s: tuple[Any, ...]) -> tuple[Any, ...]:
        it, z, v, g, h, gmax, mu, radius, done, iters = s
        g_safe = jnp.where(jnp.isfinite(g), g, 0.0)
        h_safe = jnp.where(jnp.isfinite(h), h, 0.0)
        z_new = jnp.clip(z + jax.vmap(damped_step)(g_safe, h_safe, mu, radius), -Z_LIMIT, Z_LIMIT)
        v_new, g_new, h_new, gmax_new = evaluate(z_new)
        within_rounding = v_new <= v + 1e-10 * (1.0 + jnp.abs(v))
        better = (v_new < v) | (within_rounding & (gmax_new < gmax))
        accept = ~done & jnp.isfinite(v_new) & better
        z = jnp.where(accept[:, None], z_new, z)
        v = jnp.where(accept, v_new, v)
        g = jnp.where(accept[:, None], g_new, g)
        h = jnp.where(accept[:, None, None], h_new, h)
        gmax = jnp.where(accept, gmax_new, gmax)
        mu = jnp.where(accept, jnp.maximum(mu * 0.1, 1e-12), mu * 10.0)
        radius = jnp.where(accept, jnp.minimum(2.0 * radius, STEP_CAP), 0.25 * radius)
        iters = iters + (~done).astype(jnp.int32)
        stalled = ~accept & (gmax < STALL_TOL)
        stuck = (mu > 1e8) | (radius < 1e-12)
        done = done | (gmax < POLISH_TOL) | stalled | stuck
        return it + 1, z, v, g, h, gmax, mu, radius, done, iters

    _, z, v, _, _, gmax, _, _, _, iters = jax.lax.while_loop(cond, body, state)
    shape = (n_folds, n_starts)
    return (
        z.reshape(n_folds, n_starts, k),
        v.reshape(shape),
        gmax.reshape(shape),
        iters.reshape(shape),
    )


def compiled_record(
    z: np.ndarray, value: float, gmax: float, iters: int, start: np.ndarray
) -> OptimumRecord:
    """The record of one compiled run (converged: finite and max |g| < GRAD_TOL)."""
    converged = bool(np.isfinite(value) and gmax < GRAD_TOL)
    message = f"compiled damped Newton stopped at max |gradient| = {gmax:.2g}"
    return OptimumRecord(
        z, float(value), float(gmax), int(iters), converged, message, start, COMPILED
    )


def fallback_record(
    problem: Problem, start: np.ndarray, w: np.ndarray | None, max_iter: int
) -> OptimumRecord:
    """scipy trust-exact from the same start (optimize.minimize_one), marked as the fallback."""
    run = minimize_one(
        lambda z: problem.value(z, w),
        lambda z: problem.grad(z, w),
        lambda z: problem.hess(z, w),
        start,
        max_iter,
    )
    return replace(run, algorithm=FALLBACK)


def certified(problem: Problem, run: OptimumRecord, w: np.ndarray | None) -> OptimumRecord:
    """The run with value, gradient and convergence recomputed at its z by the ordinary step
    program (problem.second_order): the certificate does not rest on the loop's numbers."""
    value, grad, _ = problem.second_order(run.z, w)
    value = float(value)
    gmax = float(np.max(np.abs(grad))) if np.all(np.isfinite(grad)) else float("inf")
    converged = bool(np.isfinite(value) and gmax < GRAD_TOL)
    return replace(run, value=value, grad_norm=gmax, converged=converged)


def fold_weights(problem: Problem, weights: list[np.ndarray | None]) -> np.ndarray:
    """(F, n) row weights: the problem's own where an entry is None."""
    return np.stack(
        [problem.weights if w is None else np.asarray(w, dtype=np.float64) for w in weights]
    )


def compiled_multistart(
    problem: Problem,
    starts: np.ndarray,
    max_iter: int = 200,
    weights: list[np.ndarray | None] | None = None,
) -> list[tuple[OptimumRecord, list[OptimumRecord]]]:
    """(best, runs) for each weight vector (default: the problem's own, one entry): every
    start of every fold in one compiled call (newton_runs); unconverged runs are redone by
    scipy's trust-exact; each fold's best run is certified on the host."""
    weights = weights if weights is not None else [None]
    starts = np.atleast_2d(np.asarray(starts, dtype=np.float64))
    args, _ = problem.on_device()
    z, v, gmax, iters = (
        np.asarray(a)
        for a in newton_runs(
            problem.rows,
            jnp.asarray(starts),
            args,
            jnp.asarray(fold_weights(problem, weights)),
            jnp.asarray(max_iter, dtype=jnp.int32),
        )
    )
    out = []
    for f, w in enumerate(weights):
        runs = []
        for s, start in enumerate(starts):
            run = compiled_record(z[f, s], v[f, s], gmax[f, s], iters[f, s], start)
            runs.append(run if run.converged else fallback_record(problem, start, w, max_iter))
        out.append(certified_best(problem, runs, w, max_iter))
    return out


def certified_best(
    problem: Problem, runs: list[OptimumRecord], w: np.ndarray | None, max_iter: int
) -> tuple[OptimumRecord, list[OptimumRecord]]:
    """The best run (optimize.best_run) after its certificate on the host; a compiled run
    that fails the certificate is redone by the fallback and the choice is made again."""
    runs = list(runs)
    while True:
        best = best_run(runs)
        i = next(j for j, r in enumerate(runs) if r is best)
        if best.algorithm != COMPILED:
            return best, runs
        checked = certified(problem, best, w)
        runs[i] = (
            checked if checked.converged else fallback_record(problem, best.start, w, max_iter)
        )
        if checked.converged:
            return checked, runs
