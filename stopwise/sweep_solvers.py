"""Warm-started solvers and certificates for sweeps of contest equilibria (stopwise.sweep).

A player aiming for target t (draws) in a contest with survival chance p ends in one slot:

    reach t:         bank start + t*gain,            probability p^t
    bust after k<t:  bank bust_keep*(start + k*gain), probability p^k (1 - p)

* ``two_player_tables``: the full (unreduced) two-player payoff matrix
  A[t, s] = sum_i q[t, i] (W_s(i) du_i + u0_i), with W_s(i) = P(rival below slot i) +
  P(rival level with i) / 2 the chance of winning from slot i against target s,
  du_i = u(kb*x_i + prize) - u(kb*x_i), u0_i = u(kb*x_i) (x_i the slot's bank); the win
  matrix (du = 1, u0 = 0); expected banks and reach chances p^t. Built in O(cap^2) by
  cumulative sums over the slots sorted by bank.
* ``certified_on_support``: a symmetric equilibrium sigma of the symmetric game A (column
  player's matrix A^T) on a neighbour's support S: the indifference system
  A[S, S] sigma_S = v 1, sum sigma_S = 1, kept only if sigma >= 0 and the regret
  max_t (A sigma)_t - sigma^T A sigma on the full matrix is within the tolerance.
* ``restricted_game_search``: when the support changed, a restricted game seeded with the
  neighbour's support, solved by ``symmetric_lemke_howson`` and grown by the improving
  deviations of the full game (double oracle).
* ``newton_support``: the same indifference system for N players, U_t(sigma) = v on S and
  sigma_t = 0 off S, by Newton's method (payoffs U from stopwise.models.contest.game).
* ``qre_newton``: the logit QRE fixed point x = log_softmax(lambda * U(exp x)) by Newton
  from a neighbour's solution (McKelvey & Palfrey 1995).
"""

from __future__ import annotations

from collections.abc import Callable
from functools import partial
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.models.contest.game import ContestGame, target_payoffs

NEGATIVE_WEIGHT = 1e-12


class TwoPlayerTables(NamedTuple):
    """Payoffs A[t, s], win chances win[t, s], expected bank and reach chance per target,
    and the payoff range (largest slot payoff minus smallest)."""

    payoff: np.ndarray
    win: np.ndarray
    bank: np.ndarray
    reach: np.ndarray
    payoff_range: float


def money_utility(x: np.ndarray, r: float | None) -> np.ndarray:
    """u(x) = x (linear, r None) or u(x) = (x^(1-r) - 1) / (1 - r) (CRRA, r < 1)."""
    if r is None:
        return x
    c = 1.0 - r
    return (np.power(x, c) - 1.0) / c


def slot_groups(scores: np.ndarray) -> np.ndarray:
    """Index of each slot's bank among the distinct banks in increasing order (banks within
    a relative 1e-9 are level)."""
    order = np.argsort(scores, kind="stable")
    ordered = scores[order]
    gaps = np.diff(ordered) > 1e-9 * (1.0 + np.abs(ordered[1:]) + np.abs(ordered[:-1]))
    group = np.empty(scores.size, dtype=int)
    group[order] = np.concatenate([[0], np.cumsum(gaps)])
    return group


def slot_chances(p: float, cap: int) -> tuple[np.ndarray, np.ndarray]:
    """(p^t for t = 0..cap, p^k (1 - p) for k = 0..cap-1)."""
    log_p = np.log(p)
    reach = np.exp(np.arange(cap + 1) * log_p)
    bust = np.exp(np.arange(cap) * log_p) * (1.0 - p)
    return reach, bust


def rival_win_chances(
    reach: np.ndarray, bust: np.ndarray, group: np.ndarray, cap: int
) -> np.ndarray:
    """W[s, i] = P(rival aiming for s ends strictly below slot i) + P(level) / 2."""
    n_groups = int(group.max()) + 1
    mass = np.zeros((cap + 1, n_groups))
    mass[np.arange(cap + 1), group[: cap + 1]] += reach
    bust_start = np.zeros((cap + 1, n_groups))  # bust after k counts for every target s > k
    np.add.at(bust_start, (np.arange(1, cap + 1), group[cap + 1 :]), bust)
    mass += np.cumsum(bust_start, axis=0)
    below = np.cumsum(mass, axis=1) - mass
    return below[:, group] + 0.5 * mass[:, group]


def _target_matrix(
    slot_payoff: np.ndarray, reach: np.ndarray, bust: np.ndarray, cap: int
) -> np.ndarray:
    """M[t, s] = p^t P[s, t] + sum_{k<t} p^k (1 - p) P[s, cap + 1 + k] for slot payoffs
    P[s, i] of slot i against a rival aiming for s."""
    busted = slot_payoff[:, cap + 1 :] * bust[None, :]
    before = np.concatenate([np.zeros((cap + 1, 1)), np.cumsum(busted, axis=1)], axis=1)
    return (reach[None, :] * slot_payoff[:, : cap + 1] + before).T


def two_player_tables(
    p: float,
    prize: float,
    keep_bank: bool,
    cap: int,
    gain: float = 1.0,
    start: float = 0.0,
    bust_keep: float = 0.0,
    r: float | None = None,
) -> TwoPlayerTables:
    """The full two-player contest over targets 0..cap (module docstring)."""
    reach, bust = slot_chances(p, cap)
    scores = np.concatenate(
        [start + np.arange(cap + 1) * gain, bust_keep * (start + np.arange(cap) * gain)]
    )
    wins = rival_win_chances(reach, bust, slot_groups(scores), cap)
    money = float(keep_bank) * scores
    u0 = money_utility(money, r)
    du = money_utility(money + prize, r) - u0
    payoff = _target_matrix(wins * du[None, :] + u0[None, :], reach, bust, cap)
    win = _target_matrix(wins, reach, bust, cap)
    bank = _target_matrix(np.broadcast_to(scores, wins.shape), reach, bust, cap)[:, 0]
    payoff_range = float(np.max(u0 + du) - np.min(u0))
    return TwoPlayerTables(payoff, win, bank, reach, payoff_range)


# ----------------------------------------------------------------------------- two players


def symmetric_regret(payoff: np.ndarray, sigma: np.ndarray) -> float:
    """max_t (A sigma)_t - sigma^T A sigma: the most either player of the symmetric game
    gains by deviating from (sigma, sigma)."""
    u = payoff @ sigma
    return float(u.max() - sigma @ u)


def indifference_on_support(payoff: np.ndarray, support: list[int]) -> np.ndarray | None:
    """sigma on `support` with A[S, S] sigma_S = v 1 and sum sigma_S = 1 (None if singular)."""
    k = len(support)
    system = np.zeros((k + 1, k + 1))
    system[:k, :k] = payoff[np.ix_(support, support)]
    system[:k, k] = -1.0
    system[k, :k] = 1.0
    rhs = np.zeros(k + 1)
    rhs[k] = 1.0
    try:
        solution = np.linalg.solve(system, rhs)
    except np.linalg.LinAlgError:
        return None
    if not np.all(np.isfinite(solution)):
        return None
    sigma = np.zeros(payoff.shape[0])
    sigma[support] = solution[:k]
    return sigma


def certified_on_support(
    payoff: np.ndarray, support: list[int], tolerance: float
) -> np.ndarray | None:
    """The indifference solution on `support` if it is a distribution whose regret on the
    full matrix is at most `tolerance` (payoff units), else None."""
    sigma = indifference_on_support(payoff, sorted(set(support))) if support else None
    if sigma is None or sigma.min() < -NEGATIVE_WEIGHT:
        return None
    sigma = np.clip(sigma, 0.0, None)
    sigma /= sigma.sum()
    return sigma if symmetric_regret(payoff, sigma) <= tolerance else None


def restricted_game_search(
    payoff: np.ndarray, seed: list[int], tolerance: float, max_rounds: int = 60
) -> np.ndarray | None:
    """Symmetric equilibrium by growing a restricted game (double oracle; McMahan, Gordon &
    Blum 2003): solve the game on targets C (from `seed`) by ``symmetric_lemke_howson``,
    add every target that improves on it in the full game, until the full-matrix regret is
    at most `tolerance`; None if the rounds run out or pivoting fails."""
    chosen = sorted(set(seed))
    for _ in range(max_rounds):
        try:
            restricted = symmetric_lemke_howson(payoff[np.ix_(chosen, chosen)])
        except ArithmeticError:
            return None
        sigma = np.zeros(payoff.shape[0])
        sigma[chosen] = restricted
        u = payoff @ sigma
        value = float(sigma @ u)
        better = [int(t) for t in np.flatnonzero(u > value + tolerance) if t not in chosen]
        if not better:
            return sigma if u.max() - value <= tolerance else None
        chosen = sorted({*chosen, *better})
    return None


def _pivot(tableau: np.ndarray, basis: list[int], entering: int) -> int:
    """Min-ratio pivot on column `entering` (ties: smallest row); returns the leaving var."""
    column = tableau[:, entering]
    ratios = np.full(len(basis), np.inf)
    positive = column > 1e-13
    ratios[positive] = tableau[positive, -1] / column[positive]
    row = int(np.argmin(ratios))
    if not np.isfinite(ratios[row]):
        raise ArithmeticError("symmetric Lemke-Howson: unbounded ray")
    tableau[row] /= tableau[row, entering]
    others = np.arange(tableau.shape[0]) != row
    tableau[others] -= np.outer(tableau[others, entering], tableau[row])
    leaving = basis[row]
    basis[row] = entering
    return leaving


def symmetric_lemke_howson(payoff: np.ndarray, dropped: int = 0) -> np.ndarray:
    """A symmetric equilibrium of the symmetric game A by complementary pivoting on
    {z >= 0: A' z <= 1} (A' = A shifted positive; Lemke & Howson 1964, symmetric form):
    from z = 0 let z_dropped enter; each leaving variable's complement (z_i <-> w_i, the
    slack of row i) enters next, until a variable of pair `dropped` leaves; sigma = z / sum z.
    """
    n = payoff.shape[0]
    shifted = payoff - payoff.min() + 1.0
    tableau = np.hstack([shifted, np.eye(n), np.ones((n, 1))])
    basis = list(range(n, 2 * n))
    entering = dropped
    for _ in range(50 * n + 100):
        leaving = _pivot(tableau, basis, entering)
        if leaving % n == dropped:
            break
        entering = leaving + n if leaving < n else leaving - n
    else:
        raise ArithmeticError("symmetric Lemke-Howson did not terminate")
    z = np.zeros(n)
    for row, var in enumerate(basis):
        if var < n:
            z[var] = tableau[row, -1]
    return z / z.sum()


# ----------------------------------------------------------------------------- N players


def _indifference_residual(z: Any, game: ContestGame, mask: Any) -> Any:
    """U_t(sigma) - v on the support, sigma_t off it, and sum sigma - 1 (z = (sigma, v))."""
    sigma, v = z[:-1], z[-1]
    u = target_payoffs(game, sigma)
    return jnp.concatenate([jnp.where(mask, u - v, sigma), jnp.array([jnp.sum(sigma) - 1.0])])


def _qre_residual(x: Any, game: ContestGame, precision: Any) -> Any:
    """F(x) = x - log_softmax(lambda * U(exp x)) (symmetric logit QRE)."""
    return x - jax.nn.log_softmax(precision * target_payoffs(game, jnp.exp(x)))


def _qre_residual_matrix(x: Any, payoff: Any, precision: Any) -> Any:
    """F(x) = x - log_softmax(lambda * A exp(x)) (two players, symmetric)."""
    return x - jax.nn.log_softmax(precision * (payoff @ jnp.exp(x)))


@partial(jax.jit, static_argnums=(0, 4))
def _newton(residual: Callable[..., Any], z: Any, first: Any, second: Any, steps: int) -> Any:
    """`steps` Newton steps z <- z - J^+ F(z) (least squares) on residual(z, first, second);
    returns z and the final residual max-norm."""

    def step(_: int, z: Any) -> Any:
        jac = jax.jacfwd(residual)(z, first, second)
        delta = jnp.linalg.lstsq(jac, residual(z, first, second))[0]
        return jnp.where(jnp.all(jnp.isfinite(delta)), z - delta, z)

    z = jax.lax.fori_loop(0, steps, step, z)
    return z, jnp.max(jnp.abs(residual(z, first, second)))


def newton_support(
    game: ContestGame, support: list[int], start: np.ndarray, steps: int = 20
) -> np.ndarray | None:
    """sigma with support S solving U_t(sigma) = v (t in S) by Newton from `start`."""
    mask = np.zeros(game.n_targets, dtype=bool)
    mask[support] = True
    s0 = np.where(mask, np.maximum(start, 1e-3 / mask.sum()), 0.0)
    s0 /= s0.sum()
    v0 = float(s0 @ np.asarray(target_payoffs(game, jnp.asarray(s0))))
    z, residual = _newton(
        _indifference_residual, jnp.asarray(np.r_[s0, v0]), game, jnp.asarray(mask), steps
    )
    z = np.asarray(z)
    if not np.all(np.isfinite(z)) or float(residual) > 1e-11:
        return None
    return z[:-1]


def n_player_regret(game: ContestGame, sigma: np.ndarray) -> float:
    """max_t U_t(sigma) - sigma . U(sigma) when the N-1 others play sigma."""
    u = np.asarray(target_payoffs(game, jnp.asarray(sigma)))
    return float(u.max() - sigma @ u)


def n_player_support_search(
    game: ContestGame, start: np.ndarray, tolerance: float, max_steps: int = 30
) -> np.ndarray | None:
    """Support updating for the symmetric N-player contest from the support of `start`:
    solve the indifference system on S by Newton; if the solution has a negative weight or
    an improving deviation, the next S holds the targets of positive weight and every
    target t with U_t(sigma) > sigma . U(sigma) + tolerance (sigma the solution clipped at 0
    and renormalised); stop when sigma >= 0 has regret <= tolerance."""
    support = sorted(int(t) for t in np.flatnonzero(start > 1e-9))
    guess = start
    seen: set[tuple[int, ...]] = set()
    for _ in range(max_steps):
        if not support or tuple(support) in seen:
            return None
        seen.add(tuple(support))
        solution = newton_support(game, support, guess)
        if solution is None:
            return None
        sigma = np.clip(solution, 0.0, None)
        sigma /= sigma.sum()
        u = np.asarray(target_payoffs(game, jnp.asarray(sigma)))
        value = float(sigma @ u)
        if solution.min() >= -NEGATIVE_WEIGHT and u.max() - value <= tolerance:
            return sigma
        kept = np.flatnonzero(solution > NEGATIVE_WEIGHT)
        support = sorted(
            {*(int(t) for t in kept), *(int(t) for t in np.flatnonzero(u > value + tolerance))}
        )
        guess = sigma
    return None


# ----------------------------------------------------------------------------- logit QRE


def qre_newton(
    precision: float,
    start: np.ndarray,
    game: ContestGame | None = None,
    payoff: np.ndarray | None = None,
    steps: int = 12,
) -> np.ndarray:
    """Logit QRE by Newton from `start` (two players: pass the matrix `payoff`)."""
    x0 = jnp.log(jnp.clip(jnp.asarray(start), 1e-300, None))
    if payoff is not None:
        x, _ = _newton(_qre_residual_matrix, x0, jnp.asarray(payoff), precision, steps)
    else:
        x, _ = _newton(_qre_residual, x0, game, precision, steps)
    return np.exp(np.asarray(x))


def qre_residual(sigma: np.ndarray, payoffs: np.ndarray, precision: float) -> float:
    """max_t |sigma_t - softmax(lambda * U(sigma))_t|: the fixed-point residual."""
    z = precision * payoffs
    response = np.exp(z - z.max())
    return float(np.max(np.abs(sigma - response / response.sum())))
