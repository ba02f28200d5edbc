"""The task runner (estimation/distributed.py): where a study runs, retries and failure
reports, and a real Dask LocalCluster on 127.0.0.1 (started and closed by this module)
giving the same recovery study as the in-process run, also when a worker dies mid-study.

The cluster tests are bounded in time: the cluster must start within CLUSTER_START_S and a
study's results must arrive within STUDY_TIMEOUT_S (TimeoutError otherwise)."""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import cloudpickle
import dask
import pandas as pd
import pytest
from dask.distributed import Client, LocalCluster
from test_arrow_screen import _clean_frame, _write

import stopwise
from stopwise import cli
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation import distributed as D
from stopwise.estimation.ml.counts import merge_counts
from stopwise.estimation.ml.recovery import recover, stopping_design
from stopwise.partitioned import count_parts

CLUSTER_START_S = 120
STUDY_TIMEOUT_S = 300
TRUTH = {"precision": 1.5}

# The workers cannot import this test module: ship its functions to them by value.
cloudpickle.register_pickle_by_value(sys.modules[__name__])


def test_plan_follows_the_documented_order(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv(D.SCHEDULER_ENV, "tcp://10.1.2.3:8786")
    assert D.plan_for(0, None, 100).kind == "in-process"  # --workers 0 beats the variable
    assert D.plan_for(3, None, 100) == D.Plan("local", workers=3)
    assert D.plan_for(None, None, 100) == D.Plan("remote", address="tcp://10.1.2.3:8786")
    assert D.plan_for(0, "tcp://h:1", 5) == D.Plan("remote", address="tcp://h:1")
    monkeypatch.delenv(D.SCHEDULER_ENV)
    monkeypatch.setattr(os, "cpu_count", lambda: 4)
    assert D.plan_for(None, None, D.AUTO_MIN_TASKS - 1).kind == "in-process"
    assert D.plan_for(None, None, D.AUTO_MIN_TASKS) == D.Plan("local", workers=4, auto=True)
    with pytest.raises(ValueError):
        D.plan_for(-1, None, 3)


def test_auto_spreads_when_the_work_left_reaches_the_threshold() -> None:
    limit, timed = D.AUTO_CLUSTER_MIN_S, D.AUTO_TIMED_TASKS
    tenth = [limit / 10] * timed
    assert D.worth_spreading(tenth, 10)  # 10 tasks of limit/10 left
    assert not D.worth_spreading(tenth, 9)
    assert not D.worth_spreading(tenth[1:], 1000)  # too few tasks timed yet
    assert not D.worth_spreading([limit] * timed, 0)  # nothing left
    # one task that compiled again does not decide it: the median does
    assert not D.worth_spreading([limit] + [limit / 1000] * (timed - 1), 100)


def _tagged(index: int) -> tuple[int, int]:
    """(10 * index, the process that ran the task); tasks 1 and 6 always fail."""
    if index in (1, 6):
        raise ValueError(f"bad input for task {index}")
    return 10 * index, os.getpid()


def _auto_run(monkeypatch: pytest.MonkeyPatch, n_tasks: int, threads: int = 1) -> D.StudyRun:
    monkeypatch.delenv(D.SCHEDULER_ENV, raising=False)
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    assert D.plan_for(None, None, n_tasks).auto
    return D.run_tasks(
        _tagged,
        [{"index": i} for i in range(n_tasks)],
        workers=None,
        progress=False,
        timeout_s=STUDY_TIMEOUT_S,
        threads=threads,
    )


@pytest.mark.parametrize("threads", [1, 2])
def test_auto_keeps_a_short_study_in_process(monkeypatch: pytest.MonkeyPatch, threads: int) -> None:
    def no_cluster(plan: D.Plan) -> Any:
        raise AssertionError("a study of milliseconds started a cluster")

    monkeypatch.setattr(D, "dask_client", no_cluster)
    run = _auto_run(monkeypatch, D.AUTO_MIN_TASKS + 4, threads)
    assert run.where.startswith("in-process")
    assert [f.index for f in run.failures] == [1, 6]
    assert [r[0] for r in run.results if r] == [10 * i for i in range(20) if i not in (1, 6)]
    assert {r[1] for r in run.results if r} == {os.getpid()}


@pytest.mark.parametrize("threads", [1, 2])
def test_auto_sends_the_rest_of_a_long_study_to_the_cluster(
    cluster: Any, monkeypatch: pytest.MonkeyPatch, threads: int
) -> None:
    """With the threshold at 0 s the first AUTO_TIMED_TASKS + 1 rounds of ``threads`` tasks
    run here (all but the first round timed) and the rest on the cluster (the module's,
    standing in for the one auto starts)."""
    started: list[D.Plan] = []

    @contextmanager
    def module_cluster(plan: D.Plan) -> Iterator[Any]:
        started.append(plan)
        with Client(cluster.scheduler_address, timeout=D.CONNECT_TIMEOUT_S) as client:
            yield client

    monkeypatch.setattr(D, "dask_client", module_cluster)
    monkeypatch.setattr(D, "AUTO_CLUSTER_MIN_S", 0.0)
    run = _auto_run(monkeypatch, D.AUTO_MIN_TASKS + 4, threads)
    assert started == [D.Plan("local", workers=2, auto=True)]
    head = (D.AUTO_TIMED_TASKS + 1) * threads
    assert run.where.startswith(f"tasks 0-{head - 1} in-process, the rest on a LocalCluster of 2")
    assert run.n_tasks == 20 and [f.index for f in run.failures] == [1, 6]
    assert "bad input for task 6" in run.failures[1].error
    assert [r[0] for r in run.results if r] == [10 * i for i in range(20) if i not in (1, 6)]
    here = [i for i, r in enumerate(run.results) if r and r[1] == os.getpid()]
    assert here == [i for i in range(head) if i not in (1, 6)]  # the rest ran on workers


def test_task_seeds_depend_only_on_study_seed_and_index() -> None:
    seeds = [D.task_seed(7, i) for i in range(50)]
    assert len(set(seeds)) == 50
    assert seeds == [D.task_seed(7, i) for i in range(50)]
    assert D.task_seed(8, 0) != D.task_seed(7, 0)


def _count_and_fail(index: int, log: str) -> int:
    """Append a line to ``log`` on every attempt; task 1 always fails."""
    with open(log, "a") as fh:
        fh.write(f"{index}\n")
    if index == 1:
        raise ValueError("bad input for task 1")
    return index * 10


def test_in_process_failure_is_retried_once_then_reported(tmp_path: Path) -> None:
    log = tmp_path / "attempts.txt"
    run = D.run_tasks(
        _count_and_fail, [{"index": i, "log": str(log)} for i in range(3)], progress=False
    )
    attempts = log.read_text().split()
    assert attempts.count("1") == 2 and attempts.count("0") == 1
    assert run.results == [0, None, 20]
    assert [f.index for f in run.failures] == [1]
    assert run.failures[0].inputs == {"index": 1, "log": str(log)}
    assert "bad input for task 1" in run.failures[0].error
    assert run.summary_line().startswith("2 of 3 tasks ran (in-process); 1 failed")


@pytest.fixture(scope="module")
def cluster() -> Any:
    """Two worker processes, one thread each, on the loopback interface only."""
    with dask.config.set({"distributed.scheduler.allowed-failures": D.RETRIES}):
        local = LocalCluster(
            n_workers=2,
            threads_per_worker=1,
            processes=True,
            host=D.LOOPBACK,
            dashboard_address=None,
            silence_logs=40,
            timeout=CLUSTER_START_S,
        )
    try:
        assert local.scheduler_address.startswith(f"tcp://{D.LOOPBACK}:")
        yield local
    finally:
        local.close()


def _design() -> pd.DataFrame:
    return stopping_design(12, 10, (0.7, 0.9), 1.0, seed=3)


def _bundle(frame: pd.DataFrame, horizon: int | None = None) -> Any:
    return to_stopping_data(frame, horizon=horizon)


def _recovery(scheduler: str | None, to_bundle: Any) -> Any:
    return recover(
        stopwise.model("linear+myopic+logit"),
        TRUTH,
        _design(),
        to_bundle,
        n_reps=4,
        seed=11,
        se="hessian",
        progress=False,
        workers=0 if scheduler is None else None,
        scheduler=scheduler,
        timeout_s=STUDY_TIMEOUT_S,
    )


@pytest.fixture(scope="module")
def serial_study() -> Any:
    return _recovery(None, _bundle)


def test_distributed_recovery_equals_serial(cluster: Any, serial_study: Any) -> None:
    remote = _recovery(cluster.scheduler_address, _bundle)
    assert remote.run.complete and remote.run.n_done == 4
    assert "scheduler at tcp://127.0.0.1:" in remote.run.where
    pd.testing.assert_frame_equal(remote.estimates, serial_study.estimates)
    assert serial_study.run.where == "in-process"


def test_worker_killed_mid_study_still_completes(
    cluster: Any, serial_study: Any, tmp_path: Path
) -> None:
    marker = str(tmp_path / "killed-once")

    def bundle_or_die(frame: pd.DataFrame, horizon: int | None = None) -> Any:
        """The first conversion anywhere kills its worker process; every later one works."""
        if not os.path.exists(marker):
            with open(marker, "w") as fh:
                fh.write(str(os.getpid()))
            os._exit(1)
        return to_stopping_data(frame, horizon=horizon)

    remote = _recovery(cluster.scheduler_address, bundle_or_die)
    assert os.path.exists(marker)  # a worker really died
    assert remote.run.complete and remote.run.n_done == 4
    assert sorted(remote.estimates["rep"].unique()) == [0, 1, 2, 3]
    pd.testing.assert_frame_equal(remote.estimates, serial_study.estimates)


def test_cluster_failure_is_reported_with_inputs(cluster: Any, tmp_path: Path) -> None:
    log = tmp_path / "attempts.txt"
    run = D.run_tasks(
        _raise_for_one,
        [{"index": i, "log": str(log)} for i in range(3)],
        scheduler=cluster.scheduler_address,
        progress=False,
        timeout_s=STUDY_TIMEOUT_S,
    )
    assert run.results == [0, None, 20]
    assert [f.index for f in run.failures] == [1]
    assert "bad input for task 1" in run.failures[0].error
    assert log.read_text().split().count("1") == 2  # tried, then retried once


def _raise_for_one(index: int, log: str) -> int:
    """As _count_and_fail (a second copy, so the two tests share no attempt log)."""
    with open(log, "a") as fh:
        fh.write(f"{index}\n")
    if index == 1:
        raise ValueError("bad input for task 1")
    return index * 10


def test_api_recover_passes_workers_through() -> None:
    result = stopwise.recover(
        "linear+myopic+logit", TRUTH, n_reps=2, subjects=6, trials=6, workers=0, progress=False
    )
    assert result.to_dict()["replications"] == {
        "requested": 2,
        "ran": 2,
        "where": "in-process",
        "failed": [],
    }


def test_recover_command_reports_how_many_replications_ran(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "recovery.json"
    argv = ["recover", "--model", "linear+myopic+logit", "--set", "precision=1.5", "--reps", "3"]
    argv += ["--subjects", "6", "--trials", "6", "--workers", "0", "--no-progress"]
    code = cli.main([*argv, "--json", str(out)])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    record = json.loads(out.read_text())["replications"]
    assert record["requested"] == record["ran"] == 3 and record["failed"] == []
    assert cli.main([*argv[:-3], "--workers", "-1"]) == 2
    assert "expected a whole number >= 0" in capsys.readouterr().err


def test_parquet_parts_counted_on_the_cluster_equal_the_in_process_pass(
    cluster: Any, tmp_path: Path
) -> None:
    """The fit's data pass over a Parquet folder (validate and count every part) sent to the
    cluster's workers: the same report and the same merged counts as in this process, and
    the same pooled fit (issue 17, item 1; count tables travel back as integer codes)."""
    _write(_clean_frame(n_subjects=8, n_trials=9, seed=6), tmp_path / "parts")
    here_report, here = count_parts(tmp_path / "parts", workers=0)
    there_report, there = count_parts(tmp_path / "parts", scheduler=cluster.scheduler_address)
    assert there_report.ok and there_report.to_dict() == here_report.to_dict()
    pd.testing.assert_frame_equal(merge_counts(there), merge_counts(here))
    options = {"se": "robust", "starts": 1, "progress": False}
    local = stopwise.fit("crra+myopic+logit", tmp_path / "parts", workers=0, **options)
    remote = stopwise.fit(
        "crra+myopic+logit", tmp_path / "parts", scheduler=cluster.scheduler_address, **options
    )
    assert remote.loglik == local.loglik
    pd.testing.assert_frame_equal(remote.params, local.params)
