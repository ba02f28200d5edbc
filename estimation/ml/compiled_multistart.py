"""A whole multistart, and all cross-validation folds of one model, as ONE compiled program.

For every row-weight vector w_f (the full sample, or the training subjects of fold f) and
every start z_s, a damped Newton method minimises

    negll_f(z) = - sum_i w_f,i ll_i(z)

with its exact gradient g and Hessian H (forward mode, estimation/ml/optimize.py). Each
iteration takes the step

    dz = -V diag(1 / ((1 + mu) |lambda| + mu)) V' g,    H = V diag(lambda) V',

capped at a length ``radius`` (a descent direction even where H is indefinite; the radius
starts at 1, doubles after an accepted step up to 5 and falls to a quarter after a rejected
one, as a trust region's does). A step is accepted when negll falls, or when it rises by
no more than rounding, 1e-10 (1 + |negll|), while max |g| falls (the polish of optimize.newton_polish: near the optimum Newton's quadratic convergence
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
(optimize.minimize_one), and every run records which optimiser produced it. A run's
certificate is the exact gradient at its final z (converged: max |g| < GRAD_TOL, the
criterion of the scipy path); the Hessian there is handed to the Problem
(remember_second_order), where the standard errors check its definiteness, so a single fit
neither recomputes it nor traces the separate step program.
"""

from __future__ import annotations

from dataclasses import replace
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.estimation.ml.optimize import (
    GRAD_TOL,
    Z_LIMIT,
    OptimumRecord,
    best_run,
    minimize_one,
    value_grad_hess_forward,
)
from stopwise.estimation.ml.problem import Problem, _negll
from stopwise.estimation.program_store import call_stored

COMPILED = "compiled damped Newton (exact JAX gradient and Hessian, one device call)"
FALLBACK = (
    "scipy trust-exact (exact JAX gradient and Hessian), fallback after the compiled Newton "
    "run did not converge"
)
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

    starts (S, k), weights (F, n): returns z (F, S, k), negll (F, S), gradient (F, S, k),
    Hessian (F, S, k, k), max |g| (F, S) and iterations (F, S), the derivatives at z. The
    loop's first pass evaluates the starts themselves (a zero step), so the step program
    is traced once."""
    n_folds, n_starts, k = weights.shape[0], starts.shape[0], starts.shape[1]

    def one(z: Any, w: Any) -> tuple[Any, Any, Any]:
        return value_grad_hess_forward(lambda zz: _negll(rows, zz, args, w), z)

    run_weights = jnp.repeat(weights, n_starts, axis=0)  # run r = fold r // S, start r % S
    per_run = jax.vmap(one)  # one batching layer (two nested ones trace slower)

    def evaluate(z: Any) -> tuple[Any, Any, Any, Any]:
        v, g, h = per_run(z, run_weights)
        ok = _all_finite(v, g, h)
        gmax = jnp.where(ok, jnp.max(jnp.abs(g), axis=-1), jnp.inf)
        return jnp.where(ok, v, jnp.inf), g, h, gmax

    z0 = jnp.tile(starts, (n_folds, 1))
    n = z0.shape[0]
    state = (
        jnp.asarray(0),
        z0,
        jnp.full(n, jnp.inf),
        jnp.zeros((n, k)),
        jnp.tile(jnp.eye(k), (n, 1, 1)),
        jnp.full(n, jnp.inf),
        jnp.full(n, 1e-6),
        jnp.full(n, FIRST_RADIUS),
        jnp.zeros(n, dtype=bool),
        jnp.full(n, -1, dtype=jnp.int32),
    )

    def cond(s: tuple[Any, ...]) -> Any:
        return (s[0] <= max_iter) & ~jnp.all(s[8])

    def body(s: tuple[Any, ...]) -> tuple[Any, ...]:
        it, z, v, g, h, gmax, mu, radius, done, iters = s
        first = it == 0  # evaluate the starts
        g_safe = jnp.where(jnp.isfinite(g), g, 0.0)
        h_safe = jnp.where(jnp.isfinite(h), h, 0.0)
        step = jnp.where(first, 0.0, jax.vmap(damped_step)(g_safe, h_safe, mu, radius))
        z_new = jnp.clip(z + step, -Z_LIMIT, Z_LIMIT)
        v_new, g_new, h_new, gmax_new = evaluate(z_new)
        within_rounding = v_new <= v + 1e-10 * (1.0 + jnp.abs(v))
        better = (v_new < v) | (within_rounding & (gmax_new < gmax))
        accept = ~done & jnp.isfinite(v_new) & better
        z = jnp.where(accept[:, None], z_new, z)
        v = jnp.where(accept, v_new, v)
        g = jnp.where(accept[:, None], g_new, g)
        h = jnp.where(accept[:, None, None], h_new, h)
        gmax = jnp.where(accept, gmax_new, gmax)
        mu = jnp.where(first, mu, jnp.where(accept, jnp.maximum(mu * 0.1, 1e-12), mu * 10.0))
        shrunk = jnp.where(accept, jnp.minimum(2.0 * radius, STEP_CAP), 0.25 * radius)
        radius = jnp.where(first, radius, shrunk)
        iters = iters + (~done).astype(jnp.int32)
        stalled = ~accept & (gmax < STALL_TOL)
        stuck = (mu > 1e8) | (radius < 1e-12)
        done = done | (gmax < POLISH_TOL) | stalled | stuck
        return it + 1, z, v, g, h, gmax, mu, radius, done, iters

    _, z, v, g, h, gmax, _, _, _, iters = jax.lax.while_loop(cond, body, state)
    fs = (n_folds, n_starts)
    return (
        z.reshape(*fs, k),
        v.reshape(fs),
        g.reshape(*fs, k),
        h.reshape(*fs, k, k),
        gmax.reshape(fs),
        iters.reshape(fs),
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


def fold_weights(problem: Problem, weights: list[np.ndarray | None]) -> np.ndarray:
    """(F, n) row weights: the problem's own where an entry is None."""
    return np.stack(
        [problem.weights if w is None else np.asarray(w, dtype=np.float64) for w in weights]
    )


def compiled_path_suits(rows: Any) -> bool:
    """Whether the compiled Newton loop may run these row functions. Not for finite
    mixtures (``multimodal``: the loop can stop at a vanishing type share, a worse optimum
    than scipy finds) nor for likelihoods that call the host (model option
    ``host_callback``: contest Nash play solved through jax.pure_callback; inside the
    compiled loop the callback waits on the CPU runtime the loop holds, and the process
    deadlocks). Those keep scipy's trust-exact path. Contest QRE / level-k / CH models run
    in the loop: their stall in the demo was LAPACK's LU kernel deadlocking XLA's CPU
    thread pool, and the QRE solves no longer call it (models/small_solve.py)."""
    if getattr(rows, "multimodal", False):
        return False
    model = getattr(getattr(rows, "layout", None), "model", None)
    return not bool(getattr(model, "options", None) and model.options.get("host_callback"))


def compiled_multistart(
    problem: Problem,
    starts: np.ndarray,
    max_iter: int = 200,
    weights: list[np.ndarray | None] | None = None,
) -> list[tuple[OptimumRecord, list[OptimumRecord]]]:
    """(best, runs) for each weight vector (default: the problem's own, one entry): every
    start of every fold in one compiled call (newton_runs); unconverged runs are redone by
    scipy's trust-exact; the best run of each fold (optimize.best_run) leaves its
    derivatives with the Problem."""
    weights = weights if weights is not None else [None]
    starts = np.atleast_2d(np.asarray(starts, dtype=np.float64))
    args, _ = problem.on_device()
    # numpy arguments go to the device with the call (jnp.asarray would compile a small
    # program for each conversion in a fresh process)
    z, v, g, h, gmax, iters = (
        np.asarray(a)
        for a in call_stored(
            "newton_runs",
            newton_runs,
            problem.rows,
            starts,
            args,
            fold_weights(problem, weights),
            np.int32(max_iter),
        )
    )
    out = []
    for f, w in enumerate(weights):
        runs = []
        for s, start in enumerate(starts):
            run = compiled_record(z[f, s], v[f, s], gmax[f, s], iters[f, s], start)
            runs.append(run if run.converged else fallback_record(problem, start, w, max_iter))
        best = best_run(runs)
        if best.algorithm == COMPILED:
            i = next(j for j, r in enumerate(runs) if r is best)
            problem.remember_second_order(best.z, w, v[f, i], g[f, i], h[f, i])
        out.append((best, runs))
    return out
