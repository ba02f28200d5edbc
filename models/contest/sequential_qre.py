"""Agent logit QRE of the sequential stopping contest: logit choice at every decision node.

Same game, states and payoffs as stopwise.models.contest.sequential. At bank level k of mover
j in state (b, c), with precision lambda >= 0,

    S_k = pay(reach k),   D_k = p V(k+1) + (1 - p) pay(bust after k),
    P(stop at k) = 1 / (1 + exp(-lambda (S_k - D_k))),   (forced stop at the cap)
    V(k) = P(stop) S_k + (1 - P(stop)) D_k,

so every node's agent expects its own later nodes and all later movers to play the same noisy
way (consistent beliefs). The game has perfect information between movers, so the agent QRE is
computed by this backward recursion, no fixed point: lambda -> infinity gives the exact
solution's stopping rule (where it is strict), lambda = 0 stops with probability 1/2 at every
node below the cap.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import expit

from stopwise.models.contest.sequential import NONE, SequentialGame, mover_payoffs, win_chances


@dataclass(frozen=True)
class LogitSolution:
    """outcomes[j][b + 1, c]: mover j's distribution over score indices in state (b, c)
    (zeros where impossible); stop_probs[j][b + 1, c, k]: P(stop at bank level k);
    bust[j][b + 1, c]: P(bust); win_continuation as in SequentialSolution."""

    game: SequentialGame
    precision: float
    outcomes: list[np.ndarray]
    stop_probs: list[np.ndarray]
    bust: list[np.ndarray]
    values: list[np.ndarray]
    win_continuation: list[np.ndarray]


def logit_node_play(
    game: SequentialGame, pay: np.ndarray, precision: float
) -> tuple[np.ndarray, np.ndarray, float, float]:
    """Backward logit recursion over bank levels (module docstring); returns (P(stop at k)
    for k = 0..cap, outcome distribution over score indices, P(bust), V(0))."""
    p, cap = game.p_survive, game.cap
    stop_prob = np.ones(cap + 1)
    value = float(pay[game.reach_index[cap]])
    for k in range(cap - 1, -1, -1):
        stop = float(pay[game.reach_index[k]])
        draw = p * value + (1.0 - p) * float(pay[game.bust_index[k]])
        stop_prob[k] = expit(precision * (stop - draw))
        value = stop_prob[k] * stop + (1.0 - stop_prob[k]) * draw
    dist = np.zeros(game.score_values.size)
    alive, bust = 1.0, 0.0
    for k in range(cap + 1):
        dist[game.reach_index[k]] += alive * stop_prob[k]
        if k < cap:
            busting = alive * (1.0 - stop_prob[k]) * (1.0 - p)
            dist[game.bust_index[k]] += busting
            bust += busting
            alive *= (1.0 - stop_prob[k]) * p
    return stop_prob, dist, bust, value


def solve_sequential_logit(game: SequentialGame, precision: float) -> LogitSolution:
    """Backward induction over movers with logit play at every node (module docstring)."""
    if not (np.isfinite(precision) and precision >= 0):
        raise ValueError(f"precision must be finite and >= 0, got {precision}")
    n, n_scores = game.players, game.score_values.size
    last = np.zeros((n_scores + 1, n + 2))
    last[1:, 1 : n + 1] = 1.0 / np.arange(1, n + 1)
    continuation = [last]
    outcomes, stops, busts, values = [], [], [], []
    for j in range(n - 1, -1, -1):
        following = continuation[0]
        outcome = np.zeros((n_scores + 1, n + 2, n_scores))
        stop = np.zeros((n_scores + 1, n + 2, game.cap + 1))
        bust = np.zeros((n_scores + 1, n + 2))
        value = np.full((n_scores + 1, n + 2), np.nan)
        g = np.zeros((n_scores + 1, n + 2))
        states = (
            [(NONE, 0)] if j == 0 else [(b, c) for b in range(n_scores) for c in range(1, j + 1)]
        )
        for b, c in states:
            pay = mover_payoffs(game, following, b, c)
            stop[b + 1, c], outcome[b + 1, c], bust[b + 1, c], value[b + 1, c] = logit_node_play(
                game, pay, precision
            )
            if b != NONE:
                dist = outcome[b + 1, c]
                g[b + 1, c] = (
                    dist[:b].sum() * following[b + 1, c] + dist[b] * following[b + 1, c + 1]
                )
        continuation.insert(0, g)
        outcomes.insert(0, outcome)
        stops.insert(0, stop)
        busts.insert(0, bust)
        values.insert(0, value)
    return LogitSolution(game, float(precision), outcomes, stops, busts, values, continuation)


def logit_mover_summaries(solution: LogitSolution) -> list[dict[str, float]]:
    """Each mover's expected bank, win probability and bust rate under logit play, by a
    forward pass over the state distribution."""
    game = solution.game
    states: dict[tuple[int, int], float] = {(NONE, 0): 1.0}
    out = []
    for j in range(game.players):
        bank = win = bust = 0.0
        following = solution.win_continuation[j + 1]
        nxt: dict[tuple[int, int], float] = {}
        for (b, c), prob in states.items():
            dist = solution.outcomes[j][b + 1, c]
            win_vec = win_chances(game, following, b, c)
            bank += prob * float(dist @ game.score_values)
            win += prob * float(dist @ win_vec)
            bust += prob * float(solution.bust[j][b + 1, c])
            for x in np.flatnonzero(dist > 0):
                if b == NONE or x > b:
                    key = (int(x), 1)
                elif x == b:
                    key = (b, c + 1)
                else:
                    key = (b, c)
                nxt[key] = nxt.get(key, 0.0) + prob * float(dist[x])
        states = nxt
        out.append({"expected_bank": bank, "win_prob": win, "bust_rate": bust})
    return out
