"""Optimisers on the unconstrained scale.

* ``multistart``: scipy's exact-Hessian trust region (``trust-exact``) from several starts
  (the spec start plus a scrambled Sobol design around it); the best optimum is kept and the
  spread of the others is reported.
* ``batched_newton``: a damped Newton method written in JAX and vmapped over a batch of
  independent problems (subjects, bootstrap replications); one compilation serves the batch.
  Each iteration takes the step  dz = -V diag(1 / (|lambda| + mu (1 + max|lambda|))) V' g
  (eigen-decomposition H = V diag(lambda) V', so the step is a descent direction even where
  H is indefinite), capped at length 5, accepted when the objective does not increase; the
  damping mu shrinks tenfold after an accepted step and grows tenfold after a rejected one.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from scipy import optimize as sopt

from stopwise.estimation.ml.sobol import scrambled_sobol

GRAD_TOL = 1e-4  # max |d negll / dz| accepted as a stationary point
Z_LIMIT = 30.0  # unconstrained values are kept within +-Z_LIMIT


@dataclass
class OptimumRecord:
    """One optimiser run."""

    z: np.ndarray
    value: float
    grad_norm: float
    iterations: int
    converged: bool
    message: str
    start: np.ndarray = field(default_factory=lambda: np.zeros(0))
    algorithm: str = "scipy trust-exact (exact JAX gradient and Hessian)"


def start_design(z0: np.ndarray, n_starts: int, seed: int, spread: float = 1.5) -> np.ndarray:
    """Starts: z0 itself, then z0 + spread * (2u - 1) for a scrambled Sobol sequence u
    (estimation/ml/sobol.py: scipy's points, without loading scipy.stats)."""
    if n_starts <= 1:
        return z0[None, :]
    u = scrambled_sobol(len(z0), int(2 ** np.ceil(np.log2(n_starts - 1))), seed)[: n_starts - 1]
    return np.vstack([z0, z0 + spread * (2.0 * u - 1.0)])


def minimize_one(
    fun: Callable[[np.ndarray], float],
    grad: Callable[[np.ndarray], np.ndarray],
    hess: Callable[[np.ndarray], np.ndarray],
    z_start: np.ndarray,
    max_iter: int = 200,
) -> OptimumRecord:
    """scipy trust-exact with exact gradient and Hessian; never raises on a bad start, and
    does not print numpy's overflow notes from scipy's arithmetic at such a start."""

    def safe_fun(z: np.ndarray) -> float:
        v = fun(np.clip(z, -Z_LIMIT, Z_LIMIT))
        return v if np.isfinite(v) else 1e300

    try:
        # a start far out (a gradient near 1e100) overflows inside scipy's trust-region
        # arithmetic: the run is judged by its own gradient below, numpy's notes are not ours
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            res = sopt.minimize(
                safe_fun,
                z_start,
                jac=grad,
                hess=hess,
                method="trust-exact",
                options={"maxiter": max_iter, "gtol": 1e-8},
            )
        z = np.asarray(res.x, dtype=np.float64)
        message, nit = str(res.message), int(res.nit)
    except (ValueError, np.linalg.LinAlgError, FloatingPointError) as exc:
        z, message, nit = np.asarray(z_start, dtype=np.float64), f"optimiser failed: {exc}", 0
    z = newton_polish(fun, grad, hess, z)
    value = fun(z)
    g = grad(z)
    gnorm = float(np.max(np.abs(g))) if np.all(np.isfinite(g)) else float("inf")
    converged = bool(np.isfinite(value) and gnorm < GRAD_TOL)
    return OptimumRecord(z, float(value), gnorm, nit, converged, message, np.asarray(z_start))


def optimizer_message(record: OptimumRecord) -> str:
    """The optimiser's message as reported: a converged run (max |gradient| < GRAD_TOL, our
    own criterion) says so, because scipy's trust-exact often ends a converged run with a
    note that a trust-region step "failed to predict improvement" (no further step improves
    a stationary point in floating point) which reads as a failure; an unconverged run keeps
    scipy's message."""
    if not record.converged:
        return record.message
    return (
        f"converged: max |gradient| = {record.grad_norm:.2g} < {GRAD_TOL:g} after "
        f"{record.iterations} iterations"
    )


def newton_polish(
    fun: Callable[[np.ndarray], float],
    grad: Callable[[np.ndarray], np.ndarray],
    hess: Callable[[np.ndarray], np.ndarray],
    z: np.ndarray,
    steps: int = 3,
) -> np.ndarray:
    """Up to ``steps`` full Newton steps z <- z - H^-1 g where trust-exact stopped, each kept
    only if H is positive definite (Cholesky), the objective does not rise beyond rounding
    (1e-10 (1 + |f|)) and max |g| falls. trust-exact may stop with max |g| near 1e-5 ("a bad
    approximation caused failure to predict improvement"); from there Newton's quadratic
    convergence brings the gradient to rounding level, so an estimate does not depend on the
    optimiser's path to it."""
    z = np.asarray(z, dtype=np.float64)
    value, g = fun(z), grad(z)
    for _ in range(steps):
        gnorm = float(np.max(np.abs(g)))
        if not (np.isfinite(value) and np.isfinite(gnorm)) or gnorm < 1e-10:
            break
        h = hess(z)
        try:
            factor = np.linalg.cholesky(0.5 * (h + h.T))
        except np.linalg.LinAlgError:
            break
        step = np.linalg.solve(factor.T, np.linalg.solve(factor, g))
        z_new = np.clip(z - step, -Z_LIMIT, Z_LIMIT)
        value_new, g_new = fun(z_new), grad(z_new)
        rises = not np.isfinite(value_new) or value_new > value + 1e-10 * (1.0 + abs(value))
        if rises or not np.all(np.isfinite(g_new)) or np.max(np.abs(g_new)) >= gnorm:
            break
        z, value, g = z_new, value_new, g_new
    return z


def multistart(
    fun: Callable[[np.ndarray], float],
    grad: Callable[[np.ndarray], np.ndarray],
    hess: Callable[[np.ndarray], np.ndarray],
    starts: np.ndarray,
    max_iter: int = 200,
) -> tuple[OptimumRecord, list[OptimumRecord]]:
    """Run from every start; the best converged run (else the best finite one) is kept."""
    runs = [minimize_one(fun, grad, hess, s, max_iter) for s in starts]
    return best_run(runs), runs


def best_run(runs: list[OptimumRecord]) -> OptimumRecord:
    """The lowest negll among converged runs, else among finite ones, else among all."""
    finite = [r for r in runs if np.isfinite(r.value)]
    pool = [r for r in finite if r.converged] or finite or runs
    return min(pool, key=lambda r: r.value)


# ---------------------------------------------------------------------------------------
# Batched damped Newton in JAX.


def _eig_step(g: Any, h: Any, mu: Any) -> Any:
    lam, vec = jnp.linalg.eigh(h)
    scale = jnp.abs(lam) + mu * (1.0 + jnp.max(jnp.abs(lam)))
    step = -vec @ ((vec.T @ g) / scale)
    length = jnp.sqrt(jnp.sum(step**2))
    return step * jnp.minimum(1.0, 5.0 / jnp.maximum(length, 1e-300))


def value_grad_hess_forward(f: Callable[[Any], Any], z: Any) -> tuple[Any, Any, Any]:
    """f(z), its gradient and Hessian by forward mode only: the gradient from k JVPs along
    the unit vectors, the Hessian as the forward-mode Jacobian of that gradient."""

    def value_and_grad(zz: Any) -> tuple[Any, tuple[Any, Any]]:
        values, grads = jax.vmap(lambda v: jax.jvp(f, (zz,), (v,)))(jnp.eye(zz.shape[0]))
        return grads, (values[0], grads)

    hess, (value, grad) = jax.jacfwd(value_and_grad, has_aux=True)(z)
    return value, grad, 0.5 * (hess + hess.T)


@partial(jax.jit, static_argnums=(0, 4))
def batched_newton(
    fun: Callable[..., Any],
    z0: Any,
    batch: Any,
    shared: Any,
    max_iter: int,
    gtol: float = 1e-6,
) -> tuple[Any, Any, Any, Any, Any, Any]:
    """Minimise fun(z, batch[b], shared) for every b; returns (z, value, grad, hess,
    iterations, converged), each with a leading batch axis."""

    def one(z: Any, b: Any) -> tuple[Any, Any, Any]:
        value, grad, hess = value_grad_hess_forward(lambda zz: fun(zz, b, shared), z)
        return jnp.where(jnp.isfinite(value), value, jnp.inf), grad, hess

    evaluate = jax.vmap(one)
    v, g, h = evaluate(z0, batch)
    n = z0.shape[0]
    mu = jnp.full(n, 1e-6)
    done = jnp.max(jnp.abs(g), axis=1) < gtol
    iters = jnp.zeros(n, dtype=jnp.int32)

    def cond(state: tuple[Any, ...]) -> Any:
        it, *_, done, _ = state
        return (it < max_iter) & ~jnp.all(done)

    def body(state: tuple[Any, ...]) -> tuple[Any, ...]:
        it, z, v, g, h, mu, done, iters = state
        g_safe = jnp.where(jnp.isfinite(g), g, 0.0)
        h_safe = jnp.where(jnp.isfinite(h), h, 0.0)
        step = jax.vmap(_eig_step)(g_safe, h_safe, mu)
        z_new = jnp.clip(z + step, -Z_LIMIT, Z_LIMIT)
        v_new, g_new, h_new = evaluate(z_new, batch)
        accept = (v_new <= v) & jnp.isfinite(v_new) & ~done
        z = jnp.where(accept[:, None], z_new, z)
        v = jnp.where(accept, v_new, v)
        g = jnp.where(accept[:, None], g_new, g)
        h = jnp.where(accept[:, None, None], h_new, h)
        mu = jnp.where(accept, jnp.maximum(mu * 0.1, 1e-12), mu * 10.0)
        stuck = mu > 1e8
        iters = iters + (~done).astype(jnp.int32)
        done = done | (jnp.max(jnp.abs(g), axis=1) < gtol) | stuck
        return it + 1, z, v, g, h, mu, done, iters

    state = (0, z0, v, g, h, mu, done, iters)
    _, z, v, g, h, mu, done, iters = jax.lax.while_loop(cond, body, state)
    converged = jnp.max(jnp.abs(g), axis=1) < gtol
    return z, v, g, h, iters, converged
