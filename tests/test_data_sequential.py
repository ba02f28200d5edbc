"""Validation of the sequential-contest columns ``order`` and ``rival_bank`` (DESIGN.md):
the rules themselves are the data contract (issue 19), checked on small invented files."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from stopwise.cli import main
from stopwise.data_schemas.validate import validate


@pytest.fixture
def sequential_trials() -> pd.DataFrame:
    """Two contests (group x trial) of two players; the second mover saw the first's bank
    (empty after a bust)."""
    return pd.DataFrame(
        {
            "subject": ["a", "b", "a", "b"],
            "trial": [1, 1, 2, 2],
            "p_survive": 0.9,
            "gain": 1.0,
            "draws": [6, 7, 3, 1],
            "busted": [0, 0, 1, 0],
            "task": "contest",
            "group": "g1",
            "n_players": 2,
            "prize": 10.0,
            "order": [1, 2, 1, 2],
            "rival_bank": [np.nan, 6.0, np.nan, np.nan],
        }
    )


def test_consistent_sequential_file_passes(sequential_trials) -> None:
    report = validate(sequential_trials)
    assert report.ok, report.format()


def test_later_mover_without_rival_bank_column_is_refused(sequential_trials) -> None:
    report = validate(sequential_trials.drop(columns="rival_bank"))
    assert report.counts == {"sequential_fields": 1}
    assert "rival_bank" in report.format() and "<no such column>" in report.format()


def test_first_mover_with_rival_bank_is_refused(sequential_trials) -> None:
    frame = sequential_trials.copy()
    frame.loc[0, "rival_bank"] = 3.0
    report = validate(frame)
    assert report.counts == {"sequential_fields": 1}
    assert "first mover" in report.format()


@pytest.mark.parametrize("orders", [[1, 1, 1, 2], [2, 3, 1, 2], [1, np.nan, 1, 2]])
def test_inconsistent_orders_in_a_contest_are_refused(sequential_trials, orders) -> None:
    frame = sequential_trials.copy()
    frame["order"] = orders
    frame.loc[frame["order"] != 2, "rival_bank"] = np.nan
    report = validate(frame)
    assert not report.ok
    assert set(report.counts) <= {"sequential_order", "sequential_fields"}
    assert "order" in report.format()


def test_order_on_a_solo_row_and_beyond_n_players(sequential_trials) -> None:
    frame = sequential_trials.copy()
    frame.loc[3, "order"] = 3  # beyond n_players = 2 (and breaks 1..k)
    report = validate(frame)
    assert "an order <= n_players" in report.format()
    solo = sequential_trials.copy()
    solo["task"] = "solo"
    solo = solo.drop(columns=["group", "n_players", "prize", "rival_bank"])
    report = validate(solo)
    assert report.counts == {"sequential_fields": 4}


def test_rival_bank_must_be_a_number_at_least_zero(sequential_trials) -> None:
    frame = sequential_trials.copy()
    frame.loc[1, "rival_bank"] = -1.0
    assert not validate(frame).ok


def test_validate_command_exits_2_and_leaves_the_file(tmp_path, sequential_trials) -> None:
    path = tmp_path / "seq.csv"
    frame = sequential_trials.copy()
    frame.loc[0, "rival_bank"] = 3.0
    frame.to_csv(path, index=False)
    before = path.read_bytes()
    assert main(["validate", str(path)]) == 2
    assert path.read_bytes() == before
    sequential_trials.to_csv(path, index=False)
    assert main(["validate", str(path)]) == 0


def test_rival_bank_must_match_the_earlier_movers_bank(sequential_trials) -> None:
    frame = sequential_trials.copy()
    frame.loc[1, "rival_bank"] = 5.0  # the first mover banked 6
    report = validate(frame)
    assert report.counts == {"rival_bank_mismatch": 1}
    assert "6" in report.format()
    frame = sequential_trials.copy()
    frame.loc[3, "rival_bank"] = 3.0  # the first mover busted on trial 2
    report = validate(frame)
    assert report.counts == {"rival_bank_mismatch": 1}
    assert "every earlier mover busted" in report.format()


def test_rival_bank_checked_at_decision_level(tmp_path) -> None:
    rows = [
        "subject,trial,step,p_survive,gain,action,outcome,task,group,n_players,prize,order,rival_bank",
        "a,1,0,0.9,1,draw,success,contest,g1,2,10,1,",
        "a,1,1,0.9,1,stop,,contest,g1,2,10,1,",
        "b,1,0,0.9,1,draw,success,contest,g1,2,10,2,{seen}",
        "b,1,1,0.9,1,draw,success,contest,g1,2,10,2,{seen}",
        "b,1,2,0.9,1,stop,,contest,g1,2,10,2,{seen}",
    ]
    path = tmp_path / "d.csv"
    path.write_text("\n".join(rows).format(seen=1) + "\n", encoding="utf-8")
    assert validate(path).ok
    path.write_text("\n".join(rows).format(seen=2) + "\n", encoding="utf-8")
    report = validate(path)
    assert report.counts == {"rival_bank_mismatch": 1}
    assert ":4:" in report.format()  # the second mover's first line
