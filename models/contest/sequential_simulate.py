"""Simulated sequential contests from a fitted (or chosen) contest model.

A design with an ``order`` column (1 moves first, ...) is played contest by contest (group x
trial): each mover in turn stops at bank level k with the model's probability P(stop at k |
reached k) in the state they see (sequential_certify: the numpy solutions of agent logit
play, and level-k / cognitive-hierarchy types mixed by hazard), draws succeed with
probability p_survive, and the state (best bank so far, movers tied at it) is updated from
their final bank. Rows carry ``rival_bank``: the best bank of the earlier movers that did not
bust (empty for the first mover or when all of them busted), as the data format asks.
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.game import Utility, default_max_target
from stopwise.models.contest.sequential import NONE
from stopwise.models.contest.sequential_beliefs import beliefs_for
from stopwise.models.contest.sequential_certify import (
    first_mover_reference,
    later_mover_reference,
    reference_solutions,
)
from stopwise.models.contest.sequential_likelihood import SEQUENTIAL_CONCEPTS

GAME_COLUMNS = ("p_survive", "gain", "start", "bust_keep", "n_players", "prize", "keep_bank")
DEFAULTS = (("start", 0.0), ("bust_keep", 0.0), ("n_players", 2), ("prize", 1.0), ("keep_bank", 0))


def play_one(stop: np.ndarray, p: float, rng: np.random.Generator) -> tuple[int, bool]:
    """(successful draws, busted) of one mover with stop probabilities stop[k]."""
    k = 0
    while True:
        if rng.random() < stop[k]:
            return k, False
        if rng.random() >= p:
            return k, True
        k += 1


def simulate_sequential_design(
    theta: Mapping[str, Any],
    design: pd.DataFrame,
    key: Any,
    concept: str,
    utility: Utility,
    options: Mapping[str, Any],
) -> pd.DataFrame:
    """Decision rows of the design's sequential contests (module docstring)."""
    if concept not in SEQUENTIAL_CONCEPTS:
        raise StopwiseInputError(
            f"sequential contests are simulated for the concepts {', '.join(SEQUENTIAL_CONCEPTS)}"
            f", not {concept}"
        )
    d = design.copy()
    for column, default in DEFAULTS:
        if column not in d:
            d[column] = default
    if "group" not in d:
        raise StopwiseInputError("a sequential contest design needs a 'group' column")
    natural = {k: float(v) for k, v in theta.items()}
    beliefs = beliefs_for(concept, natural, options)
    rng = np.random.default_rng(int(np.asarray(key).ravel()[-1]) % (2**32))
    solved: dict[tuple[float, ...], Any] = {}
    stops: dict[tuple[Any, ...], np.ndarray] = {}  # stop probabilities per mover and state
    rows: list[dict] = []
    records = d.assign(_contest=d.groupby(["group", "trial"], sort=False).ngroup())
    records = records.sort_values(["_contest", "order"], kind="stable").to_dict("records")
    for _, movers in itertools.groupby(records, key=lambda row: row.pop("_contest")):
        contest = list(movers)
        game_row = tuple(float(contest[0][c]) for c in GAME_COLUMNS)
        cap = int(options.get("max_target") or default_max_target(game_row[0]))
        if (game_row, cap) not in solved:
            solved[(game_row, cap)] = reference_solutions(game_row, cap, natural, utility)
        logit, uniform = solved[(game_row, cap)]
        game = logit.game
        best, tied, banked = NONE, 0, np.nan
        for trial in contest:
            order = int(trial["order"])
            state = (game_row, cap, order, best, tied)
            if state not in stops:
                stops[state] = (
                    first_mover_reference(logit, uniform, beliefs)
                    if order == 1
                    else later_mover_reference(
                        logit, beliefs, order, float(game.score_values[best]), tied
                    )
                )
            stop = stops[state]
            draws, busted = play_one(stop, game_row[0], rng)
            rows += decision_rows(trial, draws, busted, banked)
            index = int(game.bust_index[draws] if busted else game.reach_index[draws])
            if best == NONE or index > best:
                best, tied = index, 1
            elif index == best:
                tied += 1
            if not busted:
                bank = trial["start"] + draws * trial["gain"]
                banked = bank if np.isnan(banked) else max(banked, bank)
    return pd.DataFrame(rows)


def decision_rows(trial: dict, draws: int, busted: bool, rival: float) -> list[dict]:
    """One mover's rows: draws successes, then a stop or a bust."""
    base = {**trial, "task": "contest", "rival_bank": rival}
    out = [{**base, "step": s, "action": "draw", "outcome": "success"} for s in range(draws)]
    last = {"action": "draw", "outcome": "bust"} if busted else {"action": "stop", "outcome": ""}
    return [*out, {**base, "step": draws, **last}]
