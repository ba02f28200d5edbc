"""Certificate of the sequential-contest likelihood: its stop probabilities recomputed by an
independent solver.

The likelihood (stopwise.models.contest.sequential_likelihood) works in JAX over outcome
slots; stopwise.models.contest.sequential_qre solves the same agent logit play in numpy over
merged score levels, state by state. For every sequential condition of the data, the check
takes the mover of that condition in the state it saw and compares P(stop at k), k = 0..cap:

    check = max over conditions and k of |P_likelihood(stop at k) - P_solver(stop at k)|.

A fit whose check exceeds stopwise.fit_checks.SEQUENTIAL_CHECK_TOLERANCE is not certified.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from stopwise.models.contest.game import Utility
from stopwise.models.contest.sequential import NONE, TIE_RELATIVE, make_sequential_game
from stopwise.models.contest.sequential_likelihood import (
    GAME_FIELDS,
    sequential_conditions,
    sequential_stop_probabilities,
)
from stopwise.models.contest.sequential_qre import LogitSolution, solve_sequential_logit


def reference_solution(
    game_row: tuple[float, ...], cap: int, theta: Mapping[str, float], utility: Utility
) -> LogitSolution:
    """The numpy agent logit solution of one game (p, gain, start, bust_keep, players,
    prize, keep_bank) with utility u(x) = utility(x, theta)."""
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
    return solve_sequential_logit(game, float(theta["precision"]))


def reference_stop_probabilities(
    solution: LogitSolution, order: int, best: float, tied: int
) -> np.ndarray:
    """P(stop at k) of mover ``order`` (1-based) who saw best earlier bank ``best`` held by
    ``tied`` movers (ignored for the first mover)."""
    if order <= 1:
        return solution.stop_probs[0][NONE + 1, 0]
    scores = solution.game.score_values
    b = int(np.argmin(np.abs(scores - best)))
    if abs(scores[b] - best) > TIE_RELATIVE * max(1.0, abs(best)) * 10:
        raise ValueError(f"bank {best} is not on the game's score grid")
    return solution.stop_probs[order - 1][b + 1, int(tied)]


def sequential_check(
    theta: Mapping[str, Any],
    data: Any,
    cap: int,
    games: tuple[tuple[float, ...], ...],
    utility: Utility,
) -> float:
    """The certificate of the module docstring (NaN without sequential conditions)."""
    seq = sequential_conditions(data)
    if not games or not seq.any():
        return float("nan")
    natural = {k: float(v) for k, v in theta.items()}
    likelihood = sequential_stop_probabilities(natural, data, cap, games, utility)
    solutions: dict[tuple[float, ...], LogitSolution] = {}
    worst = 0.0
    for i in np.flatnonzero(seq):
        row = tuple(float(np.asarray(getattr(data, f))[i]) for f in GAME_FIELDS)
        if row not in solutions:
            solutions[row] = reference_solution(row, cap, natural, utility)
        reference = reference_stop_probabilities(
            solutions[row],
            round(float(np.asarray(data.cond_order)[i])),
            float(np.asarray(data.cond_seen_best)[i]),
            round(float(np.asarray(data.cond_seen_tied)[i])),
        )
        worst = max(worst, float(np.max(np.abs(likelihood[i] - reference))))
    return worst
