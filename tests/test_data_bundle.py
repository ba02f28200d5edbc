"""Array bundles: indices, condition table, contest groups, covariates, horizon, pytrees."""

from __future__ import annotations

import jax
import numpy as np
import pandas as pd
import pytest

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.bundle import to_lottery_data, to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.load import load


def test_stopping_bundle_fields(decision_frame) -> None:
    data = to_stopping_data(decision_frame)
    assert isinstance(data, StoppingData)
    assert data.n_obs == 7 and data.n_subjects == 2 and data.n_cond == 2
    assert data.subject.tolist() == [0, 0, 0, 0, 1, 1, 1]
    assert data.trial.tolist() == [0, 0, 0, 1, 2, 3, 3]
    assert data.trial_labels.tolist() == [["a", 1], ["a", 2], ["b", 1], ["b", 2]]
    assert data.step.tolist() == [0, 1, 2, 0, 0, 0, 1]
    assert data.draw.tolist() == [1, 1, 0, 1, 0, 1, 0]
    assert data.bust.tolist() == [0, 0, 0, 1, 0, 0, 0]
    assert data.group.tolist() == [-1, -1, -1, 0, -1, 0, 0]
    assert data.horizon == 3
    assert data.subject.dtype == np.int32 and data.draw.dtype == np.float64


def test_condition_table_holds_each_configuration_once(decision_frame) -> None:
    data = to_stopping_data(decision_frame)
    table = pd.DataFrame(
        {
            name: np.asarray(getattr(data, name))
            for name in (
                "cond_p_survive",
                "cond_gain",
                "cond_start",
                "cond_bust_keep",
                "cond_contest",
                "cond_n_players",
                "cond_prize",
                "cond_keep_bank",
            )
        }
    )
    solo = table[table.cond_contest == 0].iloc[0]
    contest = table[table.cond_contest == 1].iloc[0]
    assert solo.tolist() == [0.9, 1.0, 0.0, 0.0, 0.0, 1.0, 0.0, 1.0]
    assert contest.tolist() == [0.8, 2.0, 0.0, 0.0, 1.0, 2.0, 10.0, 0.0]
    np.testing.assert_array_equal(data.p_survive, decision_frame["p_survive"])
    np.testing.assert_array_equal(data.bank, [0, 1, 2, 0, 0, 0, 2])


def test_horizon_and_covariates(decision_frame) -> None:
    data = to_stopping_data(decision_frame, covariates=("age",), horizon=10)
    assert data.horizon == 10
    np.testing.assert_array_equal(data.covariates["age"], decision_frame["age"].astype(float))
    with pytest.raises(StopwiseInputError, match="at least 3"):
        to_stopping_data(decision_frame, horizon=2)
    with pytest.raises(StopwiseInputError, match="not a column"):
        to_stopping_data(decision_frame, covariates=("height",))
    with pytest.raises(StopwiseInputError, match="not numeric"):
        to_stopping_data(decision_frame, covariates=("task",))
    frame = decision_frame.assign(age=[30.0, np.nan, 30, 30, 41, 41, 41])
    with pytest.raises(StopwiseInputError, match="missing value"):
        to_stopping_data(frame, covariates=("age",))


def test_bundle_is_a_pytree(decision_frame) -> None:
    data = to_stopping_data(decision_frame, covariates=("age",))
    doubled = jax.tree_util.tree_map(lambda x: x, data)
    assert doubled.horizon == data.horizon
    np.testing.assert_array_equal(doubled.covariates["age"], data.covariates["age"])
    total = jax.jit(lambda d: (d.draw * d.cond_gain[d.cond]).sum())(data)
    assert float(total) == pytest.approx(float((data.draw * data.gain).sum()))


def test_dataset_arrays_from_a_file(tmp_path, decision_frame) -> None:
    path = tmp_path / "d.csv"
    decision_frame.to_csv(path, index=False)
    data = load(path).arrays(covariates=["age"])
    assert isinstance(data, StoppingData)
    assert data.group.tolist() == [-1, -1, -1, 0, -1, 0, 0]


def test_lottery_bundle_pads_outcomes() -> None:
    frame = pd.DataFrame(
        {
            "subject": ["x", "y"],
            "item": [1, 1],
            "choice": ["A", "B"],
            "a_x1": [0.0, 5.0],
            "a_p1": [1.0, 1.0],
            "b_x1": [12.0, 12.0],
            "b_p1": [0.5, 0.25],
            "b_x2": [-6.0, 1.0],
            "b_p2": [0.5, 0.5],
            "b_x3": [np.nan, 3.0],
            "b_p3": [np.nan, 0.25],
        }
    )
    data = load(frame).arrays()
    assert isinstance(data, LotteryData)
    assert data.a_x.shape == (2, 3) and data.b_p.shape == (2, 3)
    np.testing.assert_allclose(data.a_p.sum(axis=1), 1.0)
    np.testing.assert_allclose(data.b_p.sum(axis=1), 1.0)
    assert data.a_x[0].tolist() == [0.0, 0.0, 0.0]  # padding repeats the first outcome
    assert data.b_x[0].tolist() == [12.0, -6.0, 12.0]
    assert data.choice_b.tolist() == [0.0, 1.0]
    assert to_lottery_data(frame).n_subjects == 2


def test_unique_rows_matches_numpy() -> None:
    from stopwise.data_schemas.bundle import unique_rows

    values = np.random.default_rng(1).integers(0, 3, (500, 8)).astype(float)
    inverse, table = unique_rows(values)
    reference, reference_inverse = np.unique(values, axis=0, return_inverse=True)
    np.testing.assert_array_equal(table, reference)
    np.testing.assert_array_equal(inverse, reference_inverse.reshape(-1))
    wide = np.random.default_rng(2).normal(size=(300, 8))  # too many values for one key
    inverse, table = unique_rows(wide)
    np.testing.assert_array_equal(table[inverse], wide)
