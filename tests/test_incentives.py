"""Incentive design (issue 21): the search against brute-force enumeration, limits that
change the answer, uncertified candidates never chosen, Nash efficiency against the contest
solver, the delta method against the parametric bootstrap, and the command's bad inputs.

The fitted parameters below are invented for the tests (no data); every expected value is
computed independently here or by another part of stopwise / a closed form named beside it.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import stopwise  # (also enables float64 JAX)
from stopwise import cli
from stopwise.contest import counterfactual, design_incentives, equilibrium
from stopwise.incentives import (
    DesignProblem,
    best_per_setting,
    counterfactual_evaluator,
    search,
)
from stopwise.incentives_gradient import goal_of_prize, prize_derivative
from stopwise.models.spec import build_model

FIT = {
    "model": "crra+qre",
    "params": {"r": 0.3, "precision": 2.0},
    "max_target": 8,
    "se": {"r": 0.05, "precision": 0.3},
}
PRIZES = (1.0, 4.0, 7.0, 10.0)
SETTINGS = [(n, s) for n in (2, 3) for s in ("winner", "keep")]


def brute_force(max_bust: float | None, budget: float | None) -> pd.Series:
    """Best (players, scheme, prize) for goal efficiency by one counterfactual call over the
    whole grid, filtered and ranked with pandas (independent of stopwise.incentives)."""
    schemes = [
        {"players": n, "prize": x, "keep_bank": s == "keep", "p_survive": 0.8, "name": f"{n}{s}{x}"}
        for n, s in SETTINGS
        for x in PRIZES
    ]
    table = counterfactual(FIT, schemes, allow_approximate=True).table
    model = table[table["prediction"] != "nash"].copy()
    model["total_bank"] = model["players"] * model["expected_bank"]
    ok = model["certified"]
    if max_bust is not None:
        ok &= model["bust_rate"] <= max_bust
    if budget is not None:
        ok &= model["prize_outlay"] <= budget
    return model[ok].sort_values("total_bank", ascending=False).iloc[0]


@pytest.mark.parametrize(
    ("max_bust", "budget"),
    [  # the case where both limits bind stays in the fast suite
        pytest.param(None, None, marks=pytest.mark.slow),
        pytest.param(None, 9.0, marks=pytest.mark.slow),
        (0.56, 12.0),
    ],
)
def test_search_on_a_small_grid_equals_brute_force_enumeration(max_bust, budget):
    result = design_incentives(
        FIT,
        "efficiency",
        (1.0, 10.0),
        players=(2, 3),
        schemes=("winner", "keep"),
        max_bust=max_bust,
        budget=budget,
        grid_points=4,
        refine_steps=0,
    )
    truth = brute_force(max_bust, budget)
    choice = result.choice
    assert (choice["players"], choice["prize"]) == (truth["players"], truth["prize"])
    assert choice["scheme"] == ("keep" if truth["keep_bank"] else "winner")
    assert choice["model"]["goal_value"] == pytest.approx(
        truth["players"] * truth["expected_bank"], rel=1e-12
    )


def test_the_limits_change_the_answer_on_that_grid():
    # guards the case where the filter matters: without limits keep wins (bank + prize
    # pays for a large total bank); a budget below keep's outlay moves the choice
    free, limited = brute_force(None, None), brute_force(None, 9.0)
    assert (free["players"], free["keep_bank"], free["prize"]) != (
        limited["players"],
        limited["keep_bank"],
        limited["prize"],
    )


@pytest.mark.slow
def test_refinement_is_never_worse_than_the_grid_and_stays_admissible():
    kwargs = dict(players=(2,), schemes=("keep",), max_bust=0.56, grid_points=4)
    grid = design_incentives(FIT, "bust", (1.0, 10.0), refine_steps=0, **kwargs)
    fine = design_incentives(FIT, "bust", (1.0, 10.0), refine_steps=8, **kwargs)
    assert fine.choice["model"]["goal_value"] <= grid.choice["model"]["goal_value"]
    assert fine.choice["model"]["bust_rate"] <= 0.56 and fine.choice["model"]["certified"]


def test_an_uncertified_candidate_is_never_chosen():
    problem = DesignProblem(
        "efficiency", (1.0, 10.0), (2,), ("winner", "keep"), (0.8,), grid_points=4, refine_steps=0
    )
    real = counterfactual_evaluator(FIT)
    honest = best_per_setting(search(problem, real).query("prediction == 'model'")).iloc[0]
    winner = (int(honest["players"]), honest["scheme"], float(honest["prize"]))

    def failing_at_the_winner(players, scheme, prize, p):
        pair = real(players, scheme, prize, p)
        if (players, scheme, prize) == winner:  # its certificate fails: must not be chosen
            return {**pair, "model": {**pair["model"], "certified": False}}
        return pair

    frame = search(problem, failing_at_the_winner)
    chosen = best_per_setting(frame.query("prediction == 'model'")).iloc[0]
    assert (int(chosen["players"]), chosen["scheme"], float(chosen["prize"])) != winner
    assert chosen["certified"]
    assert chosen["score"] <= honest["score"]


@pytest.mark.parametrize("scheme", ["winner", pytest.param("keep", marks=pytest.mark.slow)])
def test_nash_efficiency_of_each_scheme_equals_the_contest_solver(scheme):
    fit = {"model": "linear+qre", "params": {"precision": 1.0}, "max_target": 8}
    result = design_incentives(
        fit,
        "efficiency",
        (2.0, 8.0),
        players=(2, 3),
        schemes=(scheme,),
        grid_points=3,
        refine_steps=0,
    )
    nash = result.candidates.query("prediction == 'nash'")
    for _, row in nash.iterrows():
        solved = equilibrium(
            p_survive=0.8,
            players=int(row["players"]),
            prize=row["prize"],
            keep_bank=scheme == "keep",
            concept="nash",
            max_target=8,
        )
        assert row["goal_value"] == pytest.approx(
            row["players"] * solved["expected_bank"], rel=1e-9, abs=1e-12
        )


def test_keep_scheme_with_a_tiny_prize_reaches_the_solo_risk_neutral_bank():
    # closed form: alone, a risk-neutral player maximises t p^t; at p = 0.8 targets 4 and 5
    # tie at 4 x 0.8^4 = 1.6384 (calculus, common practice, no source). With keep-bank and a
    # vanishing prize, Nash play approaches it.
    fit = {"model": "linear+qre", "params": {"precision": 1.0}, "max_target": 8}
    result = design_incentives(
        fit,
        "efficiency",
        (1e-6, 1e-6),
        players=(2,),
        schemes=("keep",),
        grid_points=2,
        refine_steps=0,
    )
    assert result.choice["nash"]["expected_bank"] == pytest.approx(4 * 0.8**4, abs=1e-5)


def test_delta_method_agrees_with_the_parametric_bootstrap():
    result = design_incentives(
        FIT,
        "bust",
        (4.0, 4.0),
        players=(2,),
        schemes=("winner",),
        grid_points=2,
        refine_steps=0,
        bootstrap_draws=40,
        seed=3,
    )
    delta = result.choice["delta_method"]["se"]
    boot = result.choice["bootstrap"]
    assert boot["used"] >= 35
    assert 0.6 <= boot["sd"] / delta <= 1.6  # linearisation vs simulation, same covariance
    low, high = boot["band_95"]
    assert low < result.choice["model"]["goal_value"] < high


def _fit_file(tmp_path: Path) -> Path:
    record = {
        "model": "crra+qre",
        "method": "mle",
        "params": [
            {"name": "r", "estimate": 0.3, "se": 0.05},
            {"name": "precision", "estimate": 2.0, "se": 0.3},
        ],
        "spec": {"options": {"max_target": 8}},
    }
    path = tmp_path / "fit.json"
    path.write_text(json.dumps(record))
    return path


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--prize", "5:1"], "prize range"),
        (["--prize", "1:x"], "LO:HI"),
        (["--prize", "1:5", "--players", "1"], "players"),
        (["--prize", "1:5", "--scheme", "lottery"], "unknown scheme"),
        (["--prize", "1:5", "--max-bust", "1.5"], "max bust"),
        (["--prize", "1:5", "--goal", "outlay"], "max bust"),
        (["--prize", "1:5", "--figure", "FIG.svg"], ".png"),
    ],
)
def test_bad_inputs_exit_2_and_write_nothing(tmp_path, capsys, extra, message):
    fit = _fit_file(tmp_path)
    before = fit.read_bytes()
    out = tmp_path / "out.json"
    argv = ["incentives", str(fit), "--goal", "efficiency", "--json", str(out), *extra]
    argv = [tmp_path.joinpath(a[4:]).as_posix() if a.startswith("FIG.") else a for a in argv]
    assert cli.main(argv) == 2
    assert message in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fit.json"]
    assert fit.read_bytes() == before


def test_bad_fit_files_exit_2(tmp_path, capsys):
    missing = tmp_path / "none.json"
    assert cli.main(["incentives", str(missing), "--goal", "bust", "--prize", "1:5"]) == 2
    assert "none.json" in capsys.readouterr().err
    fit = _fit_file(tmp_path)
    argv = ["incentives", str(fit), "--goal", "bust", "--prize", "1:5", "--json", str(fit)]
    assert cli.main(argv) == 2
    assert "fit.json" in capsys.readouterr().err


def test_command_writes_json_and_a_png_figure(tmp_path, capsys):
    fit = _fit_file(tmp_path)
    out, fig = tmp_path / "design.json", tmp_path / "design.png"
    argv = [
        "incentives",
        str(fit),
        "--goal",
        "efficiency",
        "--prize",
        "1:9",
        "--players",
        "2",
        "--scheme",
        "winner,keep",
        "--budget",
        "9",
        "--grid",
        "3",
        "--refine",
        "2",
        "--json",
        str(out),
        "--figure",
        str(fig),
    ]
    assert cli.main(argv) == 0
    printed = capsys.readouterr().out
    record = json.loads(out.read_text())
    assert record["certified"] and record["choice"]["model"]["certified"]
    assert record["choice"]["model"]["prize_outlay"] <= 9.0
    assert {"nash", "model"} <= set(record["choice"]) and record["runners_up"]
    assert math.isfinite(record["choice"]["delta_method"]["se"])
    assert record["choice"]["prize_derivative"]["relative_gap"] <= 1e-6
    assert "chosen" in printed and "runner-up" in printed
    assert fig.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert np.all(
        [
            c["certified"]
            for c in record["candidates"]
            if c["prediction"] == "model" and c["admissible"]
        ]
    )


@pytest.mark.slow
def test_bootstrap_bands_cover_the_true_predictions_in_a_simulation(tmp_path):
    # known truth (invented parameters): simulate a pilot, fit it, design, then compare the
    # bands at the chosen design with the true parameters' predictions there
    truth = {"r": 0.25, "precision": 2.5}
    n, rounds = 16, 10
    design = pd.DataFrame(
        {
            "subject": np.repeat([f"s{i + 1:02d}" for i in range(n)], rounds),
            "trial": np.tile(np.arange(1, rounds + 1), n),
            "p_survive": 0.85,
            "gain": 1.0,
            "n_players": 2,
            "prize": 6.0,
            "keep_bank": np.tile(np.arange(rounds) % 2, n),
        }
    )
    data = stopwise.simulate(stopwise.model("crra+qre", max_target=12), truth, design, seed=7)
    data.to_csv(tmp_path / "pilot.csv", index=False)
    fit_json = tmp_path / "fit.json"
    argv = ["fit", str(tmp_path / "pilot.csv"), "--model", "crra+qre", "--max-target", "12"]
    assert cli.main([*argv, "--json", str(fit_json)]) == 0
    result = design_incentives(
        stopwise.load_result(fit_json),
        "efficiency",
        (1.0, 10.0),
        players=(2,),
        schemes=("winner", "keep"),
        p_survive=(0.85,),
        grid_points=4,
        refine_steps=3,
        bootstrap_draws=60,
        seed=1,
    )
    choice = result.choice
    true_row = counterfactual(
        {"model": "crra+qre", "params": truth, "max_target": 12},
        [
            {
                "players": 2,
                "prize": choice["prize"],
                "keep_bank": choice["scheme"] == "keep",
                "p_survive": 0.85,
            }
        ],
    ).table.iloc[1]
    bands = choice["bootstrap"]["by_quantity"]
    low, high = bands["bust_rate"]["band_95"]
    assert low <= true_row["bust_rate"] <= high
    low, high = bands["total_bank"]["band_95"]
    assert low <= 2 * true_row["expected_bank"] <= high


DERIVATIVE_THETAS = {
    "crra+qre": {"r": 0.3, "precision": 2.0},
    "crra+levelk": {"r": 0.5, "precision": 2.0, "level": 0.5},
    "crra+ch": {"r": 0.5, "precision": 2.0, "tau": 1.5},
}
# the fast suite: every concept, goal and scheme twice or more; the other 12 are slow
FAST_DERIVATIVE_CASES = {
    ("crra+qre", "efficiency", False),
    ("crra+qre", "bust", True),
    ("crra+levelk", "bust", False),
    ("crra+levelk", "risk", True),
    ("crra+ch", "risk", False),
    ("crra+ch", "efficiency", True),
}


@pytest.mark.parametrize(
    ("spec", "theta", "goal", "keep"),
    [
        pytest.param(
            spec,
            theta,
            goal,
            keep,
            id=f"{keep}-{goal}-{spec}",
            marks=() if (spec, goal, keep) in FAST_DERIVATIVE_CASES else pytest.mark.slow,
        )
        for spec, theta in DERIVATIVE_THETAS.items()
        for goal in ("efficiency", "bust", "risk")
        for keep in (False, True)
    ],
)
def test_prize_derivative_matches_central_differences(spec, theta, goal, keep):
    # the bar: 1e-6 relative; the JAX goal must also equal counterfactual's value
    model = build_model(spec, max_target=8)
    design = (2, keep, 0.8, 8)
    slope = prize_derivative(model, theta, goal, design, 5.0, target_risk=3.0)
    assert slope["relative_gap"] <= 1e-6
    assert abs(slope["derivative"]) > 1e-5  # not a flat spot where any answer would pass
    # and against central differences taken here, through goal_of_prize (a separate path
    # from the compiled slopes program the derivative and its own check come from)
    goal_at, h = goal_of_prize(model, theta, goal, design, 3.0), 5e-5
    central = (float(goal_at(5.0 + h)) - float(goal_at(5.0 - h))) / (2 * h)
    assert slope["derivative"] == pytest.approx(central, rel=1e-6)
    row = counterfactual(
        {"model": model, "params": theta, "max_target": 8},
        [{"players": 2, "prize": 5.0, "keep_bank": keep, "p_survive": 0.8}],
    ).table.iloc[1]
    value = float(goal_of_prize(model, theta, goal, design, 3.0)(5.0))
    expected = {
        "efficiency": 2 * row["expected_bank"],
        "bust": row["bust_rate"],
        "risk": (row["mean_target"] - 3.0) ** 2,
    }[goal]
    assert value == pytest.approx(expected, rel=1e-9)


def test_limits_no_design_meets_exit_1_and_write_nothing(tmp_path, capsys):
    fit = _fit_file(tmp_path)
    argv = [
        "incentives",
        str(fit),
        "--goal",
        "outlay",
        "--max-bust",
        "0.05",
        "--prize",
        "1:5",
        "--grid",
        "2",
        "--refine",
        "0",
        "--json",
        str(tmp_path / "out.json"),
    ]
    assert cli.main(argv) == 1
    assert "no candidate design" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["fit.json"]
