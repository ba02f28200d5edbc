"""The descriptive summary on small hand-checked data, and the describe command."""

from __future__ import annotations

import json

import pandas as pd
import pytest

from stopwise.cli import main
from stopwise.data_schemas.json_text import dumps_json
from stopwise.data_schemas.load import load
from stopwise.describe import describe
from stopwise.models.normative import expected_bank


def test_stopping_table_by_condition(decision_frame) -> None:
    # Four trials: solo p=0.9 (a: 2 draws then stop; b: stops at once) and a contest at
    # p=0.8, gain 2 (a busts on the first draw; b draws once then stops).
    description = describe(decision_frame)
    table = description.table.set_index("task")
    solo, contest = table.loc["solo"], table.loc["contest"]
    assert (solo.n_subjects, solo.n_trials) == (2, 2)
    assert solo.draws_mean == 1.0 and solo.bust_rate == 0.0 and solo.bank_mean == 1.0
    assert solo.stop_step_mean == 1.0
    assert (contest.n_trials, contest.bust_rate, contest.bank_mean) == (2, 0.5, 1.0)
    assert (contest.prize, contest.keep_bank) == (10.0, 0)
    # Risk-neutral benchmark (draw while bank < p g / (1 - p); derived analytically):
    # p = 0.9, g = 1 -> 9 (tie with 10); p = 0.8, g = 2 -> threshold 8 = 4 draws (tie with 5).
    assert solo.rn_target == 9 and contest.rn_target == 4
    assert solo.rn_bank == pytest.approx(9 * 0.9**9)
    assert contest.rn_bank == pytest.approx(float(expected_bank(4, 0.8, 2.0)))
    steps = description.stop_steps
    solo_steps = steps[steps.task == "solo"].set_index("stop_step")["n"].to_dict()
    assert solo_steps == {0: 1, 2: 1}
    text = str(description)
    assert "rn_target" in text and "Stop steps" in text and "contest" in text


def test_describe_accepts_path_frame_and_dataset(tmp_path, decision_frame) -> None:
    path = tmp_path / "d.csv"
    decision_frame.to_csv(path, index=False)
    from_path = describe(path).table
    pd.testing.assert_frame_equal(from_path, describe(load(path)).table)
    pd.testing.assert_frame_equal(from_path, describe(decision_frame).table)
    assert json.loads(dumps_json(describe(path).to_dict()))["kind"] == "stopping"


def test_lottery_shares_and_switching() -> None:
    frame = pd.DataFrame(
        {
            "subject": ["x"] * 3 + ["y"] * 3,
            "item": [1, 2, 3] * 2,
            "choice": ["A", "B", "B", "B", "A", "B"],
            "a_x1": 10.0,
            "a_p1": 1.0,
            "b_x1": [5.0, 15.0, 30.0] * 2,
            "b_p1": 1.0,
        }
    )
    description = describe(frame)
    assert description.table["share_b"].tolist() == [0.5, 0.5, 1.0]
    assert description.table["ev_b"].tolist() == [5.0, 15.0, 30.0]
    switching = description.switching.set_index("subject")
    assert switching.loc["x", "n_switches"] == 1 and switching.loc["y", "n_switches"] == 2
    assert switching.loc["x", "first_b_item"] == 2 and switching.loc["y", "n_b"] == 2
    assert "Switching" in str(description)


def test_cli_describe_writes_json(tmp_path, decision_frame, capsys) -> None:
    path = tmp_path / "d.csv"
    decision_frame.to_csv(path, index=False)
    target = tmp_path / "out" / "describe.json"
    assert main(["describe", str(path), "--json", str(target)]) == 0
    out, _ = capsys.readouterr()
    assert "Stopping data by condition" in out
    written = json.loads(target.read_text(encoding="utf-8"))
    assert [row["n_trials"] for row in written["table"]] == [2, 2]
    assert main(["describe", str(path), "--json", "-"]) == 0
    assert json.loads(capsys.readouterr().out)["source"] == str(path)
