"""Contest play for researchers: equilibria of stopping contests and incentive counterfactuals.

    equilibrium(p_survive, players, prize, ...) -> dict   (the keys of DESIGN.md, plus extras)
    counterfactual(fit_or_params, schemes) -> Counterfactual(table, plot_frame)

A contest: ``players`` each run their own stopping task privately at the same time; the top
final bank wins ``prize`` (ties broken by a fair random draw); with ``keep_bank`` everyone
also keeps their own bank. A stopping rule is a mixed choice of a target number of draws,
0..cap (``max_target``, default ``default_max_target``: the smallest M with p^M <= 1e-12,
beyond which every target is payoff-equivalent to M up to 1e-12 of the payoff range).
Every answer carries its certificate (stopwise.models.contest.certify); an answer that fails
it raises ``UncertifiedAnswer`` unless the caller passes ``allow_approximate=True``.

Predictions are research estimates for designing and analysing experiments, not a basis for
decisions about individual people.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import pandas as pd

from stopwise.contest_counterfactual import Counterfactual, counterfactual
from stopwise.contest_report import format_equilibrium
from stopwise.contest_solve import (
    CONCEPTS,
    EFFICIENCY_LOSS_DEFINITION,
    MAX_PLAYERS,
    concept_strategy,
    efficiency_loss,
    equilibrium,
)
from stopwise.incentives import design_incentives
from stopwise.models.contest.certify import DEFAULT_TOLERANCE, UncertifiedAnswer
from stopwise.models.contest.dominance import Elimination, contest_elimination
from stopwise.models.contest.game import (
    ContestGame,
    default_max_target,
    make_game,
    payoff_matrix,
    target_payoffs,
)
from stopwise.sweep import sweep_contests

__all__ = [
    "CONCEPTS",
    "DEFAULT_TOLERANCE",
    "EFFICIENCY_LOSS_DEFINITION",
    "MAX_PLAYERS",
    "ContestGame",
    "Counterfactual",
    "Elimination",
    "UncertifiedAnswer",
    "concept_strategy",
    "contest_elimination",
    "counterfactual",
    "default_max_target",
    "design_incentives",
    "efficiency_loss",
    "equilibrium",
    "format_equilibrium",
    "make_game",
    "payoff_matrix",
    "sweep",
    "target_payoffs",
]


def sweep(
    p_survive: float | Sequence[float],
    prize: float | Sequence[float],
    players: int = 2,
    **options: Any,
) -> pd.DataFrame:
    """Symmetric play over a grid of survival chances and prizes, each point warm-started
    from its neighbour and certified; points the warm start cannot certify are solved cold
    by ``equilibrium``. One row per setting (columns: stopwise.sweep)."""
    return sweep_contests(p_survive, prize, players, cold_solve=equilibrium, **options)
