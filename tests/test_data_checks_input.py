"""Input checks of issue 22, item 9: problems found on the file's own line and column, and
files that are not readable regular files refused up front with exit code 2.

The bad-file corpus (tests/bad_files, checked by test_data_validate.py) holds the small
files; the cases here need a large file, a binary format, or a special file.
"""

from __future__ import annotations

import gzip
import os
import threading
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from stopwise.cli import main
from stopwise.data_schemas import checks_file
from stopwise.data_schemas.checks_file import first_undecodable_byte, unclosed_quote_line
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.validate import validate

HEADER = "subject,trial,step,p_survive,gain,action,outcome\n"


def _rows(n_trials: int) -> str:
    """Valid decision rows: every trial is one stop at step 0 (lines 2 .. n_trials + 1)."""
    return "".join(f"s1,{t},0,0.9,1,stop,\n" for t in range(1, n_trials + 1))


def test_non_utf8_byte_far_into_the_file_is_reported_on_its_line(tmp_path) -> None:
    # The byte lies beyond the first 64 KiB that are sniffed, so the CSV parser meets it and
    # used to report a buffer position; the line is counted independently below.
    text = HEADER + _rows(6000)
    bad_line = 5001
    lines = text.splitlines(keepends=True)
    lines[bad_line - 1] = lines[bad_line - 1].replace("s1", "s\xe9", 1)
    path = tmp_path / "late_byte.csv"
    body = "".join(lines).encode("latin-1")
    path.write_bytes(body)
    assert body.index(b"\xe9") > 65536  # beyond the sniffed head
    report = validate(path)
    assert [(p.kind, p.line) for p in report.problems] == [("not_a_table", bad_line)]
    assert "not UTF-8" in report.format()
    assert main(["validate", str(path)]) == 2


def test_unclosed_quote_is_reported_on_the_line_where_it_opens(tmp_path) -> None:
    # Quoted newlines make parser rows and file lines differ: the quoted subject ids span two
    # lines each, so the parser's row count is behind the line count.
    quoted = "".join(f'"s\n{t}",{t},0,0.9,1,stop,\n' for t in range(1, 40))
    opens_on = 1 + 39 * 2 + 1
    path = tmp_path / "open_quote.csv"
    path.write_text(HEADER + quoted + 's2,1,0,"0.9,1,stop,\n' + _rows(5), encoding="utf-8")
    report = validate(path)
    assert [(p.kind, p.line) for p in report.problems] == [("bad_row", opens_on)]
    assert "closing quote" in report.format()


def test_quote_and_byte_locators_against_a_plain_scan(tmp_path) -> None:
    """The block-wise locators agree with a byte-by-byte scan of the same file."""
    path = tmp_path / "f.csv"
    body = (HEADER + _rows(3000) + 'x,"y\n\n' + _rows(10)).encode("utf-8") + b"\xff\n"
    path.write_bytes(body)
    expected_quote_line = body[: body.index(b'"y')].count(b"\n") + 1
    assert unclosed_quote_line(path) == expected_quote_line
    assert first_undecodable_byte(path) == (body.index(b"\xff"), 0xFF)
    path.write_bytes(b'a,"b""c",d\n1,2,3\n')  # a doubled quote inside a closed field
    assert unclosed_quote_line(path) is None


def test_list_valued_parquet_cells_are_refused_on_their_line(tmp_path, decision_frame) -> None:
    frame = decision_frame.copy()
    frame["age"] = [None, None, None, [30, 31], None, [41], None]  # a Parquet list column
    path = tmp_path / "lists.parquet"
    frame.to_parquet(path, index=False)
    report = validate(path)
    assert [(p.kind, p.line, p.column) for p in report.problems] == [("wrong_type", 5, "age")]
    assert "one value per cell" in report.format()
    assert main(["validate", str(path)]) == 2


def test_list_valued_dataframe_cells_are_refused(decision_frame) -> None:
    frame = decision_frame.copy()
    frame["gain"] = frame["gain"].astype(object)
    frame.at[1, "gain"] = np.array([1.0, 2.0])
    report = validate(frame)
    assert [(p.kind, p.line, p.column) for p in report.problems] == [("wrong_type", 3, "gain")]


def test_duplicate_columns_in_a_dataframe(decision_frame) -> None:
    frame = decision_frame.rename(columns={"age": " gain"})
    report = validate(frame)
    assert [(p.kind, p.line, p.column) for p in report.problems] == [
        ("duplicate_column", 1, "gain")
    ]


def test_duplicate_columns_in_a_compressed_csv(tmp_path) -> None:
    path = tmp_path / "twice.csv.gz"
    with gzip.open(path, "wt", encoding="utf-8") as fh:
        fh.write("subject,trial,step,p_survive,gain,action,outcome,gain\ns1,1,0,0.9,1,stop,,2\n")
    report = validate(path)
    assert [(p.kind, p.line, p.column) for p in report.problems] == [
        ("duplicate_column", 1, "gain")
    ]


def test_unreadable_file_exits_2_not_1(tmp_path, monkeypatch, capsys) -> None:
    path = tmp_path / "locked.csv"
    path.write_text(HEADER + _rows(2), encoding="utf-8")

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    # Tests run as root here, where file modes do not stop reading: the refusal is injected
    # at the one place the reader opens the file.
    monkeypatch.setattr(checks_file, "open", refuse, raising=False)
    with pytest.raises(StopwiseInputError, match="cannot be read \\(Permission denied\\)"):
        validate(path)
    assert main(["validate", str(path)]) == 2
    assert "locked.csv: cannot be read" in capsys.readouterr().err


@pytest.mark.skipif(os.geteuid() == 0, reason="file modes do not stop root from reading")
def test_unreadable_file_by_mode(tmp_path) -> None:
    path = tmp_path / "locked.csv"
    path.write_text(HEADER + _rows(2), encoding="utf-8")
    path.chmod(0)
    assert main(["validate", str(path)]) == 2


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="named pipes need a POSIX system")
def test_named_pipe_is_refused_without_blocking(tmp_path, capsys) -> None:
    pipe = tmp_path / "data.csv"
    os.mkfifo(pipe)
    outcome: dict[str, object] = {}

    def run() -> None:
        outcome["code"] = main(["validate", str(pipe)])

    worker = threading.Thread(target=run, daemon=True)
    worker.start()
    worker.join(timeout=60)
    if worker.is_alive():  # unblock the reader so the test process can end, then fail
        with open(pipe, "wb"):
            pass
        pytest.fail("validating a named pipe blocked")
    assert outcome["code"] == 2
    assert "is a named pipe" in capsys.readouterr().err


@pytest.mark.skipif(not Path("/dev/zero").exists(), reason="no /dev/zero here")
def test_device_is_refused(capsys) -> None:
    assert main(["validate", "/dev/zero"]) == 2
    assert "is a character device" in capsys.readouterr().err


def test_trial_ids_that_would_collide_are_refused(tmp_path) -> None:
    """Two ids beyond int64 used to become one trial fitted at the wrong p_survive."""
    ids = ["9223372036854775808", "9223372036854775809"]
    assert float(ids[0]) == float(ids[1])  # why: both round to the same float64
    frame = pd.DataFrame(
        {
            "subject": ["s1", "s1"],
            "trial": ids,
            "step": [0, 0],
            "p_survive": [0.9, 0.5],
            "gain": [1, 1],
            "action": ["stop", "stop"],
            "outcome": [None, None],
        }
    )
    report = validate(frame)
    assert {(p.kind, p.line, p.column) for p in report.problems} == {
        ("value_range", 2, "trial"),
        ("value_range", 3, "trial"),
    }
