"""Validation: the bad-file corpus, every problem at once, messages, CLI exit codes."""

from __future__ import annotations

import csv
import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stopwise.cli import main
from stopwise.data_schemas import columns as C
from stopwise.data_schemas.errors import StopwiseDataError, StopwiseInputError
from stopwise.data_schemas.load import load
from stopwise.data_schemas.report import suggest_label
from stopwise.data_schemas.validate import validate

BAD = Path(__file__).with_name("bad_files")


def _expected() -> dict[str, list[dict[str, str]]]:
    table: dict[str, list[dict[str, str]]] = {}
    with open(BAD / "expected.tsv", encoding="utf-8") as fh:
        for row in csv.DictReader(fh, delimiter="\t"):
            table.setdefault(row["file"], []).append(row)
    return table


EXPECTED = _expected()
BAD_NAMES = sorted(EXPECTED)


def _as_line(text: str) -> int | None:
    return None if text == "-" else int(text)


def test_every_corpus_file_has_expectations() -> None:
    files = {p.name for p in BAD.iterdir() if p.suffix == ".csv"}
    assert files == set(EXPECTED)


@pytest.mark.parametrize("name", BAD_NAMES)
def test_bad_file_reports_exactly_the_expected_problems(name: str) -> None:
    report = validate(BAD / name)
    assert not report.ok
    found = {(p.kind, p.line, p.column or "-") for p in report.problems}
    wanted = {(r["kind"], _as_line(r["line"]), r["column"]) for r in EXPECTED[name]}
    assert found == wanted
    for row in EXPECTED[name]:
        match = [
            p
            for p in report.problems
            if (p.kind, p.line, p.column or "-")
            == (row["kind"], _as_line(row["line"]), row["column"])
        ]
        assert row["fragment"] in match[0].format(), match[0].format()
        assert str(BAD / name) in match[0].format()


@pytest.mark.parametrize("name", BAD_NAMES)
def test_cli_validate_exits_2_with_lines_and_no_traceback(name: str, capsys) -> None:
    path = BAD / name
    assert main(["validate", str(path)]) == 2
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    for row in EXPECTED[name]:
        where = str(path) if row["line"] == "-" else f"{path}:{row['line']}"
        assert where in err
        assert row["fragment"] in err


@pytest.mark.parametrize("name", BAD_NAMES)
def test_cli_describe_refuses_bad_file_and_writes_nothing(name: str, tmp_path, capsys) -> None:
    target = tmp_path / "out.json"
    assert main(["describe", str(BAD / name), "--json", str(target)]) == 2
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    assert err.startswith("error: ")
    assert not target.exists()
    assert list(tmp_path.iterdir()) == []


def test_cli_in_a_real_process(tmp_path) -> None:
    path = BAD / "many_problems.csv"
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    result = subprocess.run(
        [sys.executable, "-m", "stopwise", "validate", str(path)],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=tmp_path,
    )
    assert result.returncode == 2
    assert "Traceback" not in result.stderr
    assert f"{path}:3: column 'action': found 'drw'" in result.stderr
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before  # input untouched
    assert list(tmp_path.iterdir()) == []


def test_all_kinds_reported_in_one_pass() -> None:
    report = validate(BAD / "many_problems.csv")
    assert set(report.counts) == {
        "p_survive_range",
        "gain_range",
        "unknown_label",
        "outcome_after_stop",
        "duplicate_row",
        "missing_value",
        "step_gap",
        "unfinished_trial",
        "wrong_type",
    }
    assert report.n_problems == len(EXPECTED["many_problems.csv"])


def test_clean_file_summary_and_exit_0(tmp_path, decision_frame, capsys) -> None:
    path = tmp_path / "clean.csv"
    decision_frame.to_csv(path, index=False)
    assert main(["validate", str(path)]) == 0
    out, _ = capsys.readouterr()
    assert "OK (decision-level stopping data, 7 rows)" in out
    assert "subjects: 2" in out and "trials: 4" in out
    assert len(out.splitlines()) < 25  # one screen


def test_cli_json_report(capsys) -> None:
    assert main(["validate", str(BAD / "step_gap.csv"), "--json"]) == 2
    report = json.loads(capsys.readouterr().out)
    assert report["ok"] is False
    assert report["counts"] == {"step_gap": 1}
    assert report["problems"][0]["line"] == 3


def test_problems_are_capped_per_kind_but_counted(decision_frame) -> None:
    frame = pd.concat([decision_frame] * 40, ignore_index=True)
    frame["trial"] = np.repeat(np.arange(40), len(decision_frame)) * 10 + frame["trial"]
    frame["p_survive"] = 1.5
    report = validate(frame, max_per_kind=5)
    assert report.counts["p_survive_range"] == len(frame)
    assert len([p for p in report.problems if p.kind == "p_survive_range"]) == 5
    assert f"... and {len(frame) - 5} more of this kind" in report.format()


@pytest.mark.parametrize(
    ("typed", "expected"),
    [
        ("Stop", "did you mean 'stop'?"),
        ("drw", "did you mean 'draw'?"),
        (" draw ", "did you mean 'draw'?"),
        ("DRAW", "did you mean 'draw'?"),
        ("xyz", ""),
    ],
)
def test_near_miss_labels(typed: str, expected: str) -> None:
    assert suggest_label(typed, C.ACTIONS) == expected


def test_dataframe_rows_are_reported_as_csv_lines(decision_frame) -> None:
    frame = decision_frame.copy()
    frame.loc[0, "gain"] = -1.0
    original = frame.copy()
    report = validate(frame)
    assert [(p.kind, p.line, p.file) for p in report.problems] == [("gain_range", 2, "<DataFrame>")]
    pd.testing.assert_frame_equal(frame, original)  # the input is not modified


def test_blank_lines_keep_line_numbers(tmp_path) -> None:
    path = tmp_path / "blank.csv"
    path.write_text(
        "subject,trial,step,p_survive,gain,action,outcome\n"
        "s1,1,0,0.9,1,stop,\n\n\ns1,2,0,0.9,0,stop,\n",
        encoding="utf-8",
    )
    report = validate(path)
    assert [(p.kind, p.line) for p in report.problems] == [("gain_range", 5)]


def test_semicolon_files_and_byte_order_mark(tmp_path, decision_frame) -> None:
    path = tmp_path / "semi.csv"
    text = decision_frame.to_csv(index=False, sep=";")
    path.write_bytes(b"\xef\xbb\xbf" + text.encode("utf-8"))
    assert load(path).n_rows == len(decision_frame)


def test_parquet_and_csv_load_alike(tmp_path, decision_frame) -> None:
    decision_frame.to_parquet(tmp_path / "d.parquet", index=False)
    decision_frame.to_csv(tmp_path / "d.csv", index=False)
    from_parquet = load(tmp_path / "d.parquet").frame
    from_csv = load(tmp_path / "d.csv").frame
    for name in ("trial", "step", "p_survive", "gain", "action", "outcome", "age"):
        pd.testing.assert_series_equal(from_parquet[name], from_csv[name])


def test_censored_trials_need_the_option(capsys) -> None:
    path = BAD / "unfinished_trial.csv"
    assert validate(path, allow_censored=True).ok
    assert main(["validate", str(path), "--allow-censored"]) == 0
    with pytest.raises(StopwiseDataError) as info:
        load(path)
    assert info.value.report.counts == {"unfinished_trial": 1}
    assert isinstance(info.value, StopwiseInputError)


def test_kind_mismatch_and_unknown_kind() -> None:
    report = validate(BAD / "lottery_choice.csv", kind="stopping")
    assert set(report.counts) == {"wrong_format"}
    with pytest.raises(StopwiseInputError, match="unknown data kind"):
        validate(BAD / "lottery_choice.csv", kind="bananas")


def test_missing_file_is_an_input_error(tmp_path, capsys) -> None:
    with pytest.raises(StopwiseInputError, match="no such file"):
        validate(tmp_path / "nope.csv")
    assert main(["validate", str(tmp_path / "nope.csv")]) == 2
    assert "no such file" in capsys.readouterr().err


def test_unknown_columns_are_listed(tmp_path) -> None:
    path = tmp_path / "odd.csv"
    path.write_text("x,y\n1,2\n", encoding="utf-8")
    report = validate(path)
    assert report.counts == {"missing_column": 1}
    assert "decision level (subject, trial, step" in report.format()


def test_lottery_unused_outcome_slots_are_fine(tmp_path) -> None:
    path = tmp_path / "lottery.csv"
    path.write_text(
        "subject,item,choice,a_x1,a_p1,a_x2,a_p2,b_x1,b_p1,b_x2,b_p2\n"
        "s1,1,A,0,1,,,12,0.5,-6,0.5\n"
        "s1,2,B,5,1,,,12,0.5,-6,0.5\n",
        encoding="utf-8",
    )
    data = load(path)
    assert data.kind == "lottery" and data.n_rows == 2


def test_contest_group_with_right_size_passes(decision_frame) -> None:
    assert validate(decision_frame).ok
    frame = decision_frame.copy()
    frame.loc[frame["group"] == "g1", "n_players"] = 3
    report = validate(frame)
    assert set(report.counts) == {"group_size"}


def test_row_order_does_not_matter(decision_frame) -> None:
    shuffled = decision_frame.sample(frac=1.0, random_state=3)
    assert validate(shuffled).ok
    broken = shuffled.reset_index(drop=True)
    row = int(
        np.flatnonzero((broken["subject"] == "a") & (broken["trial"] == 1) & (broken["step"] == 1))[
            0
        ]
    )
    broken.loc[row, "step"] = 5
    report = validate(broken)
    assert {(p.kind, p.line) for p in report.problems} >= {("step_gap", row + 2)}


@settings(
    max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(row=st.integers(0, 6), column=st.sampled_from(["p_survive", "gain", "step", "action"]))
def test_a_corrupted_cell_is_found_on_its_line(decision_frame, row: int, column: str) -> None:
    frame = decision_frame.copy()
    bad = {"p_survive": 1.5, "gain": 0.0, "step": -2, "action": "halt"}[column]
    frame[column] = frame[column].astype(object)
    frame.loc[row, column] = bad
    report = validate(frame)
    assert any(p.line == row + 2 and p.column == column for p in report.problems)


@pytest.mark.parametrize(
    ("name", "content", "fragment"),
    [
        ("x.parquet", b"PAR1 not really parquet", "unreadable as Parquet"),
        ("x.xlsx", b"PK\x03\x04", "save the data as CSV or Parquet"),
        ("x.csv", "é,ü\n".encode("latin-1") * 3, "not UTF-8 text"),
    ],
)
def test_files_that_are_not_tables(tmp_path, name: str, content: bytes, fragment: str) -> None:
    path = tmp_path / name
    path.write_bytes(content)
    report = validate(path)
    assert set(report.counts) == {"not_a_table"}
    assert fragment in report.format()
