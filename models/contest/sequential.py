"""Sequential stopping contests solved by backward induction over exact outcome distributions.

N players move one after another; mover j sees the best final bank B among movers 0..j-1 and
how many of them share it (c), then runs their own stopping task. The top final bank wins
the prize, ties split by a fair draw (each of the c tied players wins with probability 1/c);
with keep_bank everyone also keeps their own bank. Payoffs are expected utilities of the
money kb*x + prize*1{win}: risk neutral by default, or any utility u (``utility=`` of
make_sequential_game, e.g. CRRA), the same for every mover.

Scores are final banks: start + k*gain after k successes and a stop, bust_keep*(start +
k*gain) after a bust on draw k+1. They are mapped to indices of their sorted distinct values
(equal within a relative 1e-9), so "ahead", "tied" and "behind" are exact comparisons.

State of the game before mover j: (b, c), b the index of the best score so far and c >= 1 the
number of movers at it; before mover 0 there is no score yet (b = NONE, c = 0).

Win continuation, computed from the last mover backwards (G_N(b, c) = 1/c):

    G_j(b, c) = sum_x P_j(x | b, c) * ( [x < b] G_{j+1}(b, c) + [x = b] G_{j+1}(b, c+1) )

the chance that the movers at b in state (b, c) win, given movers j..N-1 play their rules.
Mover j scoring x in state (b, c) is paid

    win_j(x) = [x > b] G_{j+1}(x, 1) + [x = b] G_{j+1}(b, c+1),
    pay_j(x) = u(kb * score(x)) + win_j(x) * ( u(kb * score(x) + prize) - u(kb * score(x)) ),

and chooses how far to go by the stopping recursion over their own bank level k:

    V(cap) = pay(reach cap),
    V(k)   = max( pay(reach k), p V(k+1) + (1 - p) pay(bust after k) ),

stopping at the first k where stopping is at least as good (indifference -> stop). Since a
mover learns nothing while drawing except that they survived, that rule is a target number of
draws; ``target_values`` gives the value of every target from the outcome distributions,
an independent computation used as the certificate (max over targets minus the DP value).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.game import resolve_utility

NONE = -1
TIE_RELATIVE = 1e-9
INDIFFERENCE_RELATIVE = 1e-12


@dataclass(frozen=True)
class SequentialGame:
    """One sequential contest: survival chance, players, prize, scheme and the score grid.

    score_values: sorted distinct final banks; reach_index[k] / bust_index[k]: score index of
    stopping after k successes / busting on draw k+1 (bust_index has cap entries);
    lose_utility / win_utility: u(kb*score) and u(kb*score + prize) per score (None: u(x)=x)."""

    p_survive: float
    players: int
    prize: float
    keep_bank: bool
    cap: int
    score_values: np.ndarray
    reach_index: np.ndarray
    bust_index: np.ndarray
    lose_utility: np.ndarray | None = None
    win_utility: np.ndarray | None = None


@dataclass(frozen=True)
class SequentialSolution:
    """targets[j][b + 1, c]: mover j's target in state (b, c) (-1 where the state is
    impossible); values[j][b + 1, c]: mover j's optimal expected payoff there;
    win_continuation[j][b + 1, c] = G_j(b, c) (index N included, = 1/c)."""

    game: SequentialGame
    targets: list[np.ndarray]
    values: list[np.ndarray]
    win_continuation: list[np.ndarray]


def crra(r: float | None) -> Callable[[np.ndarray], np.ndarray] | None:
    """Money -> CRRA utility with curvature r (None: risk neutral, no utility)."""
    if r is None:
        return None
    if not (np.isfinite(r) and r < 1.0):
        raise StopwiseInputError(f"r must be a finite number below 1 in contests, got {r}")
    utility = resolve_utility("crra")
    return lambda x: np.asarray(utility(np.asarray(x, float), {"r": float(r)}), dtype=float)


def make_sequential_game(
    p_survive: float,
    players: int,
    prize: float,
    keep_bank: bool,
    cap: int,
    gain: float = 1.0,
    start: float = 0.0,
    bust_keep: float = 0.0,
    utility: Callable[[np.ndarray], np.ndarray] | None = None,
) -> SequentialGame:
    """Score grid of the contest: reach k -> start + k*gain, bust after k -> bust_keep*(start
    + k*gain), equal scores (relative 1e-9) merged into one index; with ``utility`` u (money
    -> utility, vectorised) the payoffs are expected utilities (module docstring)."""
    k = np.arange(cap + 1, dtype=float)
    reach = start + k * gain
    bust = bust_keep * (start + k[:cap] * gain)
    raw = np.concatenate([reach, bust])
    order = np.argsort(raw, kind="stable")
    index = np.empty(raw.size, dtype=int)
    values: list[float] = []
    for position in order:
        x = raw[position]
        scale = max(1.0, abs(x))
        if not values or x - values[-1] > TIE_RELATIVE * scale:
            values.append(float(x))
        index[position] = len(values) - 1
    scores = np.asarray(values)
    money = float(bool(keep_bank)) * scores
    lose = None if utility is None else np.asarray(utility(money), dtype=float)
    win = None if utility is None else np.asarray(utility(money + float(prize)), dtype=float)
    return SequentialGame(
        float(p_survive),
        int(players),
        float(prize),
        bool(keep_bank),
        int(cap),
        scores,
        index[: cap + 1],
        index[cap + 1 :],
        lose,
        win,
    )


def outcome_matrix(game: SequentialGame) -> np.ndarray:
    """Q[t, x]: probability that aiming for t draws ends at score index x:
    reach t with p^t, bust on draw k+1 (k < t) with p^k (1 - p)."""
    p, cap = game.p_survive, game.cap
    t = np.arange(cap + 1)
    q = np.zeros((cap + 1, game.score_values.size))
    q[t, game.reach_index] += p**t
    k = np.arange(cap)
    bust = np.where(k[None, :] < t[:, None], p**k * (1.0 - p), 0.0)
    for column in range(cap):
        np.add.at(q, (t, np.full(cap + 1, game.bust_index[column])), bust[:, column])
    return q


def win_chances(game: SequentialGame, next_continuation: np.ndarray, b: int, c: int) -> np.ndarray:
    """win_j(x) over score indices x in state (b, c), given G_{j+1} (module docstring)."""
    n_scores = game.score_values.size
    x = np.arange(n_scores)
    if b == NONE:
        return next_continuation[x + 1, 1]
    win = np.where(x > b, next_continuation[x + 1, 1], 0.0)
    return np.where(x == b, next_continuation[b + 1, c + 1], win)


def payoff_of_win(game: SequentialGame, win: np.ndarray) -> np.ndarray:
    """pay(x) = u(kb x) + win(x) (u(kb x + prize) - u(kb x)); u(x) = x without a utility."""
    if game.lose_utility is None or game.win_utility is None:
        return game.keep_bank * game.score_values + game.prize * win
    return game.lose_utility + win * (game.win_utility - game.lose_utility)


def payoff_range(game: SequentialGame) -> float:
    """max - min of any mover's possible payoff: u(kb max + prize) - u(0), the unit of
    regret shares (prize + kb * max score without a utility)."""
    if game.lose_utility is None or game.win_utility is None:
        return game.prize + game.keep_bank * float(game.score_values.max())
    return float(np.max(game.win_utility) - np.min(game.lose_utility))


def mover_payoffs(
    game: SequentialGame, next_continuation: np.ndarray, b: int, c: int
) -> np.ndarray:
    """pay_j(x) over score indices x in state (b, c), given G_{j+1} (module docstring)."""
    return payoff_of_win(game, win_chances(game, next_continuation, b, c))


def stopping_rule(game: SequentialGame, pay: np.ndarray) -> tuple[int, float]:
    """The stopping recursion V(k) = max(pay(reach k), p V(k+1) + (1-p) pay(bust k)) from the
    cap down; returns (first k where stopping is at least as good, V(0))."""
    p = game.p_survive
    spread = float(np.max(pay) - np.min(pay))
    slack = INDIFFERENCE_RELATIVE * max(spread, 1.0)
    value = float(pay[game.reach_index[game.cap]])
    stop_here = np.zeros(game.cap + 1, dtype=bool)
    stop_here[game.cap] = True
    for k in range(game.cap - 1, -1, -1):
        stop = float(pay[game.reach_index[k]])
        draw = p * value + (1.0 - p) * float(pay[game.bust_index[k]])
        stop_here[k] = stop >= draw - slack
        value = stop if stop_here[k] else draw
    return int(np.argmax(stop_here)), value


def _next_continuation(
    game: SequentialGame, q: np.ndarray, targets: np.ndarray, following: np.ndarray
) -> np.ndarray:
    """G_j from G_{j+1} and mover j's targets (module docstring)."""
    n_scores, n = game.score_values.size, game.players
    out = np.zeros((n_scores + 1, n + 2))
    for b in range(n_scores):
        for c in range(1, n + 1):
            t = targets[b + 1, c]
            if t < 0:
                continue
            dist = q[t]
            out[b + 1, c] = dist[:b].sum() * following[b + 1, c] + dist[b] * following[b + 1, c + 1]
    return out


def solve_sequential(game: SequentialGame) -> SequentialSolution:
    """Backward induction from the last mover to the first (module docstring)."""
    n, n_scores = game.players, game.score_values.size
    q = outcome_matrix(game)
    last = np.zeros((n_scores + 1, n + 2))
    last[1:, 1 : n + 1] = 1.0 / np.arange(1, n + 1)
    continuation = [last]
    targets_rev, values_rev = [], []
    for j in range(n - 1, -1, -1):
        following = continuation[0]
        targets = np.full((n_scores + 1, n + 2), -1, dtype=int)
        values = np.full((n_scores + 1, n + 2), np.nan)
        states = (
            [(NONE, 0)] if j == 0 else [(b, c) for b in range(n_scores) for c in range(1, j + 1)]
        )
        for b, c in states:
            pay = mover_payoffs(game, following, b, c)
            targets[b + 1, c], values[b + 1, c] = stopping_rule(game, pay)
        continuation.insert(0, _next_continuation(game, q, targets, following))
        targets_rev.append(targets)
        values_rev.append(values)
    return SequentialSolution(game, targets_rev[::-1], values_rev[::-1], continuation)


def target_values(
    game: SequentialGame,
    solution: SequentialSolution,
    j: int,
    b: int,
    c: int,
    q: np.ndarray | None = None,
) -> np.ndarray:
    """Mover j's expected payoff of every target t in state (b, c): Q[t] . pay_j."""
    pay = mover_payoffs(game, solution.win_continuation[j + 1], b, c)
    return (outcome_matrix(game) if q is None else q) @ pay


def state_transition(
    game: SequentialGame, b: int, c: int, dist: np.ndarray
) -> dict[tuple[int, int], float]:
    """Distribution of the next state (b', c') when the mover's score has distribution dist."""
    out: dict[tuple[int, int], float] = {}
    for x in np.flatnonzero(dist > 0):
        if b == NONE or x > b:
            key = (int(x), 1)
        elif x == b:
            key = (b, c + 1)
        else:
            key = (b, c)
        out[key] = out.get(key, 0.0) + float(dist[x])
    return out


def state_distributions(solution: SequentialSolution) -> list[dict[tuple[int, int], float]]:
    """P(state before mover j) for j = 0..N (index N: the final state)."""
    game = solution.game
    q = outcome_matrix(game)
    states: list[dict[tuple[int, int], float]] = [{(NONE, 0): 1.0}]
    for j in range(game.players):
        nxt: dict[tuple[int, int], float] = {}
        for (b, c), prob in states[-1].items():
            dist = q[solution.targets[j][b + 1, c]]
            for key, mass in state_transition(game, b, c, dist).items():
                nxt[key] = nxt.get(key, 0.0) + prob * mass
        states.append(nxt)
    return states


def mover_summaries(solution: SequentialSolution) -> list[dict[str, float]]:
    """Each mover's expected bank, bust rate, win probability and expected payoff:

    E[bank_j] = sum_state P(state) Q[t_j(state)] . score,
    P(win_j)  = sum_state P(state) Q[t_j(state)] . win_j(state)."""
    game = solution.game
    q = outcome_matrix(game)
    states = state_distributions(solution)
    out = []
    for j in range(game.players):
        bank = win = bust = 0.0
        following = solution.win_continuation[j + 1]
        for (b, c), prob in states[j].items():
            t = solution.targets[j][b + 1, c]
            dist = q[t]
            win_vec = win_chances(game, following, b, c)
            bank += prob * float(dist @ game.score_values)
            win += prob * float(dist @ win_vec)
            bust += prob * float(1.0 - game.p_survive**t)
        out.append({"expected_bank": bank, "win_prob": win, "bust_rate": bust})
    return out
