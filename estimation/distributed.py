"""Run a study's independent tasks in-process or on Dask distributed.

A study (recovery replications, bootstrap refits, a comparison grid, a sweep) is a list of
tasks ``func(**inputs_i)``, i = 0..n-1. Every task carries everything it needs in its inputs
(its seed is derived from the study seed and its index, ``task_seed``), so a task's result
never depends on where or in which order it runs: serial and distributed runs agree exactly.

Where the tasks run (``plan_for``), first match wins:

1. ``scheduler="tcp://host:port"``: an existing Dask cluster;
2. ``workers=0``: in-process, one task after another (or on ``threads`` threads, for
   callers whose tasks release the GIL: ``run_in_threads``);
3. ``workers=N >= 1``: a LocalCluster of N worker processes (one thread each) that listens on
   127.0.0.1 only and is closed when the study ends; each worker process runs XLA, OpenMP,
   MKL and OpenBLAS single-threaded (``worker_environment``), so N workers use N cores and
   do not fight over them, and glibc's malloc keeps its defaults (``pre_spawn_environment``);
4. the environment variable ``STOPWISE_SCHEDULER``: an existing Dask cluster;
5. ``workers=None`` ("auto"): a LocalCluster sized to the machine when it has more than one
   core and the study has at least ``AUTO_MIN_TASKS`` tasks, else in-process. An "auto"
   cluster is started only when the study's work pays for it (``run_then_spread``): the
   tasks run in-process (in rounds of ``threads`` tasks) until the median time per task of
   the rounds timed so far (the first round excluded: it compiles; at least
   ``AUTO_TIMED_TASKS`` rounds) times the number left reaches ``AUTO_CLUSTER_MIN_S``; the
   rest then goes to the cluster. A study of a few seconds of work never waits for workers to
   start and compile (a 200-replication recovery study, 3 s of work, ran at 0.6-0.9x
   the in-process speed on 2 fresh workers; benchmarks/RESULTS.md, issue 17 (b)).

On a cluster the tasks travel in consecutive batches, about ``BATCHES_PER_WORKER`` per
worker (``batch_bounds``), so short tasks do not pay Dask's per-task overhead one by one.
A task that raises is run once more (``retries=1``); a batch whose worker dies is moved to
another worker once (the scheduler's ``allowed-failures`` = 1). A task that still fails is
reported with its index, inputs and error in ``StudyRun.failures``; no task is dropped
silently (``StudyRun.summary_line`` says how many ran).
"""

from __future__ import annotations

import math
import os
import sys
import time
import traceback
from collections.abc import Callable, Iterator, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from tqdm import tqdm

SCHEDULER_ENV = "STOPWISE_SCHEDULER"
AUTO_MIN_TASKS = 16
# "auto" starts a LocalCluster only for the rest of a study estimated at this many seconds or
# more in-process: about 3x what starting 2 fresh workers and compiling on them cost here
# (7 s; benchmarks/RESULTS.md, issue 17 (b)), so the cluster's start is repaid with a margin.
AUTO_CLUSTER_MIN_S = 20.0
AUTO_TIMED_TASKS = 3  # rounds of tasks timed in-process (after the first) before "auto" decides
LOOPBACK = "127.0.0.1"
CONNECT_TIMEOUT_S = 30
CLUSTER_START_S = 120  # a LocalCluster's workers must be up within this many seconds
RETRIES = 1
BATCHES_PER_WORKER = 4  # tasks go to a cluster in about this many batches per worker
# XLA's CPU flags for one thread per worker: no multithreaded Eigen, one intra-op thread.
SINGLE_THREAD_XLA_FLAGS = ("--xla_cpu_multi_thread_eigen=false", "intra_op_parallelism_threads=1")
SINGLE_THREAD_LIBRARIES = ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS")
# Dask's nannies set glibc's MALLOC_TRIM_THRESHOLD_ before a worker starts. Setting it turns
# off glibc's dynamic mmap threshold (mallopt(3)), so every allocation above 128 KiB is a fresh
# mmap and munmap: a recovery replication cost 1.4-1.8x more CPU in such a worker
# (benchmarks/RESULTS.md, issue 17 (b)). The clusters we start leave it unset.
MALLOC_SETTINGS = ("MALLOC_TRIM_THRESHOLD_",)


@dataclass(frozen=True)
class Plan:
    """Where a study runs: ``kind`` is "in-process", "local" (a LocalCluster we start) or
    "remote" (an existing scheduler at ``address``)."""

    kind: str
    workers: int = 0
    address: str | None = None
    auto: bool = False  # a "local" plan chosen by rule 5: started only if the work pays for it

    def describe(self) -> str:
        if self.kind == "in-process":
            return "in-process"
        if self.kind == "local":
            return f"a LocalCluster of {self.workers} worker process(es) on {LOOPBACK}"
        return f"the Dask scheduler at {self.address}"


@dataclass(frozen=True)
class TaskFailure:
    """A task that failed on every attempt: its index, inputs and the last error."""

    index: int
    inputs: dict[str, Any]
    error: str

    def describe(self) -> str:
        shown = ", ".join(f"{k}={v!r}" for k, v in self.inputs.items() if k != "payload")
        return f"task {self.index} ({shown}): {self.error}"


@dataclass
class StudyRun:
    """The results of a study's tasks in task order (None where a task failed)."""

    results: list[Any]
    failures: list[TaskFailure] = field(default_factory=list)
    where: str = "in-process"

    @property
    def n_tasks(self) -> int:
        return len(self.results)

    @property
    def n_done(self) -> int:
        return self.n_tasks - len(self.failures)

    @property
    def complete(self) -> bool:
        return not self.failures

    def summary_line(self, what: str = "tasks") -> str:
        line = f"{self.n_done} of {self.n_tasks} {what} ran ({self.where})"
        if self.failures:
            line += f"; {len(self.failures)} failed after a retry: " + "; ".join(
                f.describe() for f in self.failures
            )
        return line


def task_seed(study_seed: int, index: int) -> int:
    """A task's own seed: the first 32-bit word of numpy's SeedSequence([study_seed, index])
    (independent streams per index; never from worker state)."""
    return int(np.random.SeedSequence([int(study_seed), int(index)]).generate_state(1)[0])


def plan_for(workers: int | None, scheduler: str | None, n_tasks: int) -> Plan:
    """Where the study runs (module docstring, rules 1-5)."""
    if workers is not None and workers < 0:
        raise ValueError(f"workers must be >= 0, got {workers}")
    if scheduler:
        return Plan("remote", address=scheduler)
    if workers == 0:
        return Plan("in-process")
    if workers is not None:
        return Plan("local", workers=int(workers))
    env = os.environ.get(SCHEDULER_ENV, "").strip()
    if env:
        return Plan("remote", address=env)
    cores = os.cpu_count() or 1
    if cores > 1 and n_tasks >= AUTO_MIN_TASKS:
        return Plan("local", workers=min(cores, n_tasks), auto=True)
    return Plan("in-process")


def run_tasks(
    func: Callable[..., Any],
    inputs: Sequence[Mapping[str, Any]],
    *,
    workers: int | None = 0,
    scheduler: str | None = None,
    progress: bool = True,
    desc: str = "tasks",
    timeout_s: float | None = None,
    shared: Mapping[str, Any] | None = None,
    threads: int = 1,
) -> StudyRun:
    """Run ``func(**inputs[i], **shared)`` for every i where ``plan_for`` says; results in
    task order. ``func`` is sent to the workers (module-level functions travel by
    reference). ``shared`` values (a model, a design) are sent once to every worker and
    reused there by all its tasks, so compiled programs keyed on them are reused too.
    ``timeout_s`` bounds the wait for a cluster's results (TimeoutError beyond it).
    ``threads``: when the plan is in-process (or "auto", for the tasks it runs in-process),
    run the tasks on that many threads (``run_in_threads``; for tasks that release the GIL)."""
    plan = plan_for(workers, scheduler, len(inputs))
    shared = dict(shared or {})
    if plan.kind == "in-process" or not inputs:
        return run_in_threads(func, inputs, threads, progress, desc, shared)
    if plan.auto:
        return run_then_spread(func, inputs, shared, plan, progress, desc, timeout_s, threads)
    with dask_client(plan) as client:
        return _run_on_client(
            client, func, inputs, shared, progress, desc, plan.describe(), timeout_s
        )


def _error_text(exc: BaseException) -> str:
    return "".join(traceback.format_exception_only(type(exc), exc)).strip()


def attempt_task(
    func: Callable[..., Any], inputs: Mapping[str, Any], shared: Mapping[str, Any]
) -> tuple[bool, Any]:
    """(True, func(**inputs, **shared)), tried once more after an exception; (False, the
    error's text) when the retry fails too."""
    for attempt in range(RETRIES + 1):
        try:
            return True, func(**inputs, **shared)
        except Exception as exc:  # a task's failure is reported, not fatal to the study
            if attempt == RETRIES:
                return False, _error_text(exc)
    raise AssertionError("unreachable")


def collect(
    outcomes: Iterator[tuple[bool, Any]], inputs: Sequence[Mapping[str, Any]], where: str
) -> StudyRun:
    """A StudyRun from the tasks' outcomes, in task order."""
    results: list[Any] = [None] * len(inputs)
    failures = []
    for i, (ok, value) in enumerate(outcomes):
        if ok:
            results[i] = value
        else:
            failures.append(TaskFailure(i, dict(inputs[i]), value))
    return StudyRun(results, failures, where)


def _run_in_process(
    func: Callable[..., Any],
    inputs: Sequence[Mapping[str, Any]],
    shared: Mapping[str, Any],
    progress: bool,
    desc: str,
) -> StudyRun:
    outcomes = (
        attempt_task(func, inputs[i], shared)
        for i in tqdm(range(len(inputs)), desc=desc, file=sys.stderr, disable=not progress)
    )
    return collect(outcomes, inputs, "in-process")


def run_in_threads(
    func: Callable[..., Any],
    inputs: Sequence[Mapping[str, Any]],
    threads: int,
    progress: bool = False,
    desc: str = "tasks",
    shared: Mapping[str, Any] | None = None,
) -> StudyRun:
    """The tasks in this process on ``threads`` threads (for tasks that spend their time in
    code that releases the GIL: reading and checking Parquet parts with pyarrow and numpy);
    one thread: one task after another in the caller's thread. Same retry and failure rules
    either way; results in task order, so they equal the one-thread run's."""
    shared = dict(shared or {})
    if threads <= 1 or len(inputs) <= 1:
        return _run_in_process(func, inputs, shared, progress, desc)
    with ThreadPoolExecutor(max_workers=threads) as pool:
        running = pool.map(lambda task: attempt_task(func, task, shared), inputs)
        outcomes = tqdm(
            running, total=len(inputs), desc=desc, file=sys.stderr, disable=not progress
        )
        return collect(iter(outcomes), inputs, f"in-process, {threads} threads")


def worth_spreading(warm_seconds: Sequence[float], tasks_left: int) -> bool:
    """True when at least AUTO_TIMED_TASKS rounds were timed after the first
    (``warm_seconds``: each round's wall time per task) and the tasks left, each taking their
    median, add up to AUTO_CLUSTER_MIN_S or more: median(warm) * tasks_left >= that. The
    median, because a task that meets a new data shape compiles again (the second replication
    of a recovery study took more than 0.1 s against 15 ms for the others)."""
    if len(warm_seconds) < AUTO_TIMED_TASKS or tasks_left <= 0:
        return False
    return float(np.median(warm_seconds)) * tasks_left >= AUTO_CLUSTER_MIN_S


def attempt_round(
    func: Callable[..., Any],
    tasks: Sequence[Mapping[str, Any]],
    shared: Mapping[str, Any],
    threads: int,
) -> list[tuple[bool, Any]]:
    """``attempt_task`` for each task, on ``threads`` threads (one: in the caller's thread)."""
    if threads <= 1 or len(tasks) <= 1:
        return [attempt_task(func, task, shared) for task in tasks]
    with ThreadPoolExecutor(max_workers=threads) as pool:
        return list(pool.map(lambda task: attempt_task(func, task, shared), tasks))


def run_then_spread(
    func: Callable[..., Any],
    inputs: Sequence[Mapping[str, Any]],
    shared: Mapping[str, Any],
    plan: Plan,
    progress: bool,
    desc: str,
    timeout_s: float | None,
    threads: int = 1,
) -> StudyRun:
    """An "auto" plan (module docstring, rule 5): the tasks in-process, in rounds of
    ``threads`` tasks (one thread each; one round at a time), until ``worth_spreading`` says
    the rest pays for starting ``plan``'s cluster; the rest there. Results in task order,
    equal to the in-process run's (every task is seeded by its index)."""
    outcomes: list[tuple[bool, Any]] = []
    warm_seconds: list[float] = []
    size = max(1, threads)
    with tqdm(total=len(inputs), desc=desc, file=sys.stderr, disable=not progress) as bar:
        for a in range(0, len(inputs), size):
            tasks = inputs[a : a + size]
            started = time.perf_counter()
            outcomes += attempt_round(func, tasks, shared, threads)
            if a:
                warm_seconds.append((time.perf_counter() - started) / len(tasks))
            bar.update(len(tasks))
            if worth_spreading(warm_seconds, len(inputs) - len(outcomes)):
                break
    first = len(outcomes)
    head = collect(iter(outcomes), inputs[:first], "in-process")
    if first == len(inputs):
        return StudyRun(
            head.results, head.failures, "in-process: too little work to pay for starting workers"
        )
    where = f"tasks 0-{first - 1} in-process, the rest on {plan.describe()}"
    with dask_client(plan) as client:
        tail = _run_on_client(
            client, func, inputs, shared, progress, desc, where, timeout_s, first=first
        )
    results = head.results + tail.results[first:]
    return StudyRun(results, head.failures + tail.failures, where)


def batch_bounds(n_tasks: int, n_workers: int) -> list[tuple[int, int]]:
    """Consecutive task ranges [a, b) sent to a worker as one Dask task: about
    BATCHES_PER_WORKER batches per worker, so a study of many short tasks pays Dask's
    per-task overhead once per batch, not once per task (and a long study still spreads
    over every worker)."""
    size = max(1, math.ceil(n_tasks / (max(1, n_workers) * BATCHES_PER_WORKER)))
    return [(a, min(a + size, n_tasks)) for a in range(0, n_tasks, size)]


def run_batch(
    func: Callable[..., Any], batch: Sequence[Mapping[str, Any]], shared: Mapping[str, Any]
) -> list[tuple[bool, Any]]:
    """Run func(**inputs, **shared) for each task of a batch, each tried once more after an
    exception: (True, result) or (False, the error's text) per task, in order."""
    return [attempt_task(func, inputs, shared) for inputs in batch]


def _run_on_client(
    client: Any,
    func: Callable[..., Any],
    inputs: Sequence[Mapping[str, Any]],
    shared: Mapping[str, Any],
    progress: bool,
    desc: str,
    where: str,
    timeout_s: float | None = None,
    first: int = 0,
) -> StudyRun:
    """Send tasks ``first``.. in batches (``batch_bounds``); a batch whose worker dies is moved
    to another worker once by the scheduler (allowed-failures), then its tasks are reported.
    The results list has every task's place (None before ``first``)."""
    from dask.distributed import as_completed

    sent = client.scatter(dict(shared), broadcast=True, hash=False) if shared else {}
    n_workers = len(client.scheduler_info()["workers"])
    bounds = [(first + a, first + b) for a, b in batch_bounds(len(inputs) - first, n_workers)]
    futures = [
        client.submit(
            run_batch,
            func,
            [dict(inp) for inp in inputs[a:b]],
            sent,
            retries=RETRIES,
            pure=False,
            key=f"{desc}-{a}-{b}-{id(inputs)}",
        )
        for a, b in bounds
    ]
    range_of = {f.key: ab for f, ab in zip(futures, bounds)}
    results: list[Any] = [None] * len(inputs)
    failures = []
    bar = tqdm(total=len(inputs), initial=first, desc=desc, file=sys.stderr, disable=not progress)
    with bar:
        for future in as_completed(futures, timeout=timeout_s):
            a, b = range_of[future.key]
            if future.status == "finished":
                outcomes = future.result()
            else:
                outcomes = [(False, _error_text(future.exception()))] * (b - a)
            for i, (ok, value) in zip(range(a, b), outcomes):
                if ok:
                    results[i] = value
                else:
                    failures.append(TaskFailure(i, dict(inputs[i]), value))
            bar.update(b - a)
            future.release()
    failures.sort(key=lambda f: f.index)
    return StudyRun(results, failures, where)


def worker_environment(parent: Mapping[str, str]) -> dict[str, str]:
    """Environment variables for a LocalCluster worker process, set by its nanny before the
    worker (and so JAX) starts: the parent's XLA_FLAGS (e.g. a device count) plus
    SINGLE_THREAD_XLA_FLAGS, and OMP/MKL/OPENBLAS_NUM_THREADS = 1. A flag the parent already
    sets is left as the parent set it."""
    flags = parent.get("XLA_FLAGS", "").split()
    names = {f.lstrip("-").split("=")[0] for f in flags}
    flags += [f for f in SINGLE_THREAD_XLA_FLAGS if f.lstrip("-").split("=")[0] not in names]
    env = {name: "1" for name in SINGLE_THREAD_LIBRARIES}
    env["XLA_FLAGS"] = " ".join(flags)
    return env


def pre_spawn_environment(configured: Mapping[str, Any]) -> dict[str, Any]:
    """Dask's ``distributed.nanny.pre-spawn-environ`` for the clusters we start: as configured,
    less MALLOC_SETTINGS (a value in the user's own environment still reaches the workers,
    which inherit it)."""
    return {name: value for name, value in configured.items() if name not in MALLOC_SETTINGS}


@contextmanager
def dask_client(plan: Plan) -> Iterator[Any]:
    """A Dask client for ``plan``: a LocalCluster on the loopback interface (closed on exit)
    or a connection to an existing scheduler (closed on exit; the cluster keeps running)."""
    import dask
    from dask.distributed import Client, LocalCluster

    # The workers' statistical profiler (stack samples every 10 ms, for a dashboard we do not
    # start) cost a LocalCluster's workers about a third of their CPU per recovery
    # replication (benchmarks/RESULTS.md, Dask section): it is off in the clusters we start.
    settings = {"distributed.scheduler.allowed-failures": RETRIES}
    if plan.kind == "local":
        settings["distributed.worker.profile.enabled"] = False
        settings["distributed.nanny.pre-spawn-environ"] = pre_spawn_environment(
            dask.config.get("distributed.nanny.pre-spawn-environ", {})
        )
    with dask.config.set(settings):
        if plan.kind == "remote":
            client = Client(plan.address, timeout=CONNECT_TIMEOUT_S)
            try:
                yield client
            finally:
                client.close()
            return
        cluster = LocalCluster(
            n_workers=plan.workers,
            threads_per_worker=1,
            processes=True,
            host=LOOPBACK,
            dashboard_address=None,
            silence_logs=40,
            env=worker_environment(os.environ),
            timeout=CLUSTER_START_S,
        )
        try:
            with Client(cluster, timeout=CONNECT_TIMEOUT_S) as client:
                yield client
        finally:
            cluster.close()
