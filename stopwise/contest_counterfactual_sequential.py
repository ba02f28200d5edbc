"""Counterfactual rows for a scheme switched to sequential play (``"sequential": True``).

Two predictions per scheme, each certified: the subgame-perfect solution with the model's
utility (stopwise.contest_sequential.sequential_equilibrium; certificate: the largest regret
of any mover in any state as a share of the payoff range) and the model's own sequential
play (agent logit, or level-k / CH types: models/contest/sequential_certify), whose
per-mover outcomes come from a forward pass over the states:

    P(reach k) = alive_k h_k,   P(bust after k) = alive_k (1 - h_k)(1 - p),
    alive_{k+1} = alive_k (1 - h_k) p,   h_k = P(stop at k | reached k) in the state seen,

and mover j's win probability sums P(final state (b, c), j among the c leaders) / c
(check: every mover's outcome probabilities sum to 1 and the win probabilities sum to 1).
Table columns are those of the simultaneous rows, averaged over movers where a column is
per player; ``by_mover`` lists each mover's expected bank, win probability and bust rate.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from stopwise.contest_sequential import sequential_equilibrium
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.base import Model
from stopwise.models.contest.certify import DEFAULT_TOLERANCE
from stopwise.models.contest.game import resolve_utility
from stopwise.models.contest.sequential import NONE, SequentialGame, outcome_matrix
from stopwise.models.contest.sequential_beliefs import Beliefs, beliefs_for
from stopwise.models.contest.sequential_certify import (
    first_mover_reference,
    later_mover_reference,
    reference_solutions,
)
from stopwise.models.contest.sequential_likelihood import SEQUENTIAL_CONCEPTS


def score_distribution(game: SequentialGame, hazard: np.ndarray) -> tuple[np.ndarray, float]:
    """(P(final score index), P(bust)) of a mover with stop hazards h_k (module docstring)."""
    p, dist, alive, bust = game.p_survive, np.zeros(game.score_values.size), 1.0, 0.0
    for k in range(game.cap + 1):
        dist[game.reach_index[k]] += alive * hazard[k]
        if k < game.cap:
            busting = alive * (1 - hazard[k]) * (1 - p)
            dist[game.bust_index[k]] += busting
            bust += busting
            alive *= (1 - hazard[k]) * p
    return dist, bust


def next_state(b: int, c: int, x: int, lead: bool, moving: bool) -> tuple[int, int, bool]:
    """State after a mover ends at score x; lead: the tracked mover is among the leaders."""
    if b == NONE or x > b:
        return x, 1, moving
    if x == b:
        return b, c + 1, lead or moving
    return b, c, lead


def forward_summaries(game: SequentialGame, hazard_of: Any) -> tuple[list[dict[str, float]], float]:
    """Per mover expected bank, bust rate and win probability, and the largest deviation of
    any outcome distribution's total from 1; hazard_of(order, b, c) -> h over k."""
    cache: dict[tuple[int, int, int], tuple[np.ndarray, float]] = {}

    def dist(order: int, b: int, c: int) -> tuple[np.ndarray, float]:
        if (order, b, c) not in cache:
            cache[(order, b, c)] = score_distribution(game, hazard_of(order, b, c))
        return cache[(order, b, c)]

    movers, gap = [], 0.0
    for tracked in range(game.players):
        states = {(NONE, 0, False): 1.0}
        bank = bust = 0.0
        for j in range(game.players):
            nxt: dict[tuple[int, int, bool], float] = {}
            for (b, c, lead), prob in states.items():
                d, busting = dist(j + 1, b, c)
                gap = max(gap, abs(float(d.sum()) - 1.0))
                if j == tracked:
                    bank += prob * float(d @ game.score_values)
                    bust += prob * busting
                for x in np.flatnonzero(d > 0):
                    key = next_state(b, c, int(x), lead, j == tracked)
                    nxt[key] = nxt.get(key, 0.0) + prob * float(d[x])
            states = nxt
        win = sum(prob / c for (b, c, lead), prob in states.items() if lead)
        movers.append({"expected_bank": bank, "win_prob": win, "bust_rate": bust})
    return movers, gap


def model_play(
    model: Model, theta: Mapping[str, float], setting: Mapping[str, Any]
) -> tuple[list[dict[str, float]], float, SequentialGame]:
    """The model's sequential play in one scheme: per-mover summaries and the check."""
    concept = model.options["concept"]
    if concept not in SEQUENTIAL_CONCEPTS or "tremble" in theta:
        raise StopwiseInputError(
            f"sequential counterfactuals need one of {', '.join(SEQUENTIAL_CONCEPTS)} "
            f"without tremble, not {model.name}"
        )
    utility = resolve_utility(model.options.get("utility", "linear"))
    row = tuple(
        float(setting[k])
        for k in ("p_survive", "gain", "start", "bust_keep", "players", "prize", "keep_bank")
    )
    logit, uniform = reference_solutions(row, setting["cap"], theta, utility)
    beliefs: Beliefs | None = beliefs_for(concept, theta, model.options)
    game = logit.game

    def hazard_of(order: int, b: int, c: int) -> np.ndarray:
        if order == 1:
            return first_mover_reference(logit, uniform, beliefs)
        return later_mover_reference(logit, beliefs, order, float(game.score_values[b]), c)

    movers, gap = forward_summaries(game, hazard_of)
    return movers, max(gap, abs(sum(m["win_prob"] for m in movers) - 1.0)), game


def sequential_rows(
    model: Model,
    theta: Mapping[str, float],
    setting: Mapping[str, Any],
    tolerance: float = DEFAULT_TOLERANCE,
) -> list[dict[str, Any]]:
    """The two certified rows (subgame-perfect, model) of a scheme played in sequence."""
    utility_name = model.options.get("utility", "linear")
    if utility_name not in ("linear", "crra"):
        raise StopwiseInputError(
            f"sequential counterfactuals take linear or crra utility, not {utility_name}"
        )
    exact = sequential_equilibrium(
        setting["p_survive"],
        int(setting["players"]),
        setting["prize"],
        keep_bank=bool(setting["keep_bank"]),
        gain=setting["gain"],
        max_target=setting["cap"],
        start=setting["start"],
        bust_keep=setting["bust_keep"],
        tolerance=tolerance,
        compare=False,
        r=theta.get("r") if utility_name == "crra" else None,
    )
    movers, gap, game = model_play(model, theta, setting)
    solo = float(np.max(outcome_matrix(game) @ game.score_values))
    rows = [
        _row(setting, "subgame-perfect", exact["movers"], exact["efficiency_loss"]),
        _row(setting, f"{model.name} (sequential)", movers, _loss(movers, setting, solo)),
    ]
    rows[0].update(
        max_regret=exact["max_regret_share"], check="regret", certified=exact["certified"]
    )
    rows[1].update(max_regret=float("nan"), check="sums", certified=bool(gap <= tolerance))
    return rows


def _loss(movers: list[dict[str, float]], setting: Mapping[str, Any], solo: float) -> float:
    """1 - total expected bank / (players x the best expected bank of a single player)."""
    return 1.0 - sum(m["expected_bank"] for m in movers) / (setting["players"] * solo)


def _row(
    setting: Mapping[str, Any], label: str, movers: list[dict[str, float]], loss: float
) -> dict[str, Any]:
    mean = {k: float(np.mean([m[k] for m in movers])) for k in movers[0]}
    return {
        "scheme": setting["name"],
        "prediction": label,
        "players": setting["players"],
        "prize": setting["prize"],
        "keep_bank": bool(setting["keep_bank"]),
        "p_survive": setting["p_survive"],
        "cap": setting["cap"],
        "cap_source": setting["cap_source"],
        "mean_target": float("nan"),  # targets depend on what each mover saw
        "bust_rate": mean["bust_rate"],
        "expected_bank": mean["expected_bank"],
        "efficiency_loss": loss,
        "win_prob": mean["win_prob"],
        "prize_outlay": setting["prize"]
        + setting["keep_bank"] * sum(m["expected_bank"] for m in movers),
        "sequential": True,
        "by_mover": [{k: float(v) for k, v in m.items()} for m in movers],
    }
