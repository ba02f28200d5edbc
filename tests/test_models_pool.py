"""Draws without replacement from a known pool: step-dependent survival chances in the
policies, the pool's risk-neutral optimum, simulation and the description table."""

from __future__ import annotations

import itertools

import jax
import numpy as np
import pandas as pd
import pytest

from stopwise.cli import main
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.load import load
from stopwise.data_schemas.validate import validate
from stopwise.describe import describe
from stopwise.estimation.ml.response import stop_step_table
from stopwise.models.noise import NOISE
from stopwise.models.pool_normative import pool_chances, pool_dynamic_programme
from stopwise.models.spec import build_model
from stopwise.models.stopping import (
    Conditions,
    RiskParts,
    myopic_tables,
    planner_tables,
    step_chances,
    target_values,
    with_pool_urn,
)
from stopwise.models.utility import UTILITIES

POOLS = [(6, 2), (8, 3), (10, 1), (12, 3), (9, 5)]


def enumerated_bank(size: int, bad: int, target: int, gain: float, start: float, keep: float):
    """E[final bank | draw until ``target`` successes] over every placement of the bad items
    in a shuffled pool, each placement equally likely (brute force, no formula)."""
    total = 0.0
    placements = list(itertools.combinations(range(size), bad))
    for bad_positions in placements:
        first_bad = min(bad_positions)  # successes before the first bad item
        if first_bad >= target:
            total += start + target * gain
        else:
            total += keep * (start + first_bad * gain)
    return total / len(placements)


@pytest.mark.parametrize(("size", "bad"), POOLS)
@pytest.mark.parametrize(("gain", "start", "keep"), [(1.0, 0.0, 0.0), (2.0, 3.0, 0.25)])
def test_backward_induction_matches_brute_force_enumeration(size, bad, gain, start, keep):
    # brute force over all C(N, B) placements of the bad items (common practice, no source)
    good = size - bad
    banks = [enumerated_bank(size, bad, n, gain, start, keep) for n in range(good + 1)]
    best = max(banks)
    brute_targets = tuple(n for n, v in enumerate(banks) if v >= best - 1e-9 * max(1, best))
    programme = pool_dynamic_programme(size, bad, gain, start, keep)
    assert programme.targets == brute_targets
    assert programme.optimal_value == pytest.approx(best, rel=1e-12)


def test_the_pool_optimum_differs_from_the_constant_odds_threshold():
    # 20 items, 3 bad: the constant-odds rule at p = 17/20 says draw while bank < 5.67 (6
    # draws); the pool's odds worsen with each draw, so the optimum is 5 (enumeration agrees)
    assert pool_dynamic_programme(20, 3, 1.0).targets == (5,)
    banks = [enumerated_bank(20, 3, n, 1.0, 0.0, 0.0) for n in range(18)]
    assert int(np.argmax(banks)) == 5


def _pool_conditions(pools: list[tuple[int, int]]) -> Conditions:
    size = np.array([p[0] for p in pools], float)
    bad = np.array([p[1] for p in pools], float)
    n = len(pools)
    cond = Conditions((size - bad) / size, np.ones(n), np.zeros(n), np.zeros(n))
    return with_pool_urn(cond, size, bad)


def _parts(utility: str = "crra") -> RiskParts:
    return RiskParts(UTILITIES[utility], None, NOISE["logit"])


def test_step_chances_of_a_pool_and_zero_once_the_good_items_are_gone():
    cond = _pool_conditions([(6, 2), (10, 1)])
    chances = np.asarray(step_chances(cond, 12))
    np.testing.assert_allclose(chances[0, :5], pool_chances(6, 2), rtol=1e-15)
    np.testing.assert_allclose(chances[1, :10], pool_chances(10, 1), rtol=1e-15)
    assert np.all(chances[0, 4:] == 0) and np.all(chances[1, 9:] == 0)


def test_myopic_pool_table_equals_constant_tables_at_each_steps_chance():
    theta = {"r": 0.4, "precision": 2.0}
    size, bad = 12, 3
    chances = pool_chances(size, bad)[:-1]
    pool_draw, _ = myopic_tables(_parts(), theta, _pool_conditions([(size, bad)]), 9)
    n = len(chances)
    constant = Conditions(chances, np.ones(n), np.zeros(n), np.zeros(n))
    const_draw, _ = myopic_tables(_parts(), theta, constant, 9)
    np.testing.assert_allclose(np.asarray(pool_draw)[0], np.diag(np.asarray(const_draw)))


@pytest.mark.parametrize(
    ("size", "bad"),
    # pools without a tie (at a tie the sharp planner is indifferent)
    [pool for pool in POOLS if len(pool_dynamic_programme(*pool, 1.0).targets) == 1],
)
def test_sharp_risk_neutral_planner_draws_exactly_before_the_pool_optimum(size, bad):
    programme = pool_dynamic_programme(size, bad, 1.0)
    good = size - bad
    theta = {"r": 0.0, "precision": 200.0}
    log_draw, log_stop = planner_tables(
        _parts(), theta, _pool_conditions([(size, bad)]), good + 1, good + 1
    )
    p_draw = np.exp(np.asarray(log_draw)[0])
    target = programme.targets[0]
    assert np.all(p_draw[:target] > 0.99) and np.all(p_draw[target:] < 0.01)
    assert p_draw[good] == 0.0 and np.asarray(log_stop)[0, good] == 0.0  # forced stop


@pytest.mark.parametrize(("size", "bad"), POOLS)
def test_target_values_of_a_linear_utility_are_enumerated_expected_banks(size, bad):
    good = size - bad
    theta = {"precision": 1.0}
    values = np.asarray(
        target_values(_parts("linear"), theta, _pool_conditions([(size, bad)]), good + 1)
    )
    expected = [enumerated_bank(size, bad, n, 1.0, 0.0, 0.0) for n in range(good + 1)]
    np.testing.assert_allclose(values[0], expected, rtol=1e-12, atol=1e-14)


def test_simulated_pool_data_validate_fit_and_describe(tmp_path):
    model = build_model("crra+planner+logit")
    design = pd.DataFrame(
        {
            "subject": np.repeat(np.arange(4), 6),
            "trial": np.tile(np.arange(6), 4),
            "p_survive": 0.5,  # replaced by the pool's first chance
            "gain": 1.0,
            "pool_size": 6,
            "pool_bad": 2,
        }
    )
    frame = model.simulate({"r": 0.2, "precision": 3.0}, design, jax.random.PRNGKey(3))
    assert validate(frame).ok
    pool = frame[frame.pool_size == 6]
    np.testing.assert_allclose(pool.p_survive, (4 - pool.step) / (6 - pool.step))
    table = describe(load(frame)).table
    assert table["rn_target"].tolist() == [float(pool_dynamic_programme(6, 2, 1.0).targets[0])]
    assert table["p_survive"].tolist() == [4 / 6]


def test_stop_step_table_of_a_pool_uses_each_steps_chance():
    # 4 items, 2 bad; a trial that cleared the pool reaches step G = 2 (forced stop there)
    rows = [
        (0, 0.5, "draw", "success"),
        (1, 1 / 3, "draw", "success"),
        (2, 0.0, "stop", None),
    ]
    frame = pd.DataFrame(
        [
            {"subject": 1, "trial": 1, "step": s, "p_survive": p, "gain": 1.0, "action": a}
            | {"outcome": o, "pool_size": 4, "pool_bad": 2}
            for s, p, a, o in rows
        ]
    )
    assert validate(frame).ok
    model = build_model("crra+myopic+logit")
    theta = {"r": 0.3, "precision": 2.0}
    table = stop_step_table(model, theta, to_stopping_data(frame))
    h = table["p_draw"].to_numpy()
    chances = np.array([0.5, 1 / 3, 0.0])
    reach = np.array([1.0, h[0] * 0.5, h[0] * 0.5 * h[1] / 3])  # the pool's chances by hand
    np.testing.assert_allclose(table["p_reach"], reach, rtol=1e-12)
    np.testing.assert_allclose(table["p_bust_here"], reach * h * (1 - chances), rtol=1e-12)
    assert h[2] == 0.0  # forced stop
    total = table["p_stop_here"].sum() + table["p_bust_here"].sum()
    assert total == pytest.approx(1.0, abs=1e-12)  # every trial ends (probability law)


def test_cli_simulates_pools_and_untold_odds_and_refuses_a_bad_pool(tmp_path, capsys):
    base = ["simulate", "--model", "crra+myopic+logit", "--set", "r=0.3", "--set"]
    base += ["precision=2", "--subjects", "3", "--trials", "4"]
    out = tmp_path / "pool.csv"
    assert main([*base, "--pool", "12:3", "--odds-unknown", "--out", str(out)]) == 0
    frame = pd.read_csv(out)
    assert validate(frame).ok
    assert (frame.pool_size == 12).all() and (frame.odds_known == 0).all()
    bad = tmp_path / "bad.csv"
    assert main([*base, "--pool", "3:5", "--out", str(bad)]) == 2
    assert "--pool: expected N:B" in capsys.readouterr().err
    assert not bad.exists()


def test_a_pool_condition_is_keyed_on_the_pool_with_its_first_chance_in_any_row_order():
    rows = [
        {"subject": 1, "trial": 1, "step": s, "p_survive": (4 - s) / (6 - s), "gain": 1.0}
        | {"action": "draw" if s < 2 else "stop", "outcome": "success" if s < 2 else None}
        | {"pool_size": 6, "pool_bad": 2}
        for s in range(3)
    ]
    shuffled = pd.DataFrame(rows).iloc[[2, 0, 1]]
    data = to_stopping_data(shuffled)
    assert data.n_cond == 1
    assert float(data.cond_p_survive[0]) == 4 / 6
    assert (float(data.cond_pool_size[0]), float(data.cond_pool_bad[0])) == (6.0, 2.0)
