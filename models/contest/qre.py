"""Logit quantal response equilibrium (McKelvey & Palfrey 1995).

A logit QRE at precision lambda is a profile sigma with, for every player i,

    sigma_i = softmax(lambda * U_i(sigma_{-i})),

solved here in log-probability coordinates x_i = log sigma_i as the root of

    F(x, lambda) = x - log_softmax(lambda * U(exp x)) = 0.

* ``solve_root``: Newton's method with a custom JAX derivative rule (implicit function
  theorem): dx = -F_x^{-1} F_p dp, so ``grad``/``jvp``/``vjp`` of the solution with respect to
  the precision and to the payoffs (hence utility parameters) are exact and cost one linear
  solve, whatever the number of Newton steps.
* ``qre_symmetric`` (N players, all playing one strategy) and ``qre_bimatrix`` (two players,
  any payoffs): the QRE on the principal branch at a given precision, reached by
  continuation in lambda from the centroid (lambda = 0) followed by Newton polishing.
* ``trace_principal_branch``: predictor-corrector path following of {F(x, lambda) = 0} in
  (x, lambda) from lambda = 0 (Turocy 2005): tangent predictor, pseudo-arclength Newton
  corrector, adaptive step; stops when the profile's maximum regret (as a share of the
  game's payoff range) is below a tolerance, i.e. near the branch's limit, a Nash
  equilibrium.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.models.contest.game import ContestGame, target_payoffs
from stopwise.models.small_solve import solve_small

Residual = Callable[[Any, Any], Any]


# ----------------------------------------------------------------------------- root finding


def _newton(residual: Residual, x0: Any, params: Any, iterations: int) -> Any:
    """x <- x - J^{-1} F(x), with each step clipped to max-norm 2 (log-probability units)."""

    def step(_: int, x: Any) -> Any:
        jac = jax.jacfwd(residual, argnums=0)(x, params)
        delta = solve_small(jac, residual(x, params))  # no LAPACK call: models/small_solve.py
        scale = jnp.minimum(1.0, 2.0 / jnp.maximum(jnp.max(jnp.abs(delta)), 1e-300))
        delta = jnp.where(jnp.all(jnp.isfinite(delta)), delta * scale, 0.0)
        return x - delta

    return jax.lax.fori_loop(0, iterations, step, x0)


@partial(jax.custom_jvp, nondiff_argnums=(0, 3))
def solve_root(residual: Residual, x0: Any, params: Any, iterations: int) -> Any:
    """Root x of residual(x, params) by Newton from x0; differentiable in params by the
    implicit function theorem (x0 carries no derivative)."""
    return _newton(residual, x0, params, iterations)


@solve_root.defjvp
def _solve_root_jvp(
    residual: Residual, iterations: int, primals: tuple[Any, Any], tangents: tuple[Any, Any]
) -> tuple[Any, Any]:
    """dx = -F_x(x, p)^{-1} (F_p(x, p) dp) at the root x."""
    x0, params = primals
    _, params_dot = tangents
    x = solve_root(residual, x0, params, iterations)
    jac = jax.jacfwd(residual, argnums=0)(x, params)
    _, residual_dot = jax.jvp(lambda p: residual(x, p), (params,), (params_dot,))
    return x, -solve_small(jac, residual_dot)


# ----------------------------------------------------------------------------- residuals


def symmetric_residual(x: Any, params: tuple[Any, ContestGame]) -> Any:
    """F(x) = x - log_softmax(lambda * U(exp x)), U = payoffs against N-1 copies of exp x."""
    precision, game = params
    return x - jax.nn.log_softmax(precision * target_payoffs(game, jnp.exp(x)))


def bimatrix_residual(x: Any, params: tuple[Any, Any, Any]) -> Any:
    """F for two players with payoff matrices A (row player) and B (column player):
    x1 - log_softmax(lambda A sigma2), x2 - log_softmax(lambda B^T sigma1)."""
    precision, a, b = params
    m = a.shape[0]
    x1, x2 = x[:m], x[m:]
    r1 = x1 - jax.nn.log_softmax(precision * (a @ jnp.exp(x2)))
    r2 = x2 - jax.nn.log_softmax(precision * (b.T @ jnp.exp(x1)))
    return jnp.concatenate([r1, r2])


# ----------------------------------------------------------------------------- QRE at one precision


def precision_schedule(precision: Any, scale: Any, steps: int) -> Any:
    """Continuation precisions lambda_k = lambda * exp(-L (1 - k/steps)), k = 1..steps,
    L = log(1 + lambda * scale) + 1: geometric in lambda (equal steps in log lambda) from
    about 1/scale, where play is still near uniform, up to lambda itself; ``scale`` is the
    game's payoff range."""
    span = jnp.log1p(precision * scale) + 1.0
    k = jnp.arange(1, steps + 1, dtype=jnp.float64)
    return precision * jnp.exp(-span * (1.0 - k / steps))


@partial(jax.jit, static_argnums=(0, 4, 5, 6))
def _continuation(
    residual: Residual,
    x0: Any,
    precision: Any,
    rest: tuple[Any, ...],
    steps: int,
    newton_per_step: int,
    polish: int,
    scale: Any = 1.0,
) -> Any:
    """Follow the branch from lambda ~ 0 along ``precision_schedule`` (Newton in log space at
    each), then polish at the target precision through ``solve_root`` (which carries
    gradients). Compiled once per residual, step counts and shapes: called outside a traced
    function (a fit's certificate, a counterfactual), its loops would otherwise compile anew
    on every call (about 1-2 s each on 2 cores)."""
    frozen = jax.lax.stop_gradient((precision, *rest))
    schedule = precision_schedule(frozen[0], jax.lax.stop_gradient(scale), steps)

    def advance(x: Any, lam: Any) -> tuple[Any, None]:
        return _newton(residual, x, (lam, *frozen[1:]), newton_per_step), None

    x_start, _ = jax.lax.scan(advance, x0, schedule)
    return solve_root(residual, jax.lax.stop_gradient(x_start), (precision, *rest), polish)


def qre_symmetric(
    precision: Any, game: ContestGame, steps: int = 24, newton_per_step: int = 3, polish: int = 6
) -> Any:
    """Symmetric logit QRE sigma (all N players) on the principal branch at `precision`."""
    n = game.n_targets
    x0 = jnp.full(n, -jnp.log(n))
    x = _continuation(
        symmetric_residual,
        x0,
        precision,
        (game,),
        steps,
        newton_per_step,
        polish,
        game.payoff_range,
    )
    return jnp.exp(x)


def qre_bimatrix(
    precision: Any, a: Any, b: Any, steps: int = 24, newton_per_step: int = 3, polish: int = 6
) -> tuple[Any, Any]:
    """Two-player logit QRE (sigma1, sigma2) on the principal branch at `precision`."""
    m, n = a.shape
    x0 = jnp.concatenate([jnp.full(m, -jnp.log(m)), jnp.full(n, -jnp.log(n))])
    scale = jnp.maximum(jnp.max(a), jnp.max(b)) - jnp.minimum(jnp.min(a), jnp.min(b))
    x = _continuation(
        bimatrix_residual, x0, precision, (a, b), steps, newton_per_step, polish, scale
    )
    return jnp.exp(x[:m]), jnp.exp(x[m:])


# ----------------------------------------------------------------------------- path following


@dataclass(frozen=True)
class BranchPoint:
    precision: float
    log_probs: np.ndarray
    max_regret: float


@dataclass(frozen=True)
class Branch:
    """The traced principal branch: its points, and whether the regret goal was met."""

    points: list[BranchPoint]
    converged: bool
    message: str

    @property
    def last(self) -> BranchPoint:
        return self.points[-1]


def trace_principal_branch(
    residual: Callable[[Any, Any, Any], Any],
    regret: Callable[[Any, Any], Any],
    params: Any,
    x0: np.ndarray,
    tolerance: float = 1e-6,
    max_precision: float = 1e12,
    first_step: float = 0.03,
    max_accel: float = 1.5,
    max_points: int = 5000,
    stop_at_precision: bool = False,
) -> Branch:
    """Predictor-corrector path following of residual(x, lambda, params) = 0 from (x0, 0)
    upward (Turocy 2005). regret(x, params) is the maximum regret as a share of the payoff
    range; stop once it is <= tolerance. `residual` and `regret` must be module-level
    functions (they are static arguments of the compiled step). With ``stop_at_precision``
    the regret test is skipped and tracing stops at the first point with lambda >=
    max_precision (reported as converged)."""
    n = x0.shape[0]
    y = jnp.concatenate([jnp.asarray(x0, dtype=jnp.float64), jnp.zeros(1)])
    tangent = _initial_tangent(residual, params, y)
    points = [BranchPoint(0.0, np.asarray(y[:n]), float(_regret_at(regret, params, y)))]
    step = first_step
    while len(points) < max_points:
        new_y, new_tangent, ok, iterations, current = _advance(
            residual, regret, params, y, tangent, step
        )
        if not bool(ok):
            step /= 2.0
            if step < 1e-12:
                return Branch(points, False, "step size underflow in the corrector")
            continue
        y, tangent = new_y, new_tangent
        current = float(current)
        points.append(BranchPoint(float(y[n]), np.asarray(y[:n]), current))
        if not stop_at_precision and current <= tolerance:
            return Branch(points, True, f"max regret {current:.3g} <= {tolerance:g}")
        if float(y[n]) >= max_precision:
            return Branch(points, stop_at_precision, f"precision reached {max_precision:g}")
        if int(iterations) <= 3:  # quadratic convergence from a good predictor: lengthen
            step *= max_accel
    return Branch(points, False, f"stopped after {max_points} points")


def _h_of(residual: Any, params: Any, y: Any) -> Any:
    return residual(y[:-1], y[-1], params)


@partial(jax.jit, static_argnums=(0,))
def _regret_at(regret: Any, params: Any, y: Any) -> Any:
    return regret(y[:-1], params)


@partial(jax.jit, static_argnums=(0,))
def _initial_tangent(residual: Any, params: Any, y: Any) -> Any:
    jac = jax.jacfwd(partial(_h_of, residual, params))(y)
    return _tangent(jac, jnp.zeros(y.shape[0]).at[-1].set(1.0))


@partial(jax.jit, static_argnums=(0, 1))
def _advance(
    residual: Any, regret: Any, params: Any, y: Any, tangent: Any, step: Any
) -> tuple[Any, Any, Any, Any, Any]:
    """One predictor-corrector step plus the new tangent and the regret there."""
    h_of = partial(_h_of, residual, params)
    y_new, t_new, ok, iterations = _predict_correct(h_of, jax.jacfwd(h_of), y, tangent, step)
    return y_new, t_new, ok, iterations, regret(y_new[:-1], params)


def _tangent(jac: Any, previous: Any) -> Any:
    """Unit null vector t of the n x (n+1) Jacobian J with t . previous > 0:
    solve [J; previous^T] t = e_{n+1} and normalise."""
    augmented = jnp.vstack([jac, previous[None, :]])
    rhs = jnp.zeros(jac.shape[1]).at[-1].set(1.0)
    t = jnp.linalg.solve(augmented, rhs)
    return t / jnp.linalg.norm(t)


def _predict_correct(
    h_of: Any,
    jac_of: Any,
    y: Any,
    tangent: Any,
    step: Any,
    max_iterations: int = 8,
    tol: float = 1e-10,
) -> tuple[Any, Any, Any, Any]:
    """Predictor y + step*t, then pseudo-arclength Newton on H(y) = 0, t.(y - y_pred) = 0.
    Fails when a correction does not shrink (contraction > 1/2) or stays non-finite."""
    y_pred = y + step * tangent

    def body(state: Any) -> Any:
        y_c, it, previous, _, _ = state
        jac = jac_of(y_c)
        augmented = jnp.vstack([jac, tangent[None, :]])
        rhs = jnp.concatenate([h_of(y_c), (tangent @ (y_c - y_pred))[None]])
        delta = jnp.linalg.solve(augmented, rhs)
        size = jnp.max(jnp.abs(delta))
        bad = ~jnp.isfinite(size) | ((it > 0) & (size > 0.5 * jnp.maximum(previous, 1.0)))
        y_new = y_c - delta
        done = size < tol * (1.0 + jnp.max(jnp.abs(y_new)))
        return y_new, it + 1, size, done, bad

    def cond(state: Any) -> Any:
        _, it, _, done, bad = state
        return (it < max_iterations) & ~done & ~bad

    init = (y_pred, 0, jnp.inf, False, False)
    y_new, iterations, _, done, bad = jax.lax.while_loop(cond, body, init)
    ok = done & ~bad
    new_tangent = _tangent(jac_of(y_new), tangent)
    return y_new, new_tangent, ok, iterations


def _bimatrix_branch_residual(x: Any, lam: Any, params: tuple[Any, Any]) -> Any:
    return bimatrix_residual(x, (lam, *params))


def _bimatrix_branch_regret(x: Any, params: tuple[Any, Any]) -> Any:
    """Max regret over both players of exp(x), as a share of the payoff range."""
    a, b = params
    m = a.shape[0]
    scale = jnp.maximum(
        jnp.maximum(jnp.max(a), jnp.max(b)) - jnp.minimum(jnp.min(a), jnp.min(b)), 1e-300
    )
    s1, s2 = jnp.exp(x[:m]), jnp.exp(x[m:])
    u1, u2 = a @ s2, b.T @ s1
    return jnp.maximum(jnp.max(u1) - s1 @ u1, jnp.max(u2) - s2 @ u2) / scale


def _symmetric_branch_residual(x: Any, lam: Any, game: ContestGame) -> Any:
    return symmetric_residual(x, (lam, game))


def _symmetric_branch_regret(x: Any, game: ContestGame) -> Any:
    """Max regret of the symmetric profile exp(x), as a share of the payoff range."""
    money = jnp.concatenate([game.u0, game.u0 + game.du])
    scale = jnp.maximum(jnp.max(money) - jnp.min(money), 1e-300)
    s = jnp.exp(x)
    u = target_payoffs(game, s)
    return (jnp.max(u) - s @ u) / scale


def trace_bimatrix(a: Any, b: Any, tolerance: float = 1e-6, **options: Any) -> Branch:
    """Principal branch of a two-player game (payoffs a, b) until max regret <= tolerance
    (regret as a share of the range of all payoffs)."""
    a = jnp.asarray(a, jnp.float64)
    b = jnp.asarray(b, jnp.float64)
    m, n = a.shape
    x0 = np.concatenate([np.full(m, -np.log(m)), np.full(n, -np.log(n))])
    return trace_principal_branch(
        _bimatrix_branch_residual, _bimatrix_branch_regret, (a, b), x0, tolerance, **options
    )


def trace_symmetric(game: ContestGame, tolerance: float = 1e-6, **options: Any) -> Branch:
    """Principal branch of the symmetric N-player contest until max regret <= tolerance
    (regret as a share of the range of slot payoffs)."""
    n = game.n_targets
    x0 = np.full(n, -np.log(n))
    return trace_principal_branch(
        _symmetric_branch_residual, _symmetric_branch_regret, game, x0, tolerance, **options
    )


# ----------------------------------------------------------------------------- certified QRE


@dataclass(frozen=True)
class CertifiedQre:
    """A symmetric logit QRE with its fixed-point residual max |x - log_softmax(lambda U)|
    (log-probability units) and the number of branch points traced."""

    sigma: np.ndarray
    residual: float
    points: int
    message: str


@jax.jit
def _polish_symmetric(x: Any, precision: Any, game: ContestGame) -> tuple[Any, Any]:
    """40 Newton steps on F(x) = x - log_softmax(lambda U(exp x)) at fixed lambda, and the
    final residual max-norm."""
    x = _newton(symmetric_residual, x, (precision, game), 40)
    return x, jnp.max(jnp.abs(symmetric_residual(x, (precision, game))))


def fixed_point_residual(log_sigma: Any, precision: Any, game: ContestGame) -> Any:
    """max_t |x_t - log_softmax(lambda U(exp x))_t|, x = log sigma: 0 exactly at a QRE."""
    return jnp.max(jnp.abs(symmetric_residual(log_sigma, (precision, game))))


@jax.jit
def _scheduled_qre(precision: Any, game: ContestGame) -> tuple[Any, Any]:
    """``qre_symmetric``'s fixed schedule (24 geometric steps, 3 Newton steps each, 6 polishing
    steps) in log space, and the residual max-norm at `precision`."""
    n = game.n_targets
    x0 = jnp.full(n, -jnp.log(n))
    x = _continuation(symmetric_residual, x0, precision, (game,), 24, 3, 6, game.payoff_range)
    return x, jnp.max(jnp.abs(symmetric_residual(x, (precision, game))))


def qre_symmetric_certified(
    precision: float, game: ContestGame, tolerance: float = 1e-8
) -> CertifiedQre:
    """Symmetric logit QRE at `precision` on the principal branch, with its residual.

    First the fixed geometric schedule of ``qre_symmetric`` (Newton in log space); if its
    residual exceeds `tolerance` (the branch turns fast or folds in lambda), the branch is
    traced
    in (log sigma, lambda) by pseudo-arclength from lambda = 0 to the first point with
    lambda >= precision, interpolated linearly to lambda = precision between the last two
    points and polished by Newton at fixed lambda."""
    x, residual = _scheduled_qre(jnp.float64(precision), game)
    x = np.asarray(x)
    if np.all(np.isfinite(x)) and float(residual) <= tolerance:
        return CertifiedQre(np.exp(x), float(residual), 24, "geometric continuation in lambda")
    branch = trace_symmetric(game, max_precision=float(precision), stop_at_precision=True)
    points = branch.points
    last = points[-1]
    if len(points) >= 2 and last.precision > precision:
        before = points[-2]
        w = (precision - before.precision) / (last.precision - before.precision)
        x0 = (1.0 - w) * before.log_probs + w * last.log_probs
    else:
        x0 = last.log_probs
    x, residual = _polish_symmetric(jnp.asarray(x0), jnp.float64(precision), game)
    x = np.asarray(x)
    residual = float(residual) if np.all(np.isfinite(x)) else float("inf")
    return CertifiedQre(np.exp(x), residual, len(points), f"branch tracing: {branch.message}")


# ----------------------------------------------------------------------------- estimation


def bimatrix_loglik(precision: Any, a: Any, b: Any, counts1: Any, counts2: Any) -> Any:
    """Log-likelihood sum_i counts_i . log sigma_i(lambda) of observed action counts."""
    s1, s2 = qre_bimatrix(precision, a, b)
    return counts1 @ jnp.log(s1) + counts2 @ jnp.log(s2)


def fit_bimatrix_precision(
    a: Any, b: Any, counts1: Any, counts2: Any, start: float = 1.0
) -> tuple[float, float]:
    """Maximum-likelihood precision from action counts of a two-player game, by Newton's
    method on log(lambda) with exact implicit gradients. Returns (lambda, log-likelihood)."""
    a, b = jnp.asarray(a, jnp.float64), jnp.asarray(b, jnp.float64)
    c1, c2 = jnp.asarray(counts1, jnp.float64), jnp.asarray(counts2, jnp.float64)

    def objective(z: Any) -> Any:
        return bimatrix_loglik(jnp.exp(z), a, b, c1, c2)

    grad = jax.jit(jax.grad(objective))
    hess = jax.jit(jax.grad(jax.grad(objective)))
    z = float(np.log(start))
    for _ in range(100):
        g, h = float(grad(z)), float(hess(z))
        step = -g / h if h < 0 else float(np.sign(g)) * 0.5
        step = float(np.clip(step, -1.0, 1.0))
        z += step
        if abs(step) < 1e-12:
            break
    return float(np.exp(z)), float(objective(z))
