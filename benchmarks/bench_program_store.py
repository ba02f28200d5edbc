"""Stored traced programs (estimation/program_store.py): before/after figures of issue 13
item 3b and issue 17 item 4b, each a ratio against a baseline measured in this run.

(b13) ``stopwise fit --se hessian`` of crra+myopic+logit (80 subjects x 40 trials) as a
      whole process against the whole-process plain numpy/scipy script
      (benchmarks/plain_fit.py); "before" = the program store switched off
      (``STOPWISE_PROGRAM_DIR=off``), the XLA compilation cache filled; "after" = both filled.
      The three kinds of process run interleaved, best of ``REPEAT`` each; CPU seconds (user +
      system of the child process) beside the wall seconds.
(b17) a recovery study (``REPS`` replications of crra+myopic+logit, ``STUDY`` per
      replication) on a 2-worker LocalCluster (127.0.0.1) against the same study in-process,
      with the store off and on in the workers (each cluster started fresh; the in-process
      run first fills both caches); then whole ``stopwise recover`` commands of the same
      study: in-process, the default ("auto": a cluster only when the work pays for it) and
      2 fresh workers.

``python -m benchmarks.bench_program_store`` writes the section ``bench_program_store`` of
benchmarks/RESULTS.md.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

import stopwise
from benchmarks._common import machine, timed, write_section
from benchmarks.fit_ratios import simulated_frame, stopwise_command
from stopwise.estimation.distributed import Plan, dask_client

ROOT = Path(__file__).resolve().parent.parent
REPEAT = int(os.environ.get("STOPWISE_BENCH_REPEAT", "3"))
REPS = int(os.environ.get("STOPWISE_BENCH_DASK_REPS", "200"))
MODEL = "crra+myopic+logit"
TRUTH = {"r": 0.4, "precision": 3.0}
# the demo's 120 subjects, 40 trials each: a realistic replication (the earlier benchmark's
# 30 x 20 held only 40-60 ms of work per replication, less than a worker's start amortises)
WARM_ROUNDS = int(os.environ.get("STOPWISE_BENCH_WARM_ROUNDS", "3"))
STUDY = {"subjects": 120, "trials": 40, "p_survive": (0.7, 0.8, 0.9), "seed": 1}


def child_run(cmd: list[str], env: dict[str, str]) -> tuple[float, float]:
    """(wall seconds, CPU seconds of the child) of one whole process that must succeed."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    subprocess.run(cmd, env=env, check=True, capture_output=True, cwd=ROOT, timeout=900)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu


def whole_process_fit(folder: Path) -> dict:
    """Cold (both caches empty), one unmeasured store-off run, then REPEAT interleaved
    rounds of: plain script, fit with the store off, fit with the store on."""
    path = folder / "myopic.csv"
    simulated_frame(MODEL, 80, 40, 7).to_csv(path, index=False)
    fit_cmd = [*stopwise_command(), "fit", str(path), "--model", MODEL, "--se", "hessian"]
    env = {k: v for k, v in os.environ.items() if k != "JAX_COMPILATION_CACHE_DIR"}
    env["STOPWISE_CACHE_DIR"] = str(folder / "cache")
    on = dict(env, STOPWISE_PROGRAM_DIR=str(folder / "programs"))
    off = dict(env, STOPWISE_PROGRAM_DIR="off")
    plain_cmd = [sys.executable, str(ROOT / "benchmarks" / "plain_fit.py"), str(path)]
    cold = child_run([*fit_cmd, "--json", str(folder / "cold.json")], on)
    # the store-off process compiles other XLA programs (no exported-call wrapper): one
    # unmeasured run puts them in the XLA cache, so "before" is measured warm as well
    child_run([*fit_cmd, "--json", str(folder / "off.json")], off)
    runs: dict[str, list[tuple[float, float]]] = {"plain": [], "off": [], "on": []}
    for _ in range(REPEAT):
        runs["plain"].append(child_run(plain_cmd, env))
        runs["off"].append(child_run([*fit_cmd, "--json", str(folder / "off.json")], off))
        runs["on"].append(child_run([*fit_cmd, "--json", str(folder / "on.json")], on))
    fits = {k: json.loads((folder / f"{k}.json").read_text()) for k in ("cold", "off", "on")}
    values = {k: [p["estimate"] for p in f["params"]] + [f["loglik"]] for k, f in fits.items()}
    gap = max(
        float(np.max(np.abs(np.array(values[k]) / np.array(values["off"]) - 1)))
        for k in ("cold", "on")
    )
    best = {k: (min(w for w, _ in v), min(c for _, c in v)) for k, v in runs.items()}
    return {"cold": cold, "best": best, "gap": gap, "n": fits["on"]["n_obs"]}


def workers_cpu(client: object) -> float:
    """CPU seconds used so far by all worker processes together."""
    return float(sum(client.run(cpu_seconds).values()))  # type: ignore[attr-defined]


def cpu_seconds() -> float:
    usage = resource.getrusage(resource.RUSAGE_SELF)
    return usage.ru_utime + usage.ru_stime


def recovery(workers: int | None, scheduler: str | None = None):
    return stopwise.recover(
        MODEL, TRUTH, n_reps=REPS, progress=False, workers=workers, scheduler=scheduler, **STUDY
    )


def on_cluster(store: str, rounds: int = 0) -> tuple[object, float, float, float, list]:
    """(study, seconds with the cluster up, seconds to start it, workers' CPU seconds
    including their start, warm rounds) with STOPWISE_PROGRAM_DIR=store in the workers. A
    warm round runs the same study again in-process and then on the same (kept) cluster:
    (in-process seconds, cluster seconds, identical results)."""
    os.environ["STOPWISE_PROGRAM_DIR"] = store
    t0 = time.perf_counter()
    with dask_client(Plan("local", workers=2)) as client:
        started = time.perf_counter() - t0
        study, seconds = timed(lambda: recovery(None, client.scheduler.address))
        cpu = workers_cpu(client)
        warm = []
        for _ in range(rounds):
            serial, serial_s = timed(lambda: recovery(0))
            again, again_s = timed(lambda: recovery(None, client.scheduler.address))
            warm.append((serial_s, again_s, bool(serial.estimates.equals(again.estimates))))
    return study, seconds, started, cpu, warm


def recovery_study(folder: Path) -> dict:
    store = str(folder / "programs")
    os.environ["STOPWISE_PROGRAM_DIR"] = store  # the in-process run fills the store
    cpu0, t0 = cpu_seconds(), time.perf_counter()
    serial = recovery(0)
    serial_s, serial_cpu = time.perf_counter() - t0, cpu_seconds() - cpu0
    out = {"serial": (serial_s, serial_cpu)}
    for label, setting in (("off", "off"), ("on", store)):
        study, seconds, started, cpu, warm = on_cluster(
            setting, WARM_ROUNDS if label == "on" else 0
        )
        same = bool(serial.estimates.equals(study.estimates))
        out[label] = (seconds, started, cpu, same)
        out["warm"] = out.get("warm", []) + warm
    return out


RECOVER_RUNS = (
    ("in-process (--workers 0, baseline)", ["--workers", "0"]),
    ("default (auto)", []),
    ("2 fresh workers (--workers 2)", ["--workers", "2"]),
)


def recover_commands(folder: Path) -> dict:
    """Whole ``stopwise recover`` processes of the same study, the caches filled by one
    unmeasured run first (a user's later session): best wall seconds of REPEAT interleaved
    rounds per setting, where the JSON says the replications ran, and whether every
    setting's JSON equals the in-process one's (its replication count and place aside)."""
    truth = [arg for name, value in TRUTH.items() for arg in ("--set", f"{name}={value}")]
    cmd = [*stopwise_command(), "recover", "--model", MODEL, *truth, "--reps", str(REPS)]
    cmd += ["--subjects", str(STUDY["subjects"]), "--trials", str(STUDY["trials"])]
    cmd += ["--seed", str(STUDY["seed"]), "--no-progress"]
    # a user's setting: the default program store inside the cache folder, no scheduler named
    dropped = ("JAX_COMPILATION_CACHE_DIR", "STOPWISE_PROGRAM_DIR", "STOPWISE_SCHEDULER")
    env = {k: v for k, v in os.environ.items() if k not in dropped}
    env["STOPWISE_CACHE_DIR"] = str(folder / "recover-cache")
    child_run([*cmd, "--workers", "0"], env)
    walls: dict[str, list[float]] = {label: [] for label, _ in RECOVER_RUNS}
    saved: dict[str, dict] = {}
    for _ in range(REPEAT):
        for k, (label, extra) in enumerate(RECOVER_RUNS):
            out = folder / f"recover-{k}.json"
            walls[label].append(child_run([*cmd, *extra, "--json", str(out)], env)[0])
            saved[label] = json.loads(out.read_text())
    where = {label: saved[label].pop("replications")["where"] for label in saved}
    baseline = saved[RECOVER_RUNS[0][0]]
    same = {label: saved[label] == baseline for label in saved}
    return {"best": {k: min(v) for k, v in walls.items()}, "where": where, "same": same}


def recover_rows(runs: dict) -> list[str]:
    base = runs["best"][RECOVER_RUNS[0][0]]
    rows = [
        "",
        f"Whole `stopwise recover` commands of the same study (caches filled by one unmeasured "
        f"run; best of {REPEAT} interleaved rounds):",
        "",
        "| command | wall s (best) | speed-up | where the replications ran | JSON equal |",
        "|---|---|---|---|---|",
    ]
    for label, _ in RECOVER_RUNS:
        wall = runs["best"][label]
        rows.append(
            f"| {label} | {wall:.2f} | {base / wall:.2f}x | {runs['where'][label]} | "
            f"{runs['same'][label]} |"
        )
    return rows


def section(fit: dict, study: dict, load: tuple) -> str:
    plain_w, plain_c = fit["best"]["plain"]
    rows = [
        "## Stored traced programs (bench_program_store)",
        "",
        f"### Issue 13 (b): `stopwise fit --se hessian`, {MODEL}, {fit['n']} decisions, "
        "as a whole process",
        "",
        "| process | wall s (best) | ratio to plain (wall) | CPU s (best) | ratio to plain (CPU) |",
        "|---|---|---|---|---|",
        f"| plain numpy/scipy script (baseline) | {plain_w:.2f} | 1.00 | {plain_c:.2f} | 1.00 |",
    ]
    for key, text in (
        ("off", "before: XLA cache filled, program store off"),
        ("on", "after: XLA cache and program store filled"),
    ):
        w, c = fit["best"][key]
        rows.append(f"| {text} | {w:.2f} | {w / plain_w:.2f}x | {c:.2f} | {c / plain_c:.2f}x |")
    cw, cc = fit["cold"]
    rows.append(
        f"| cold: both empty (one run) | {cw:.2f} | {cw / plain_w:.2f}x | {cc:.2f} | "
        f"{cc / plain_c:.2f}x |"
    )
    rows += [
        "",
        f"Estimates and log-likelihood of the cold and stored-program runs equal the store-off "
        f"run's to {fit['gap']:.1e} relative. Goal <= 1.5x.",
        "",
        f"### Issue 17 (b): recovery study, {REPS} replications of {MODEL} "
        f"({STUDY['subjects']} subjects x {STUDY['trials']} trials each)",
        "",
        "| run | wall s (cluster up) | speed-up | cluster start s | CPU s | identical results |",
        "|---|---|---|---|---|---|",
        f"| in-process (baseline) | {study['serial'][0]:.1f} | 1.00 | - | "
        f"{study['serial'][1]:.1f} | - |",
    ]
    for key, text in (("off", "2 workers, store off"), ("on", "2 workers, store on")):
        seconds, started, cpu, same = study[key]
        rows.append(
            f"| {text} | {seconds:.1f} | {study['serial'][0] / seconds:.2f}x | {started:.1f} | "
            f"{cpu:.1f} (workers, with their start) | {same} |"
        )
    warm = study.get("warm", [])
    if warm:
        serial_med = float(np.median([w[0] for w in warm]))
        cluster_med = float(np.median([w[1] for w in warm]))
        rows += [
            "",
            "Kept cluster (the store-on cluster above, its workers alive): each round runs the "
            "study in-process, then again on the cluster (interleaved, so both see the same "
            "machine):",
            "",
            "| round | in-process s | 2 workers s | speed-up | identical results |",
            "|---|---|---|---|---|",
        ]
        rows += [
            f"| {i + 1} | {a:.2f} | {b:.2f} | {a / b:.2f}x | {same} |"
            for i, (a, b, same) in enumerate(warm)
        ]
        paired = float(np.median([a / b for a, b, _ in warm]))
        rows.append(
            f"| median | {serial_med:.2f} | {cluster_med:.2f} | "
            f"**{serial_med / cluster_med:.2f}x** (ratio of the medians) | |"
        )
        rows.append(f"| median of the rounds' speed-ups (paired) | | | **{paired:.2f}x** | |")
    rows += recover_rows(study["commands"])
    rows += [
        "",
        f"Goal >= 1.6x on 2 cores. Load average (1, 5, 15 min) at start {load[0]}, at end "
        f"{load[1]} on {machine()}.",
    ]
    return "\n".join(rows)


def main() -> str:
    load_start = tuple(round(x, 1) for x in os.getloadavg())
    with tempfile.TemporaryDirectory(prefix="stopwise-store-") as tmp:
        fit = whole_process_fit(Path(tmp))
        study = recovery_study(Path(tmp))
        study["commands"] = recover_commands(Path(tmp))
    load_end = tuple(round(x, 1) for x in os.getloadavg())
    return section(fit, study, (load_start, load_end))


if __name__ == "__main__":
    text = main()
    print(text)
    write_section("bench_program_store", text)
