"""Simulating sequential contests from contest models (``stopwise simulate --sequential``).

Outside check: a Monte Carlo of many simulated contests against the likelihood's own stop
probabilities, within 4 standard errors of a binomial share (common practice, no source).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise import cli
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.game import resolve_utility
from stopwise.models.contest.sequential_beliefs import beliefs_for
from stopwise.models.contest.sequential_likelihood import read_games, sequential_stop_probabilities
from stopwise.models.spec import build_model

THETA = {"r": 0.2, "precision": 1.5, "level": 1.5}
CAP = 12


def simulated(groups: int, seed: int) -> pd.DataFrame:
    model = build_model("crra+levelk", max_target=CAP)
    design = pd.DataFrame(
        {
            "subject": [f"g{g}p{j}" for g in range(groups) for j in (1, 2)],
            "trial": 1,
            "p_survive": 0.75,
            "gain": 1.0,
            "group": [f"g{g}" for g in range(groups) for _ in (1, 2)],
            "n_players": 2,
            "prize": 4.0,
            "keep_bank": 1,
            "order": [j for _ in range(groups) for j in (1, 2)],
        }
    )
    return stopwise.simulate(model, THETA, design, seed=seed)


def test_first_mover_stop_shares_match_the_model_by_monte_carlo():
    frame = simulated(4000, seed=11)
    data = stopwise.load(frame).arrays()
    games = read_games(data, "levelk", False)
    beliefs = beliefs_for("levelk", THETA, {})
    probs = sequential_stop_probabilities(THETA, data, CAP, games, resolve_utility("crra"), beliefs)
    first_cond = int(np.flatnonzero(np.asarray(data.cond_order) == 1)[0])
    rows = frame[frame["order"] == 1]
    for step in range(3):
        at = rows[rows["step"] == step]
        share = float((at["action"] == "stop").mean())
        p = probs[first_cond, step]
        se = np.sqrt(p * (1 - p) / len(at))
        assert abs(share - p) <= 4 * se, (step, share, p, se)


def test_simulated_rival_banks_pass_validation():
    frame = simulated(50, seed=2)
    report = stopwise.validate(frame)
    assert report.ok, report.summary()
    later = frame[frame["order"] == 2].drop_duplicates(["subject", "trial"])
    assert later["rival_bank"].notna().any()


def test_cli_simulate_sequential_writes_valid_data(tmp_path):
    out = tmp_path / "seq.csv"
    args = ["simulate", "--model", "crra+qre", "--set", "r=0.2", "--set", "precision=1.5"]
    args += ["--players", "3", "--prize", "5", "--keep-bank", "--subjects", "6", "--trials", "4"]
    args += ["--p-survive", "0.8", "--max-target", "15", "--sequential", "--out", str(out)]
    assert cli.main(args) == 0
    frame = pd.read_csv(out)
    assert set(frame["order"]) == {1, 2, 3}
    assert stopwise.validate(str(out)).ok


def test_cli_simulate_sequential_refuses_solo_models(tmp_path):
    out = tmp_path / "solo.csv"
    args = ["simulate", "--model", "crra+myopic+logit", "--sequential", "--out", str(out)]
    assert cli.main(args) == 2
    assert not out.exists()


def test_nash_sequential_simulation_is_refused():
    model = build_model("crra+nash", max_target=CAP)
    design = pd.DataFrame(
        {"subject": ["a", "b"], "trial": 1, "p_survive": 0.75, "gain": 1.0, "group": "g",
         "n_players": 2, "prize": 4.0, "keep_bank": 1, "order": [1, 2]}
    )  # fmt: skip
    with pytest.raises(StopwiseInputError, match="sequential contests are simulated"):
        stopwise.simulate(model, {"r": 0.2, "tremble": 0.05}, design, seed=1)
