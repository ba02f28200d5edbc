"""Out-of-core throughput of the Arrow fast path (issue 17, item 4a), before and after, as
ratios against a bare ``pyarrow`` read of the same folder measured in the same run.

N synthetic decision rows (the invented generator of bench_load, written by bench_dask's
``write_parts`` into a temporary folder that is deleted afterwards; never committed) in
Parquet parts of 500,000 rows; beyond 10^7 rows the generated parts are written again with
new trial ids (``write_folder``), so that 10^8 rows do not take an hour to draw. Measured in this process, in-process (``workers=0``):

- baseline: ``pyarrow.parquet.read_table`` of the 7 decision columns of every part;
- validate the folder: the full pandas validator on every part ("before", ``fast=False``)
  and the Arrow screen ("after", the default; a part it cannot vouch for would still go to
  the full validator);
- the fit's data pass (``count_parts``: validate and count every part), before and after;
- the pooled fit through counts (``fit_parts``, the path ``stopwise.fit`` takes for a
  folder: validate and count every part, certify the reduction, fit), before and after; a
  warm-up fit first, so both timed fits reuse the compiled programs of this process;

and as whole command-line processes (``stopwise validate`` and ``stopwise fit`` on the
folder, each a fresh Python; the fit once without a persistent compilation cache, as the
benchmarks run, and once more with a cache an earlier run filled, as a user's second fit of
the same model and data would): wall seconds, CPU seconds and peak resident
size of that process (``os.wait4``). CPU seconds (user + system, all threads) are given
beside wall seconds: the machine is shared, and the load average is printed with them.
Size: ``STOPWISE_BENCH_PARTS_ROWS`` (default 10,000,000); ``STOPWISE_BENCH_PARTS_BEFORE=0``
skips the "before" rows (for 10^8, where the full validator alone takes many minutes).
"""

from __future__ import annotations

import os
import resource
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow.compute as pc
import pyarrow.parquet as pq

import stopwise
from benchmarks._common import peak_memory_mib
from benchmarks.bench_dask import bare_read, write_parts
from stopwise.api import model_for_data, prepare_model
from stopwise.data_schemas.partitioned import list_parts
from stopwise.partitioned import count_parts, fit_parts, validate_parts

ROWS = int(os.environ.get("STOPWISE_BENCH_PARTS_ROWS", "10000000"))
BEFORE = os.environ.get("STOPWISE_BENCH_PARTS_BEFORE", "1") != "0"
MODEL = "crra+myopic+logit"
GOAL = 0.5  # issue 17: throughput >= 0.5x the bare read
ONE_PASS = (
    "pooled fit through counts (validates every part as it counts: validate + fit in one pass)"
)
BASE_ROWS = 10_000_000  # rows drawn by the generator; beyond them, parts are re-used
TRIAL_OFFSET = 1_000_000  # bench_dask's write_parts offsets part k's trial ids by k x this


@dataclass(frozen=True)
class Timing:
    """Wall and CPU seconds of one step (CPU: user + system of the process doing it)."""

    wall: float
    cpu: float
    peak_mib: float | None = None


def cpu_seconds() -> float:
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def timed(fn: Callable[[], Any]) -> tuple[Any, Timing]:
    t0, c0 = time.perf_counter(), cpu_seconds()
    value = fn()
    return value, Timing(time.perf_counter() - t0, cpu_seconds() - c0)


def write_folder(folder: Path, rows: int) -> int:
    """Up to BASE_ROWS rows from the generator (bench_dask.write_parts); beyond that the
    generated parts are written again with their trial ids moved to those of the new part's
    position (each copy's trials are new (subject, trial) keys). Rows written."""
    written = write_parts(folder, min(rows, BASE_ROWS))
    base = list_parts(folder)
    k = len(base)
    while written < rows:
        source = base[k % len(base)]
        table = pq.read_table(source)  # whole parts only: a cut could split a trial
        shift = (k - k % len(base)) * TRIAL_OFFSET
        trial = pc.add(table.column("trial"), shift)
        table = table.set_column(table.schema.get_field_index("trial"), "trial", trial)
        pq.write_table(table, folder / f"part-{k:05d}.parquet", row_group_size=100_000)
        written += table.num_rows
        k += 1
    return written


# A command process reports its own peak resident size (VmHWM of its address space after
# exec): ``ru_maxrss`` of a child would include the benchmark process's size at the fork.
COMMAND = """
import os, sys
from stopwise.cli import main
code = main(sys.argv[1:])
with open("/proc/self/status", encoding="utf-8") as status:
    peak = next(line.split()[1] for line in status if line.startswith("VmHWM"))
with open(os.environ["STOPWISE_BENCH_PEAK_FILE"], "w", encoding="utf-8") as out:
    out.write(peak)
sys.exit(code)
"""


def run_command(argv: list[str], **env: str) -> tuple[int, Timing]:
    """A whole ``stopwise`` process: exit code, wall, CPU and peak resident size."""
    with tempfile.TemporaryDirectory() as tmp:
        peak_file = Path(tmp) / "peak"
        t0 = time.perf_counter()
        child = subprocess.Popen(
            [sys.executable, "-c", COMMAND, *argv],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            env={**os.environ, **env, "STOPWISE_BENCH_PEAK_FILE": str(peak_file)},
        )
        _, status, usage = os.wait4(child.pid, 0)
        wall = time.perf_counter() - t0
        child.returncode = os.waitstatus_to_exitcode(status)
        peak = int(peak_file.read_text()) / 1024 if peak_file.exists() else float("nan")
    return child.returncode, Timing(wall, usage.ru_utime + usage.ru_stime, peak)


def fit_folder(folder: Path, fast: bool) -> Any:
    """The pooled count fit exactly as ``stopwise.fit(MODEL, folder, se="robust", starts=1,
    workers=0)`` runs it, with the screen on or off."""
    parts = fit_parts(
        stopwise.model(MODEL),
        folder,
        method="mle",
        se="robust",
        by=None,
        formulas=None,
        seed=0,
        kw={"starts": 1, "progress": False},
        prepare=prepare_model,
        workers=0,
        fast=fast,
        shared=lambda bundle: model_for_data(MODEL, None, bundle),
    )
    return parts.fit


def row(label: str, rows: int, t: Timing, base: Timing) -> str:
    return (
        f"| {label} | {t.wall:.2f} | {t.cpu:.2f} | {rows / t.wall:,.0f} | "
        f"{base.wall / t.wall:.3f} | {base.cpu / t.cpu:.3f} |"
    )


def load() -> str:
    return " / ".join(f"{x:.1f}" for x in os.getloadavg())


def measure(folder: Path, rows: int, before: bool) -> list[str]:
    """The table rows and notes of one folder (module docstring)."""
    load_start = load()
    bare_read(folder)  # the page cache holds the files for every timed step alike
    _, base = timed(lambda: bare_read(folder))
    report, v_after = timed(lambda: validate_parts(folder, fast=True))
    _, c_after = timed(lambda: count_parts(folder, fast=True))
    fit_folder(folder, True)  # warm-up: compiles the programs both timed fits reuse
    fit, f_after = timed(lambda: fit_folder(folder, True))
    table = [
        "| step | wall s | CPU s | rows per second (wall) | ratio to bare read (wall) | "
        "ratio to bare read (CPU) |",
        "|---|---|---|---|---|---|",
        row("bare `pyarrow` read of the 7 columns (baseline)", rows, base, base),
    ]
    same = "not compared"
    if before:
        report_before, v_before = timed(lambda: validate_parts(folder, fast=False))
        _, c_before = timed(lambda: count_parts(folder, fast=False))
        fit_before, f_before = timed(lambda: fit_folder(folder, False))
        same = str(
            report_before.to_dict() == report.to_dict()
            and np.array_equal(fit_before.table.estimate, fit.table.estimate)
        )
        table += [
            row("before: validate (full validator on every part)", rows, v_before, base),
            row("before: validate + count every part (the fit's data pass)", rows, c_before, base),
            row(f"before: {ONE_PASS}", rows, f_before, base),
            row("before: validate, then fit (two passes)", rows, add(v_before, f_before), base),
        ]
    table += [
        row("after: validate (Arrow screen)", rows, v_after, base),
        row("after: validate + count every part (the fit's data pass)", rows, c_after, base),
        row(f"after: {ONE_PASS}", rows, f_after, base),
        row(
            "after: validate, then fit (two passes over the folder)",
            rows,
            add(v_after, f_after),
            base,
        ),
    ]
    _, heap = peak_memory_mib(lambda: (validate_parts(folder), fit_folder(folder, True)))
    code_v, cli_v = run_command(["validate", str(folder), "--workers", "0"])
    out = folder.parent / "fit.json"
    argv = ["fit", str(folder), "--model", MODEL, "--se", "robust", "--starts", "1"]
    argv += ["--workers", "0", "--no-progress", "--json", str(out)]
    code_f, cli_f = run_command(argv)
    cache = str(folder.parent / "compile-cache")
    run_command(argv, STOPWISE_CACHE_DIR=cache)  # fills a persistent compilation cache
    code_w, cli_w = run_command(argv, STOPWISE_CACHE_DIR=cache)
    table += [
        row(f"command `stopwise validate` (exit {code_v})", rows, cli_v, base),
        row(f"command `stopwise fit` (exit {code_f}, no compilation cache)", rows, cli_f, base),
        row("commands validate + fit", rows, add(cli_v, cli_f), base),
        row(f"command `stopwise fit`, warm compilation cache (exit {code_w})", rows, cli_w, base),
    ]
    notes = [
        f"Reports and estimates identical before and after: {same}. Validation "
        f"{'clean' if report.ok else 'FAILED'}; the fit "
        f"{'converged' if fit.converged else 'did NOT converge'} (max |gradient| "
        f"{fit.optimizer['grad_norm']:.2g}), {estimates_text(fit)}.",
        f"Peak memory: Python heap of validate + fit in this process (tracemalloc) "
        f"{heap:.0f} MiB; peak resident size of the command processes: validate "
        f"{cli_v.peak_mib:.0f} MiB, fit {cli_f.peak_mib:.0f} MiB (goal < 2 GiB: "
        f"{'met' if max(cli_v.peak_mib, cli_f.peak_mib) < 2048 else 'missed'}).",
        f"Goal throughput >= {GOAL}x the bare read for validate + pooled fit through counts, "
        f"in process, one pass (the fit, which refuses the folder with the validator's own "
        f"report when any part has a problem): {base.wall / f_after.wall:.3f}x wall, "
        f"{base.cpu / f_after.cpu:.3f}x CPU ({'met' if base.wall / f_after.wall >= GOAL else 'missed'}"
        f" on wall time); validate, then fit, as two passes: "
        f"{base.wall / add(v_after, f_after).wall:.3f}x wall.",
        f"Load average (1 / 5 / 15 min) at the start {load_start}, at the end {load()}, "
        f"on {os.cpu_count()} cores.",
    ]
    return [*table, "", *notes]


def estimates_text(fit: Any) -> str:
    """The fit's estimates as name = value, rounded to 4 decimals."""
    return ", ".join(f"{n} = {float(v):.4f}" for n, v in zip(fit.table.names, fit.table.estimate))


def add(a: Timing, b: Timing) -> Timing:
    return Timing(a.wall + b.wall, a.cpu + b.cpu)


def section(rows: int = ROWS, before: bool = BEFORE) -> str:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "parts"
        folder.mkdir()
        written = write_folder(folder, rows)
        n_parts = len(list_parts(folder))
        size = sum(p.stat().st_size for p in folder.iterdir()) / 2**20
        body = measure(folder, written, before)
    head = (
        f"### {written:,} decision rows in {n_parts} Parquet parts ({size:.0f} MiB; "
        f"generated, then deleted)"
    )
    return "\n".join([head, "", *body])


def main() -> str:
    return "\n\n".join(["## Out-of-core fast path (bench_parts)", section()])


if __name__ == "__main__":
    print(main())
