"""Certificate of the sequential-contest likelihood: its stop probabilities recomputed by an
independent solver.

The likelihood (stopwise.models.contest.sequential_likelihood) works in JAX over outcome
slots; stopwise.models.contest.sequential_qre solves the same agent logit play in numpy over
merged score levels, state by state. Level-k / cognitive-hierarchy types
(sequential_beliefs) are rebuilt here from the numpy solutions at the estimated precision
and at precision 0 (level-0 play), and mixed by the hazard formula in numpy. For every
sequential condition of the data, the check takes the mover of that condition in the state
it saw and compares P(stop at k | reached k), k = 0..cap:

    check = max over conditions and k of |P_likelihood(stop at k) - P_solver(stop at k)|.

A fit whose check exceeds stopwise.fit_checks.SEQUENTIAL_CHECK_TOLERANCE is not certified.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from stopwise.models.contest.game import Utility
from stopwise.models.contest.sequential import (
    NONE,
    TIE_RELATIVE,
    make_sequential_game,
    payoff_of_win,
    win_chances,
)
from stopwise.models.contest.sequential_beliefs import Beliefs, beliefs_for
from stopwise.models.contest.sequential_likelihood import (
    GAME_FIELDS,
    SequentialPart,
    sequential_conditions,
    sequential_stop_probabilities,
)
from stopwise.models.contest.sequential_qre import (
    LogitSolution,
    logit_node_play,
    solve_sequential_logit,
)


def reference_solutions(
    game_row: tuple[float, ...], cap: int, theta: Mapping[str, float], utility: Utility
) -> tuple[LogitSolution, LogitSolution]:
    """The numpy agent logit solutions of one game (p, gain, start, bust_keep, players,
    prize, keep_bank) with u(x) = utility(x, theta): at the precision and at precision 0."""
    p, gain, start, keep, players, prize, keep_bank = game_row
    game = make_sequential_game(
        p,
        round(players),
        prize,
        keep_bank > 0.5,
        cap,
        gain,
        start,
        keep,
        utility=lambda x: np.asarray(utility(np.asarray(x, float), theta), dtype=float),
    )
    return solve_sequential_logit(game, float(theta["precision"])), solve_sequential_logit(
        game, 0.0
    )


def hazard_of_mixture(weights: np.ndarray, stop: np.ndarray) -> np.ndarray:
    """P(stop at s | reached s) of types with stop probabilities stop[type, s]:
    sum w alive stop / sum w alive, alive(s) = prod_{s'<s} (1 - stop(s'))."""
    alive = np.concatenate([np.ones((stop.shape[0], 1)), np.cumprod(1 - stop[:, :-1], 1)], 1)
    reached = weights[:, None] * alive
    return (reached * stop).sum(0) / reached.sum(0)


def first_mover_reference(
    logit: LogitSolution, uniform: LogitSolution, beliefs: Beliefs | None
) -> np.ndarray:
    """P(stop at k | reached k) of the first mover (sequential_beliefs)."""
    if beliefs is None:
        return logit.stop_probs[0][NONE + 1, 0]
    game = logit.game
    stops = []
    for thinks, a in zip(np.asarray(beliefs.thinks), np.asarray(beliefs.level0_belief)):
        belief = a * uniform.win_continuation[1] + (1 - a) * logit.win_continuation[1]
        pay = payoff_of_win(game, win_chances(game, belief, NONE, 0))
        stops.append(logit_node_play(game, pay, float(thinks) * logit.precision)[0])
    return hazard_of_mixture(np.asarray(beliefs.weights, float), np.array(stops))


def later_mover_reference(
    logit: LogitSolution, beliefs: Beliefs | None, order: int, best: float, tied: int
) -> np.ndarray:
    """P(stop at k | reached k) of mover ``order`` (2, 3, ...) who saw best earlier bank
    ``best`` held by ``tied`` movers."""
    scores = logit.game.score_values
    b = int(np.argmin(np.abs(scores - best)))
    if abs(scores[b] - best) > 10 * TIE_RELATIVE * max(1.0, abs(best)):
        raise ValueError(f"bank {best} is not on the game's score grid")
    stop = logit.stop_probs[order - 1][b + 1, tied]
    if beliefs is None:
        return stop
    w0 = float(beliefs.later_level0)
    random = np.where(np.arange(stop.size) < stop.size - 1, 0.5, 1.0)
    return hazard_of_mixture(np.array([w0, 1 - w0]), np.stack([random, stop]))


def sequential_check(theta: Mapping[str, Any], data: Any, cap: int, part: SequentialPart) -> float:
    """The certificate of the module docstring (NaN without sequential conditions)."""
    games = part.games_for(data)
    seq = sequential_conditions(data)
    if not games or not seq.any():
        return float("nan")
    natural = {k: float(v) for k, v in theta.items()}
    beliefs = beliefs_for(part.concept, natural, part.options)
    likelihood = sequential_stop_probabilities(natural, data, cap, games, part.utility, beliefs)
    solutions: dict[tuple[float, ...], tuple[LogitSolution, LogitSolution]] = {}
    worst = 0.0
    for i in np.flatnonzero(seq):
        row = tuple(float(np.asarray(getattr(data, f))[i]) for f in GAME_FIELDS)
        if row not in solutions:
            solutions[row] = reference_solutions(row, cap, natural, part.utility)
        logit, uniform = solutions[row]
        order = round(float(np.asarray(data.cond_order)[i]))
        if order <= 1:
            reference = first_mover_reference(logit, uniform, beliefs)
        else:
            best = float(np.asarray(data.cond_seen_best)[i])
            tied = round(float(np.asarray(data.cond_seen_tied)[i]))
            reference = later_mover_reference(logit, beliefs, order, best, tied)
        worst = max(worst, float(np.max(np.abs(likelihood[i] - reference))))
    return worst
