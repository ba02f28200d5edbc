"""Lossless conversion trial level <-> decision level (property-based) and loading."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stopwise.data_schemas.convert import decisions_to_trials, trials_to_decisions
from stopwise.data_schemas.errors import StopwiseDataError, StopwiseInputError
from stopwise.data_schemas.load import load
from stopwise.data_schemas.validate import validate

SETTINGS = settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@st.composite
def trial_frames(draw: st.DrawFn) -> pd.DataFrame:
    """Valid trial-level frames with optional design columns, a covariate and censoring."""
    n_subjects = draw(st.integers(1, 4))
    optional = draw(st.sets(st.sampled_from(["start", "bust_keep", "age", "contest"])))
    censoring = draw(st.booleans())
    rows = []
    for s in range(n_subjects):
        trial_ids = draw(st.lists(st.integers(-5, 50), min_size=1, max_size=5, unique=True))
        age = draw(st.integers(18, 70))
        for t in trial_ids:
            draws = draw(st.integers(0, 8))
            busted = draw(st.integers(0, 1))
            row = {
                "subject": f"s{s}",
                "trial": t,
                "p_survive": draw(st.sampled_from([0.5, 0.75, 0.9, 0.95])),
                "gain": draw(st.sampled_from([0.5, 1.0, 2.5])),
                "draws": draws,
                "busted": busted,
            }
            if censoring:
                row["censored"] = int(draws > 0 and busted == 0 and draw(st.booleans()))
            if "start" in optional:
                row["start"] = draw(st.sampled_from([0.0, 3.0]))
            if "bust_keep" in optional:
                row["bust_keep"] = draw(st.sampled_from([0.0, 0.5]))
            if "contest" in optional and draw(st.booleans()):  # one-player groups keep
                row.update(
                    task="contest", group=f"g{s}", n_players=1, prize=5.0, keep_bank=0
                )  # the group-size rule simple
            elif "contest" in optional:
                row.update(task="solo", group=None, n_players=1, prize=0.0, keep_bank=1)
            if "age" in optional:
                row["age"] = age
            rows.append(row)
    return pd.DataFrame(rows)


@SETTINGS
@given(trial_frames())
def test_trials_round_trip_through_decisions(trials: pd.DataFrame) -> None:
    decisions = trials_to_decisions(trials)
    assert validate(decisions, allow_censored=True).ok
    censored = trials["censored"] if "censored" in trials else 0
    assert len(decisions) == int((trials["draws"] + 1 - censored).sum())
    back = decisions_to_trials(decisions)
    if "censored" in trials and not trials["censored"].any():
        back.insert(6, "censored", 0)  # an all-zero flag is not written back
    pd.testing.assert_frame_equal(back, trials)


@SETTINGS
@given(trial_frames())
def test_decisions_round_trip_through_trials(trials: pd.DataFrame) -> None:
    decisions = trials_to_decisions(trials)
    again = trials_to_decisions(decisions_to_trials(decisions))
    pd.testing.assert_frame_equal(again, decisions)


@SETTINGS
@given(trial_frames())
def test_bank_column_is_start_plus_step_times_gain(trials: pd.DataFrame) -> None:
    decisions = trials_to_decisions(trials, bank=True)
    start = decisions["start"] if "start" in decisions else 0.0
    np.testing.assert_allclose(decisions["bank"], start + decisions["step"] * decisions["gain"])
    assert validate(decisions, allow_censored=True).ok
    # bank is derived, so dropping it at trial level loses nothing
    pd.testing.assert_frame_equal(
        decisions_to_trials(decisions), decisions_to_trials(decisions.drop(columns="bank"))
    )


def test_decision_rows_of_one_trial() -> None:
    trials = pd.DataFrame(
        {
            "subject": ["x", "x", "x"],
            "trial": [1, 2, 3],
            "p_survive": 0.9,
            "gain": 1.0,
            "draws": [2, 1, 0],
            "busted": [0, 1, 0],
        }
    )
    decisions = trials_to_decisions(trials)
    assert decisions["step"].tolist() == [0, 1, 2, 0, 1, 0]
    assert decisions["action"].tolist() == ["draw", "draw", "stop", "draw", "draw", "stop"]
    assert decisions["outcome"].fillna("").tolist() == [
        "success",
        "success",
        "",
        "success",
        "bust",
        "",
    ]


def test_covariate_varying_inside_a_trial_cannot_go_to_trial_level(decision_frame) -> None:
    frame = decision_frame.copy()
    frame["response_time"] = np.arange(len(frame), dtype=float)
    with pytest.raises(StopwiseInputError, match="response_time"):
        decisions_to_trials(frame)


def test_invalid_input_is_refused() -> None:
    trials = pd.DataFrame(
        {
            "subject": ["x"],
            "trial": [1],
            "p_survive": [1.2],
            "gain": [1.0],
            "draws": [1],
            "busted": [0],
        }
    )
    with pytest.raises(StopwiseDataError, match="p_survive"):
        trials_to_decisions(trials)


def test_load_trial_level_file_gives_decision_level(tmp_path) -> None:
    trials = pd.DataFrame(
        {
            "subject": [7, 7, 8],
            "trial": [1, 2, 1],
            "p_survive": 0.8,
            "gain": 2.0,
            "draws": [3, 0, 1],
            "busted": [1, 0, 0],
            "treatment": [1, 1, 0],
        }
    )
    path = tmp_path / "trials.csv"
    trials.to_csv(path, index=False)
    data = load(path)
    assert data.kind == "stopping"
    expected = trials_to_decisions(trials)
    assert data.frame["step"].tolist() == expected["step"].tolist()
    assert data.frame["action"].astype(str).tolist() == expected["action"].tolist()
    assert data.frame["treatment"].tolist() == expected["treatment"].tolist()
