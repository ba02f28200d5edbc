"""Normal form of the stopping contest over targets (exact, no Monte Carlo).

Play is private and the survival probability p is constant, so a stopping rule is a (mixed)
choice of a target number of draws T in {0..cap}. A player aiming for t ends in one of the
*outcome slots*

    reach t:          bank start + t*gain,                  probability p^t
    bust after k<t:   bank bust_keep*(start + k*gain),       probability p^k (1 - p)

Slots 0..cap are "reach t", slots cap+1+k are "bust after k" (L = 2*cap + 1 slots). The top
final bank wins ``prize``; ties are broken by a fair random draw among the tied players. A
player's money is ``keep_bank * bank + prize * 1{wins}``, so with a utility u the payoff of
ending in slot i is

    pi_i = W_i * (u(kb*s_i + prize) - u(kb*s_i)) + u(kb*s_i)

where W_i is the probability of winning from slot i. Against n = N-1 opponents who all end
below slot i with probability b_i and level with it with probability e_i (a = b_i + e_i),

    W_i = sum_j C(n,j) e^j b^(n-j) / (j+1) = (a^N - b^N) / (N e)
        = a^(N-1) * h(b/a),   h(y) = (1 - y^N) / (N (1 - y)),  h(1) = 1,  h(0) = 1/N,

computed as h = expm1(N z) / (N expm1(z)), z = log(b/a), expm1(z) = -e/a (stable for every
e, b; at b = 0 directly W = e^(N-1) / N).
For opponents with different mixed strategies the number of tying opponents has the
generating polynomial prod_j (b_j + e_j x), and W_i = sum_k c_k / (k+1).

Default cap (``default_max_target``): every target t > M shares all outcomes with target M
until the M-th success, which happens with probability p^M, so replacing t by M changes any
player's payoff by at most p^M * (payoff range). With M the smallest integer with
p^M <= 1e-12, targets beyond M are payoff-equivalent to M up to 1e-12 of the payoff range:
no target beyond the cap matters at the 1e-9 regret goal of the solvers.

Every function below works on numpy arrays with numpy (a host-side solve compiles nothing)
and on JAX arrays or tracers with jax.numpy (``array_module``).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from typing import Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.topk import share_prob_profile, share_prob_symmetric
from stopwise.models.utility import UTILITIES

CAP_TOLERANCE = 1e-12
CAP_LIMIT = 1000

Utility = Callable[[Any, Mapping[str, Any]], Any]


def array_module(*arrays: Any) -> Any:
    """numpy when every argument is a numpy array or a Python/numpy scalar, else jax.numpy."""
    plain = (np.ndarray, np.generic, float, int, bool)
    return np if all(isinstance(a, plain) for a in arrays) else jnp


def default_max_target(p_survive: float, tolerance: float = CAP_TOLERANCE) -> int:
    """Smallest M with p^M <= tolerance: M = ceil(log(tolerance) / log(p)) (module docstring).

    Raises StopwiseInputError when M exceeds CAP_LIMIT (p too close to 1): pass a cap.
    """
    p = float(p_survive)
    if not 0.0 < p < 1.0:
        raise StopwiseInputError(f"p_survive must lie strictly between 0 and 1, got {p}")
    cap = max(1, math.ceil(math.log(tolerance) / math.log(p)))
    if cap > CAP_LIMIT:
        raise StopwiseInputError(
            f"with p_survive={p} the default cap on targets (p^M <= {tolerance:g}) is {cap}, "
            f"above the limit {CAP_LIMIT}; pass max_target (--max-target) explicitly"
        )
    return cap


# ----------------------------------------------------------------------------- utilities


def _linear(x: Any, theta: Mapping[str, Any]) -> Any:
    return x


def _crra(x: Any, theta: Mapping[str, Any]) -> Any:
    """u(x) = (x^(1-r) - 1) / (1-r) (log x at r = 1); u(0) = -1/(1-r) for r < 1."""
    c = 1.0 - theta["r"]
    positive = x > 0
    logx = jnp.log(jnp.where(positive, x, 1.0))
    away = jnp.abs(c) > 1e-10
    safe = jnp.where(away, c, 1.0)
    u = jnp.where(away, jnp.expm1(safe * logx) / safe, logx)
    return jnp.where(positive, u, -1.0 / safe)


_BUILTIN_UTILITIES: dict[str, Utility] = {"linear": _linear, "crra": _crra}


def resolve_utility(name: str) -> Utility:
    """The utility function ``u(x, theta)`` of the risk-model family ``name``.

    The families of stopwise.models.utility.UTILITIES, else the built-in linear/CRRA.
    """
    if name in UTILITIES:
        return UTILITIES[name].fn
    if name in _BUILTIN_UTILITIES:
        return _BUILTIN_UTILITIES[name]
    known = sorted(set(UTILITIES) | set(_BUILTIN_UTILITIES))
    raise StopwiseInputError(f"unknown utility {name!r}; known utilities: {', '.join(known)}")


def money_utility(utility: Utility, x: Any, theta: Mapping[str, Any]) -> Any:
    """u(x) for money x >= 0 (the families define u(0) as the limit u(0+), finite for CRRA
    with r < 1)."""
    return utility(x, theta)


# ----------------------------------------------------------------------------- the game


class ContestGame(NamedTuple):
    """Arrays of one contest (a JAX pytree; every field may be traced).

    log_q[t, i]: log P(slot i | target t); scores[i]: final bank of slot i;
    below[j, i] = 1 if slot j's bank is strictly below slot i's, equal[j, i] = 1 if level;
    du[i] = u(kb*s_i + prize) - u(kb*s_i), u0[i] = u(kb*s_i); n_players (float).
    top_k: None when the top bank takes the prize (W by the closed form above), else an
    array of shape (k,) whose length k (static under tracing) is the number of top places
    that share the prize, each taking prize / k (du uses prize / k; W by
    stopwise.models.contest.topk).
    """

    log_q: Any
    scores: Any
    below: Any
    equal: Any
    du: Any
    u0: Any
    n_players: Any
    top_k: Any = None

    @property
    def shared_places(self) -> int:
        """k: how many top places share the prize (1: winner takes it)."""
        return 1 if self.top_k is None else int(self.top_k.shape[-1])

    @property
    def n_targets(self) -> int:
        return int(self.log_q.shape[-2])

    @property
    def q(self) -> Any:
        return array_module(self.log_q).exp(self.log_q)

    @property
    def payoff_range(self) -> Any:
        """max - min of the slot payoffs u0 and u0 + du (the unit of regret shares)."""
        xp = array_module(self.u0, self.du)
        money = xp.concatenate([self.u0, self.u0 + self.du])
        return xp.max(money) - xp.min(money)


def slot_log_probs(p_survive: Any, cap: int) -> Any:
    """log P(slot | target), shape (cap+1, 2*cap+1) (module docstring)."""
    xp = array_module(p_survive)
    t = xp.arange(cap + 1, dtype=xp.float64)
    log_p = xp.log(p_survive)
    reach = xp.where(xp.eye(cap + 1, dtype=bool), t[:, None] * log_p, -xp.inf)
    k = xp.arange(cap, dtype=xp.float64)
    bust_lp = k * log_p + xp.log1p(-p_survive)
    bust = xp.where(k[None, :] < t[:, None], bust_lp[None, :], -xp.inf)
    return xp.concatenate([reach, bust], axis=1)


def slot_scores(gain: Any, start: Any, bust_keep: Any, cap: int) -> Any:
    """Final bank of each slot: start + t*gain (reach t), bust_keep*(start + k*gain)."""
    xp = array_module(gain, start, bust_keep)
    t = xp.arange(cap + 1, dtype=xp.float64)
    k = xp.arange(cap, dtype=xp.float64)
    return xp.concatenate([start + t * gain, bust_keep * (start + k * gain)])


def rank_relations(scores: Any) -> tuple[Any, Any]:
    """below[j, i] = s_j < s_i, equal[j, i] = s_j == s_i (relative tolerance 1e-9)."""
    xp = array_module(scores)
    tol = 1e-9 * (1.0 + xp.abs(scores[:, None]) + xp.abs(scores[None, :]))
    diff = scores[None, :] - scores[:, None]  # s_i - s_j at [j, i]
    equal = (xp.abs(diff) <= tol).astype(xp.float64)
    below = (diff > tol).astype(xp.float64)
    return below, equal


def make_game(
    p_survive: Any,
    n_players: Any,
    prize: Any,
    keep_bank: Any,
    cap: int,
    gain: Any = 1.0,
    start: Any = 0.0,
    bust_keep: Any = 0.0,
    utility: Utility = _linear,
    theta: Mapping[str, Any] | None = None,
    top_k: int = 1,
) -> ContestGame:
    """Build the contest's normal form over targets 0..cap (module docstring), with JAX;
    ``top_k`` > 1 shares the prize among the k top banks (ContestGame.top_k)."""
    theta = {} if theta is None else theta
    p_survive = jnp.asarray(p_survive, dtype=jnp.float64)
    log_q = slot_log_probs(p_survive, cap)
    scores = slot_scores(
        jnp.asarray(gain, jnp.float64),
        jnp.asarray(start, jnp.float64),
        jnp.asarray(bust_keep, jnp.float64),
        cap,
    )
    below, equal = rank_relations(scores)
    own_money = jnp.asarray(keep_bank, jnp.float64) * scores
    u_lose = money_utility(utility, own_money, theta)
    u_win = money_utility(utility, own_money + prize / top_k, theta)
    return ContestGame(
        log_q=log_q,
        scores=scores,
        below=below,
        equal=equal,
        du=u_win - u_lose,
        u0=u_lose,
        n_players=jnp.asarray(n_players, jnp.float64),
        top_k=_places(top_k),
    )


def _places(top_k: int) -> Any:
    """ContestGame.top_k of k shared places: None for k = 1, else ones of shape (k,)."""
    if int(top_k) != top_k or top_k < 1:
        raise StopwiseInputError(f"top_k must be a whole number >= 1, got {top_k}")
    return None if top_k == 1 else np.ones(int(top_k))


def make_numpy_game(
    p_survive: float,
    n_players: int,
    prize: float,
    keep_bank: float,
    cap: int,
    gain: float = 1.0,
    start: float = 0.0,
    bust_keep: float = 0.0,
    utility: Utility = _linear,
    theta: Mapping[str, Any] | None = None,
    top_k: int = 1,
) -> ContestGame:
    """The same normal form as ``make_game`` in numpy arrays (nothing compiled for linear
    utility; other utilities are evaluated once by their JAX function)."""
    log_q = slot_log_probs(np.float64(p_survive), cap)
    scores = slot_scores(np.float64(gain), np.float64(start), np.float64(bust_keep), cap)
    below, equal = rank_relations(scores)
    own_money = float(keep_bank) * scores
    theta = {} if theta is None else theta
    u_lose = np.asarray(money_utility(utility, own_money, theta), dtype=np.float64)
    u_win = np.asarray(money_utility(utility, own_money + prize / top_k, theta), dtype=np.float64)
    return ContestGame(
        log_q,
        scores,
        below,
        equal,
        u_win - u_lose,
        u_lose,
        np.float64(n_players),
        _places(top_k),
    )


def slot_distribution(game: ContestGame, sigma: Any) -> Any:
    """Distribution of a player's final slot when aiming by the mixed strategy sigma."""
    return sigma @ game.q


def win_prob_symmetric(game: ContestGame, opponent_slots: Any) -> Any:
    """W_i against N-1 opponents with slot distribution f each (module docstring)."""
    xp = array_module(opponent_slots, game.below)
    b = opponent_slots @ game.below
    e = opponent_slots @ game.equal
    if game.top_k is not None:  # the prize shared among the top k
        return share_prob_symmetric(xp, b, e, game.n_players, game.shared_places)
    a = b + e
    n = game.n_players
    interior = b > 0
    a_safe = xp.where(interior, a, 1.0)
    tie_share = xp.where(interior, e / a_safe, 0.0)  # e/a in [0, 1)
    below_share = xp.maximum(xp.where(interior, b / a_safe, 1.0), 1e-300)  # b/a = 1 - e/a
    small = tie_share < 0.5
    z = xp.where(  # z = log(b/a), accurate on both sides
        small,
        xp.log1p(-xp.where(small, tie_share, 0.0)),
        xp.log(xp.where(small, 1.0, below_share)),
    )
    near = xp.abs(z) < 1e-6  # series 1 + (N-1) z/2 + (N-1)(2N-1) z^2/12 avoids 0/0
    z_far = xp.where(near, -1.0, z)
    h = xp.where(
        near,
        1.0 + (n - 1.0) * z / 2.0 + (n - 1.0) * (2.0 * n - 1.0) * z * z / 12.0,
        xp.expm1(n * z_far) / (n * xp.expm1(z_far)),
    )
    general = xp.exp((n - 1.0) * xp.log(a_safe)) * h
    a_pos = a > 0
    lowest = xp.where(a_pos, xp.exp((n - 1.0) * xp.log(xp.where(a_pos, a, 1.0))), 0.0) / n
    return xp.where(interior, general, lowest)


def win_prob_profile(game: ContestGame, opponents_slots: Any) -> Any:
    """W_i against opponents with different slot distributions (rows of opponents_slots):
    coefficients of prod_j (b_j + e_j x), then W = sum_k c_k / (k+1)."""
    b_all = opponents_slots @ game.below
    e_all = opponents_slots @ game.equal
    if game.top_k is not None:  # the prize shared among the top k
        return share_prob_profile(jnp, b_all, e_all, game.shared_places)
    n_opp = opponents_slots.shape[0]
    coeffs = jnp.zeros((n_opp + 1, b_all.shape[-1])).at[0].set(1.0)
    for j in range(n_opp):
        shifted = jnp.concatenate([jnp.zeros_like(coeffs[:1]), coeffs[:-1]], axis=0)
        coeffs = coeffs * b_all[j] + shifted * e_all[j]
    weights = 1.0 / jnp.arange(1, n_opp + 2, dtype=jnp.float64)
    return weights @ coeffs


def slot_payoffs(game: ContestGame, win_prob: Any) -> Any:
    """pi_i = W_i * du_i + u0_i."""
    return win_prob * game.du + game.u0


def target_payoffs(game: ContestGame, sigma: Any) -> Any:
    """Expected payoff of each target when all N-1 opponents play the mixed strategy sigma:
    U_t = sum_i q[t, i] pi_i(W(f)), f = sigma q."""
    w = win_prob_symmetric(game, slot_distribution(game, sigma))
    return game.q @ slot_payoffs(game, w)


def target_payoffs_profile(game: ContestGame, opponent_sigmas: Any) -> Any:
    """Expected payoff of each target against opponents playing the rows of opponent_sigmas."""
    w = win_prob_profile(game, opponent_sigmas @ game.q)
    return game.q @ slot_payoffs(game, w)


def payoff_matrix(game: ContestGame) -> Any:
    """Two-player payoff matrix A[t, s] of the row player aiming t against target s
    (ties split evenly: W = P(below) + P(level)/2); the column player's matrix is A.T:
    A[t, s] = sum_i q[t, i] (w[s, i] du_i + u0_i), w[s, i] = sum_j q[s, j] (below + equal/2)[j, i].
    A shared prize (top_k) needs more than two players: refused.
    """
    if game.top_k is not None:
        raise StopwiseInputError("a prize shared among the top k needs more than k players")
    q = game.q
    w = q @ (game.below + 0.5 * game.equal)  # w[s, i]: win prob of slot i against target s
    return (q * game.du) @ w.T + (q @ game.u0)[:, None]


def expected_bank(game: ContestGame) -> Any:
    """Expected final bank of each target: sum_i q[t, i] s_i."""
    return game.q @ game.scores


def target_distribution_stats(game: ContestGame, sigma: Any) -> dict[str, Any]:
    """Bust rate, expected bank and win probability of a player using sigma among
    opponents who also use sigma."""
    xp = array_module(game.log_q, sigma)
    reach = xp.exp(xp.diagonal(game.log_q))  # p^t: slot "reach t" of target t
    bust_rate = sigma @ (1.0 - reach)
    bank = sigma @ expected_bank(game)
    f = slot_distribution(game, sigma)
    win = f @ win_prob_symmetric(game, f)
    return {"bust_rate": bust_rate, "expected_bank": bank, "win_prob": win}


def max_regret(payoffs: Any, sigma: Any) -> Any:
    """max_t payoff_t - sigma . payoff (>= 0; 0 exactly at a best response)."""
    return array_module(payoffs).max(payoffs) - sigma @ payoffs


def as_numpy_game(game: ContestGame) -> ContestGame:
    """The same game with numpy arrays (for host-side solvers)."""
    return ContestGame(*(None if x is None else np.asarray(x) for x in game))


def as_jax_game(game: ContestGame) -> ContestGame:
    """The same game with JAX arrays."""
    return ContestGame(*(None if x is None else jnp.asarray(x) for x in game))


jax_target_payoffs = jax.jit(target_payoffs)
