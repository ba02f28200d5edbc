"""Counterfactuals that switch a contest scheme to sequential play.

Outside check: a Monte Carlo of 200,000 simulated contests (the trial-level simulator's own
vectorised play, stopwise.contest_sequential_sim) against the forward pass's expected banks
and win probabilities, within 4 standard errors (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pytest

from stopwise.contest import counterfactual
from stopwise.contest_counterfactual_sequential import model_play
from stopwise.contest_sequential import sequential_equilibrium
from stopwise.contest_sequential_sim import simulate_sequential
from stopwise.models.contest.sequential import make_sequential_game
from stopwise.models.contest.sequential_qre import logit_mover_summaries, solve_sequential_logit
from stopwise.models.spec import build_model

SCHEME = {"p_survive": 0.8, "players": 2, "prize": 10.0, "keep_bank": True, "max_target": 15}


def setting(**extra):
    return {
        "name": "s", "p_survive": 0.8, "players": 2, "prize": 10.0, "keep_bank": 1.0,
        "gain": 1.0, "start": 0.0, "bust_keep": 0.0, "cap": 30, "cap_source": "scheme", **extra,
    }  # fmt: skip


def test_forward_pass_matches_the_logit_solvers_own_summaries():
    model = build_model("linear+qre", max_target=30)
    movers, gap, _ = model_play(model, {"precision": 1.2}, setting())
    game = make_sequential_game(0.8, 2, 10.0, True, 30)
    reference = logit_mover_summaries(solve_sequential_logit(game, 1.2))
    assert gap <= 1e-12
    for ours, theirs in zip(movers, reference):
        for key in ("expected_bank", "win_prob", "bust_rate"):
            assert ours[key] == pytest.approx(theirs[key], abs=1e-12)


def test_forward_pass_matches_monte_carlo():
    model = build_model("linear+qre", max_target=30)
    movers, _, _ = model_play(model, {"precision": 1.2}, setting())
    frame = simulate_sequential(
        0.8, 2, 10.0, groups=200_000, trials=1, keep_bank=True, precision=1.2, max_target=30,
        seed=5,
    )  # fmt: skip
    for order, mover in enumerate(movers, start=1):
        rows = frame[frame["order"] == order]
        banks = np.where(rows["busted"] == 1, 0.0, rows["draws"])
        se = banks.std() / np.sqrt(len(banks))
        assert abs(banks.mean() - mover["expected_bank"]) <= 4 * se


def test_counterfactual_rows_for_a_sequential_scheme_are_certified():
    fit = {"model": "crra+levelk", "params": {"r": 0.3, "precision": 1.5, "level": 1.5}}
    table = counterfactual(fit, [SCHEME, {**SCHEME, "sequential": True, "name": "in turn"}]).table
    seq = table[table["scheme"] == "in turn"]
    assert list(seq["prediction"]) == ["subgame-perfect", "crra+levelk (sequential)"]
    assert seq["certified"].all()
    exact = sequential_equilibrium(0.8, 2, 10.0, keep_bank=True, max_target=15, r=0.3)
    first = seq.iloc[0]
    assert first["by_mover"][0]["expected_bank"] == pytest.approx(
        exact["movers"][0]["expected_bank"], abs=1e-12
    )
    assert sum(m["win_prob"] for m in seq.iloc[1]["by_mover"]) == pytest.approx(1.0, abs=1e-10)
    # the switch matters: sequential play differs from the simultaneous prediction
    simultaneous = table[(table["scheme"] != "in turn") & (table["prediction"] != "nash")]
    assert abs(float(simultaneous["expected_bank"].iloc[0]) - seq.iloc[1]["expected_bank"]) > 1e-3
