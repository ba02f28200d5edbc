"""Studies on the task runner beyond recovery: bootstrap refits (chunks of replications),
contest sweeps (lines of the grid) and the worker processes' single-threaded environment.

Every cluster here is a real Dask LocalCluster of two worker processes on 127.0.0.1, started
by ``distributed.dask_client`` (so with the workers' environment stopwise sets) and closed by
this module. Time is bounded: the cluster must start within ``CLUSTER_START_S`` (the
runner's own bound) and every test that waits on the cluster raises TimeoutError after
``DEADLINE_S`` seconds (SIGALRM), so a hung cluster fails the test instead of the session.
The check is serial against distributed on the same inputs: equal to 1e-12.
"""

from __future__ import annotations

import json
import os
import signal
import sys
from collections.abc import Iterator
from typing import Any

import cloudpickle
import jax
import numpy as np
import pandas as pd
import pytest

import stopwise
from benchmarks import study_sbc
from stopwise import cli, contest
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation import distributed as D
from stopwise.estimation.ml.compare import cv_log_score
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.sweep_grid import grid_lines, grid_settings

DEADLINE_S = 300
EXACT = 1e-12

# The workers cannot import this test module: ship its functions to them by value.
cloudpickle.register_pickle_by_value(sys.modules[__name__])


@pytest.fixture
def deadline() -> Iterator[None]:
    """TimeoutError in this test after DEADLINE_S seconds."""

    def expire(signum: int, frame: Any) -> None:
        raise TimeoutError(f"the test took more than {DEADLINE_S} s")

    previous = signal.signal(signal.SIGALRM, expire)
    signal.alarm(DEADLINE_S)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)


@pytest.fixture(scope="module")
def address() -> Iterator[str]:
    """A two-worker LocalCluster on the loopback interface, as the runner starts it, from a
    parent environment without glibc's malloc settings (a cluster another test module starts
    with Dask's defaults leaves them in this process's environment)."""
    with pytest.MonkeyPatch.context() as patch:
        for name in D.MALLOC_SETTINGS:
            patch.delenv(name, raising=False)
        with D.dask_client(D.Plan("local", workers=2)) as client:
            address = client.scheduler.address
            assert address.startswith(f"tcp://{D.LOOPBACK}:")
            yield address


def test_worker_environment_adds_single_thread_flags_to_the_parents() -> None:
    env = D.worker_environment({"XLA_FLAGS": "--xla_force_host_platform_device_count=4"})
    flags = env["XLA_FLAGS"].split()
    assert flags[0] == "--xla_force_host_platform_device_count=4"  # the parent's flag kept
    assert set(D.SINGLE_THREAD_XLA_FLAGS) <= set(flags)
    assert all(env[name] == "1" for name in ("OMP_NUM_THREADS", "MKL_NUM_THREADS"))
    # a flag the parent already sets is not overridden nor repeated
    own = D.worker_environment({"XLA_FLAGS": "--xla_cpu_multi_thread_eigen=true"})
    assert own["XLA_FLAGS"].split().count("--xla_cpu_multi_thread_eigen=true") == 1
    assert "--xla_cpu_multi_thread_eigen=false" not in own["XLA_FLAGS"]
    assert D.worker_environment({})["XLA_FLAGS"].split() == list(D.SINGLE_THREAD_XLA_FLAGS)


def test_pre_spawn_environment_drops_only_the_malloc_settings() -> None:
    configured = {"MALLOC_TRIM_THRESHOLD_": 65536, "OMP_NUM_THREADS": 1, "MY_SETTING": "x"}
    assert D.pre_spawn_environment(configured) == {"OMP_NUM_THREADS": 1, "MY_SETTING": "x"}


def _environment_seen(name: str) -> str:
    """A worker's value of environment variable ``name``."""
    return os.environ.get(name, "")


def test_cluster_workers_run_single_threaded(address: str, deadline: None) -> None:
    names = ["XLA_FLAGS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"]
    names += list(D.MALLOC_SETTINGS)
    run = D.run_tasks(
        _environment_seen, [{"name": n} for n in names], scheduler=address, progress=False
    )
    seen = dict(zip(names, run.results))
    assert set(D.SINGLE_THREAD_XLA_FLAGS) <= set(seen["XLA_FLAGS"].split())
    assert seen["OMP_NUM_THREADS"] == seen["MKL_NUM_THREADS"] == "1"
    assert seen["OPENBLAS_NUM_THREADS"] == "1"
    # glibc keeps its dynamic mmap threshold in the workers (Dask's nanny would set
    # MALLOC_TRIM_THRESHOLD_, which turns it off: mallopt(3), Linux man-pages), and starting
    # the cluster did not write the setting into this process's environment either
    assert all(seen[name] == "" for name in D.MALLOC_SETTINGS)
    assert not any(name in os.environ for name in D.MALLOC_SETTINGS)


def _frame() -> pd.DataFrame:
    model = stopwise.model("linear+myopic+logit")
    design = stopping_design(12, 10, (0.7, 0.9), 1.0, seed=3)
    return model.simulate({"precision": 1.5}, design, jax.random.PRNGKey(5))


def _bootstrap_fit(frame: pd.DataFrame, **where: Any) -> Any:
    return stopwise.fit(
        "linear+myopic+logit",
        frame,
        se="bootstrap",
        bootstrap_reps=20,  # 2 chunks of 16, the second padded
        starts=1,
        progress=False,
        **where,
    )


def test_bootstrap_chunks_on_a_cluster_equal_the_serial_run(address: str, deadline: None) -> None:
    frame = _frame()
    serial = _bootstrap_fit(frame, workers=0)
    remote = _bootstrap_fit(frame, scheduler=address)
    info_s, info_r = serial.extras["bootstrap"], remote.extras["bootstrap"]
    assert info_s["replications"] == info_r["replications"] == 20
    assert "in-process" in info_s["parallelism"]
    assert f"scheduler at {address}" in info_r["parallelism"]
    assert info_r["converged"] == info_s["converged"] > 0
    np.testing.assert_allclose(info_r["z"], info_s["z"], rtol=0, atol=EXACT)
    np.testing.assert_allclose(remote.table.se, serial.table.se, rtol=0, atol=EXACT)
    np.testing.assert_allclose(remote.table.ci_low, serial.table.ci_low, rtol=0, atol=EXACT)
    assert np.all(np.isfinite(serial.table.se)) and np.all(serial.table.se > 0)


def test_grid_lines_follow_the_swept_axis() -> None:
    axis, points = grid_settings([0.8, 0.85, 0.9], [5.0, 10.0])
    assert axis == "p_survive"
    assert grid_lines(axis, points) == [
        [(0.8, 5.0), (0.85, 5.0), (0.9, 5.0)],
        [(0.8, 10.0), (0.85, 10.0), (0.9, 10.0)],
    ]
    axis, points = grid_settings([0.9], [1.0, 2.0, 3.0])
    assert axis == "prize" and grid_lines(axis, points) == [points]


def test_sweep_lines_on_a_cluster_equal_the_serial_run(address: str, deadline: None) -> None:
    grid = dict(p_survive=[0.8, 0.83, 0.86, 0.89], prize=[2.0, 5.0, 10.0], players=2)
    serial = contest.sweep(**grid, workers=0)
    remote = contest.sweep(**grid, scheduler=address)
    assert len(serial) == 12 and serial["certified"].all()
    numbers = serial.select_dtypes("number").columns
    pd.testing.assert_frame_equal(
        remote[numbers], serial[numbers], check_exact=False, rtol=0, atol=EXACT
    )
    assert remote["method"].tolist() == serial["method"].tolist()
    # the first point of every line has no neighbour, every other point has one
    first = serial.groupby("prize")["tv_prev"].apply(lambda tv: bool(np.isnan(tv.iloc[0])))
    assert first.all() and serial["tv_prev"].notna().sum() == 9


def test_sweep_command_takes_the_cluster_options(capsys: pytest.CaptureFixture[str]) -> None:
    argv = ["sweep", "--p-survive", "0.8,0.85", "--prize", "5", "--players", "2", "--quiet"]
    assert cli.main([*argv, "--workers", "0"]) == 0
    assert cli.main([*argv, "--workers", "-1"]) == 2
    assert "expected a whole number >= 0" in capsys.readouterr().err


def test_sbc_keys_follow_the_sequential_chain() -> None:
    # The keys drawn up front equal those the former in-process loop drew one by one, so
    # earlier SBC tables stay reproducible.
    key = jax.random.PRNGKey(study_sbc.SEED)
    chain = []
    for _ in range(5):
        key, k_rep = jax.random.split(key)
        chain.append(np.asarray(k_rep))
    np.testing.assert_array_equal(np.stack(study_sbc.replication_keys(5)), np.stack(chain))


@pytest.mark.slow
def test_sbc_replications_on_a_cluster_equal_the_serial_run(
    address: str, deadline: None, tmp_path
) -> None:
    # the in-process run checkpoints into tmp_path, never over the study's saved results
    tiny = study_sbc.Sampling(chains=1, warmup=30, draws=40, thin=2, kept=19)
    saved = tmp_path / "sbc.json"
    serial = study_sbc.run("crra+logit", 2, workers=0, sampling=tiny, saved=str(saved))
    assert json.loads(saved.read_text())["sampling"] == tiny.__dict__
    remote = study_sbc.run("crra+logit", 2, scheduler=address, sampling=tiny)
    assert serial["failed"] == remote["failed"] == []
    assert serial["where"] == "in-process" and address in remote["where"]
    assert remote["ranks"] == serial["ranks"]  # whole numbers: equal, not close
    assert all(0 <= v <= tiny.kept for values in serial["ranks"].values() for v in values)


@pytest.mark.parametrize("n_tasks, n_workers", [(200, 2), (7, 2), (3, 100), (1, 1), (0, 4)])
def test_batches_cover_every_task_once_in_order(n_tasks: int, n_workers: int) -> None:
    bounds = D.batch_bounds(n_tasks, n_workers)
    covered = [i for a, b in bounds for i in range(a, b)]
    assert covered == list(range(n_tasks))
    assert len(bounds) <= max(1, n_workers) * D.BATCHES_PER_WORKER
    if n_tasks >= n_workers * D.BATCHES_PER_WORKER:  # enough tasks: every worker gets work
        assert len(bounds) >= n_workers * (D.BATCHES_PER_WORKER - 1)


def test_cv_folds_on_a_cluster_equal_the_serial_run(address: str, deadline: None) -> None:
    model = stopwise.model("linear+myopic+logit")
    data = to_stopping_data(_frame())
    serial = cv_log_score(model, data, folds=3, seed=4, starts=1, workers=0)
    remote = cv_log_score(model, data, folds=3, seed=4, starts=1, scheduler=address)
    assert all(serial.fold_converged) and np.isfinite(serial.score)
    assert remote.fold_converged == serial.fold_converged and remote.warnings == []
    np.testing.assert_allclose(remote.fold_logliks, serial.fold_logliks, rtol=0, atol=EXACT)
    assert abs(remote.score - serial.score) <= EXACT
