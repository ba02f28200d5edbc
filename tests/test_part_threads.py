"""Parts checked on threads in this process (``workers=0``): the same reports, counts and
failure rules as one part after another.

The folder is written by the helpers of tests/test_arrow_screen.py (invented rows); the
reference for every comparison is the same call with one thread, so a thread that lost,
reordered or mixed up a part's result makes these tests fail.
"""

from __future__ import annotations

import threading

import pandas as pd
import pytest
from test_arrow_screen import _clean_frame, _set, _write

import stopwise.validate_parts as VP
from stopwise.describe_parts import describe_parts
from stopwise.estimation.distributed import run_in_threads, run_tasks
from stopwise.estimation.ml.count_tables import table_frame
from stopwise.partitioned import count_parts, validate_parts


def _defective_folder(tmp_path):
    """Five parts; the second and the fourth each hold a problem the validator reports."""
    frame = _clean_frame(n_subjects=10, n_trials=10)
    _set("p_survive", 1.7, 0.3)(frame)
    _set("gain", -2.0, 0.7)(frame)
    _write(frame, tmp_path / "parts", cuts=(0.2, 0.4, 0.6, 0.8))
    return tmp_path / "parts"


def _one_thread(monkeypatch) -> None:
    monkeypatch.setattr(VP, "part_threads", lambda n_parts, cores=None: 1)


def test_part_threads_follow_cores_parts_and_the_cap() -> None:
    assert VP.part_threads(20, cores=2) == 2
    assert VP.part_threads(1, cores=2) == 1
    assert VP.part_threads(20, cores=64) == VP.MAX_PART_THREADS
    assert VP.part_threads(3, cores=1) == 1


def test_threaded_report_equals_the_one_thread_report(tmp_path, monkeypatch) -> None:
    folder = _defective_folder(tmp_path)
    assert VP.part_threads(5) >= 1
    threaded = validate_parts(folder, workers=0, fast=True).to_dict()
    threaded_full = validate_parts(folder, workers=0, fast=False).to_dict()
    _one_thread(monkeypatch)
    single = validate_parts(folder, workers=0, fast=True).to_dict()
    assert not single["ok"] and single["problems"]  # the comparison can fail
    assert threaded == single
    assert threaded_full == validate_parts(folder, workers=0, fast=False).to_dict()


def test_threaded_counts_equal_the_one_thread_counts(tmp_path, monkeypatch) -> None:
    frame = _clean_frame(n_subjects=10, n_trials=10)
    folder = tmp_path / "clean"
    _write(frame, folder, cuts=(0.2, 0.4, 0.6, 0.8))
    report, tables = count_parts(folder, workers=0)
    _one_thread(monkeypatch)
    report_1, tables_1 = count_parts(folder, workers=0)
    assert report.ok and report.to_dict() == report_1.to_dict()
    assert len(tables) == len(tables_1) == 5
    for got, want in zip(tables, tables_1):
        pd.testing.assert_frame_equal(table_frame(got), table_frame(want))


def test_threaded_description_equals_the_one_thread_description(tmp_path, monkeypatch) -> None:
    frame = _clean_frame(n_subjects=10, n_trials=10)
    folder = tmp_path / "clean"
    _write(frame, folder, cuts=(0.2, 0.4, 0.6, 0.8))
    threaded = describe_parts(folder, workers=0)
    _one_thread(monkeypatch)
    single = describe_parts(folder, workers=0)
    assert str(threaded) == str(single) and str(single)
    for name, table in vars(single).items():
        if isinstance(table, pd.DataFrame):
            pd.testing.assert_frame_equal(getattr(threaded, name), table)


def test_threads_keep_task_order_retry_once_and_report_failures() -> None:
    seen: dict[int, int] = {}
    lock = threading.Lock()

    def task(index: int) -> int:
        with lock:
            seen[index] = seen.get(index, 0) + 1
            tries = seen[index]
        if index == 3 and tries == 1:
            raise RuntimeError("first try of task 3")  # the retry succeeds
        if index == 5:
            raise ValueError("task 5 always fails")
        return index * index

    inputs = [{"index": i} for i in range(8)]
    run = run_in_threads(task, inputs, threads=3)
    assert run.results == [0, 1, 4, 9, 16, None, 36, 49]
    assert seen[3] == 2 and seen[5] == 2  # each failing task is run exactly once more
    assert [(f.index, f.inputs) for f in run.failures] == [(5, {"index": 5})]
    assert "task 5 always fails" in run.failures[0].error
    assert run.n_done == 7 and "3 threads" in run.where


def _offset_square(index: int, offset: int) -> int:
    return offset + index * index


def test_run_tasks_in_process_on_threads_passes_shared_and_keeps_order() -> None:
    inputs = [{"index": i} for i in range(6)]
    runs = [
        run_tasks(
            _offset_square, inputs, workers=0, progress=False, shared={"offset": 10}, threads=t
        )
        for t in (1, 3)
    ]
    assert runs[0].results == runs[1].results == [10, 11, 14, 19, 26, 35]
    assert runs[0].where == "in-process" and "3 threads" in runs[1].where


@pytest.mark.parametrize("threads", [0, 1])
def test_one_thread_or_none_runs_in_order_in_this_thread(threads) -> None:
    where = []
    run = run_in_threads(
        lambda index: where.append(threading.get_ident()) or index,
        [{"index": i} for i in range(4)],
        threads=threads,
    )
    assert run.results == [0, 1, 2, 3] and set(where) == {threading.get_ident()}
