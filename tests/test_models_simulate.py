"""Simulators: frequencies against model probabilities, valid output, the simulate command."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from designs import holt_laury_columns
from scipy import stats

import stopwise
from stopwise.cli import main as cli_main
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.spec import build_model


def stopping_design(n_trials: int, p_values=(0.7, 0.9), **extra) -> pd.DataFrame:
    trial = np.arange(n_trials)
    return pd.DataFrame(
        {
            "subject": 1,
            "trial": trial,
            "p_survive": np.asarray(p_values)[trial % len(p_values)],
            "gain": 1.0,
            **extra,
        }
    )


def _pooled_chisquare(observed: np.ndarray, expected: np.ndarray) -> float:
    """Pearson chi-square p-value after pooling the sparse tail into one cell (expected >= 5)."""
    keep = expected >= 5
    obs = np.append(observed[keep], observed[~keep].sum())
    exp = np.append(expected[keep], expected[~keep].sum())
    if exp[-1] < 5:  # fold a small pooled cell into the last kept one
        obs, exp = np.append(obs[:-2], obs[-2:].sum()), np.append(exp[:-2], exp[-2:].sum())
    exp = exp * obs.sum() / exp.sum()
    return float(stats.chisquare(obs, exp).pvalue)  # scipy.stats Pearson test


@pytest.mark.parametrize(
    ("spec", "theta"),
    [
        ("crra+planner+logit", {"r": 0.4, "precision": 3.0}),
        (
            "pt+prelec+target+logit+tremble",
            {
                "alpha": 0.8,
                "beta": 0.9,
                "loss_aversion": 2.0,
                "gamma": 0.7,
                "precision": 4.0,
                "tremble": 0.1,
            },
        ),
    ],
)
def test_simulated_draw_frequencies_match_model_probabilities(spec, theta):
    # Each decision at step s of condition c is a Bernoulli(P(draw | c, s)) draw, so the counts
    # of draws among the decisions taken at (c, s) follow the model; chi-square at a fixed seed.
    model = build_model(spec)
    sim = stopwise.simulate(model, theta, stopping_design(6000, start=1.0), seed=12)
    data = stopwise.load(sim).arrays()
    prob = np.asarray(model.predict(theta, data))
    draw = np.asarray(data.draw)
    cell = np.asarray(data.cond) * data.horizon + np.asarray(data.step)
    for_cells = pd.DataFrame({"cell": cell, "draw": draw, "prob": prob}).groupby("cell")
    counts = for_cells.agg(n=("draw", "size"), draws=("draw", "sum"), prob=("prob", "first"))
    counts = counts[counts.n >= 30]
    z = (counts.draws - counts.n * counts.prob) / np.sqrt(
        counts.n * counts.prob * (1 - counts.prob)
    )
    statistic = float(np.sum(z**2))
    p_value = float(stats.chi2.sf(statistic, df=len(counts)))  # scipy.stats chi-square
    assert len(counts) >= 6
    assert p_value > 1e-3, (spec, statistic, len(counts))


def test_simulated_trial_lengths_match_the_end_distribution():
    model = build_model("linear+myopic+probit")
    theta = {"sigma": 0.5}
    sim = stopwise.simulate(model, theta, stopping_design(4000, p_values=(0.8,)), seed=5)
    last = sim.groupby("trial").tail(1)
    # closed form for the myopic rule at p = .8, g = 1, start 0: P(draw | b) = Phi((.8 - .2 b - b)/sigma)
    # (expected value of one more draw minus the bank), then survive with chance .8.
    banks = np.arange(40.0)
    p_draw = stats.norm.cdf((0.8 * (banks + 1) - banks) / 0.5)
    reach = np.concatenate([[1.0], np.cumprod(p_draw * 0.8)])[:-1]
    expected_stop = reach * (1 - p_draw)
    expected_bust = reach * p_draw * 0.2
    observed_stop = np.bincount(last.step[last.action == "stop"], minlength=40)[:40]
    observed_bust = np.bincount(last.step[last.outcome == "bust"], minlength=40)[:40]
    observed = np.concatenate([observed_stop, observed_bust])
    expected = 4000 * np.concatenate([expected_stop, expected_bust])
    assert _pooled_chisquare(observed, expected) > 1e-3


def test_lottery_simulation_frequencies_and_validity():
    model = build_model("crra+logit")
    theta = {"r": 0.5, "precision": 8.0}
    chance = np.repeat(np.arange(1, 11) / 10, 300)
    design = pd.DataFrame(
        {
            "subject": np.repeat(np.arange(30), 100),
            "item": np.tile(np.arange(100), 30),
            **holt_laury_columns(chance),
        }
    )
    sim = stopwise.simulate(model, theta, design, seed=2)
    data = stopwise.load(sim).arrays()
    prob = np.asarray(model.predict(theta, data))
    frame = pd.DataFrame({"row": design.a_p1, "b": sim.choice.eq("B"), "prob": prob})
    by_row = frame.groupby("row").agg(n=("b", "size"), k=("b", "sum"), prob=("prob", "first"))
    inside = by_row[(by_row.prob > 1e-3) & (by_row.prob < 1 - 1e-3)]
    z = (inside.k - inside.n * inside.prob) / np.sqrt(inside.n * inside.prob * (1 - inside.prob))
    assert stats.chi2.sf(float(np.sum(z**2)), df=len(inside)) > 1e-3  # scipy.stats
    assert len(inside) >= 4


def test_population_parameters_and_reproducibility():
    design = pd.concat(
        [stopping_design(400).assign(subject=s) for s in ("cautious", "bold")], ignore_index=True
    )
    params = pd.DataFrame({"subject": ["cautious", "bold"], "r": [1.5, -0.8], "precision": 3.0})
    sim = stopwise.simulate("crra+planner+logit", params, design, seed=4)
    mean_draws = sim[sim.action.eq("draw") & ~sim.outcome.eq("bust")].groupby("subject").size()
    assert mean_draws["bold"] > 2 * mean_draws["cautious"]
    again = stopwise.simulate("crra+planner+logit", params, design, seed=4)
    pd.testing.assert_frame_equal(sim, again)
    other = stopwise.simulate("crra+planner+logit", params, design, seed=5)
    assert not sim.equals(other)
    stopwise.load(sim)  # passes validation


def test_simulate_refuses_bad_parameters_and_designs():
    with pytest.raises(StopwiseInputError, match="its parameters are r, precision"):
        stopwise.simulate("crra+myopic+logit", {"rho": 0.3}, stopping_design(3))
    with pytest.raises(StopwiseInputError, match="outside its range"):
        stopwise.simulate("crra+myopic+logit", {"r": 0.3, "precision": -1}, stopping_design(3))
    with pytest.raises(StopwiseInputError, match="row 1, column 'p_survive'"):
        bad = stopping_design(3)
        bad.loc[1, "p_survive"] = 1.5
        stopwise.simulate("crra+myopic+logit", {"r": 0.3, "precision": 1.0}, bad)
    with pytest.raises(StopwiseInputError, match="lacks column"):
        stopwise.simulate(
            "crra+myopic+logit",
            {"r": 0.3, "precision": 1.0},
            stopping_design(3).drop(columns="gain"),
        )
    with pytest.warns(UserWarning, match="precision not given"):
        stopwise.simulate("crra+myopic+logit", {"r": 0.3}, stopping_design(3))


def test_simulate_command(tmp_path, capsys):
    out = tmp_path / "sim.csv"
    code = cli_main(
        [
            "simulate",
            "--model",
            "crra+planner+logit",
            "--set",
            "r=0.3",
            "--subjects",
            "4",
            "--trials",
            "6",
            "--p-survive",
            "0.75,0.9",
            "--seed",
            "3",
            "--out",
            str(out),
        ]
    )
    assert code == 0
    frame = pd.read_csv(out)
    assert set(frame.subject) == {1, 2, 3, 4}
    assert set(frame.p_survive) == {0.75, 0.9}
    assert "precision=1" in capsys.readouterr().err
    stopwise.load(out)
    bad = tmp_path / "bad.csv"
    assert (
        cli_main(["simulate", "--model", "crra+planner+logit", "--set", "rr=1", "--out", str(bad)])
        == 2
    )
    assert "its parameters are r, precision" in capsys.readouterr().err
    assert cli_main(["simulate", "--model", "crra+logit", "--set", "r=abc", "--out", str(bad)]) == 2
    assert cli_main(["simulate", "--model", "crra+wobble+logit", "--out", str(bad)]) == 2
    assert not bad.exists()
    lottery = tmp_path / "lottery.csv"
    assert (
        cli_main(["simulate", "--model", "crra+logit", "--trials", "10", "--out", str(lottery)])
        == 0
    )
    assert stopwise.load(lottery).kind == "lottery"
