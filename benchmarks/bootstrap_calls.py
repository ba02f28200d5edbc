"""Issue 13 (e), before/after in one run: a 200-resample subject bootstrap in
chunks of 40 replications per vmapped Newton call (the in-process default since this pass)
against the former chunks of 16, and both against one warm fit. Wall and CPU seconds (the machine
is shared: CPU seconds are the steadier figure). ``python -m benchmarks.bootstrap_calls``."""

from __future__ import annotations

import os
import time
from functools import partial

import numpy as np

import stopwise
from benchmarks._common import machine
from benchmarks.fit_ratios import simulated_frame
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.bootstrap import CHUNK, bootstrap_estimates
from stopwise.estimation.ml.mle import build_problem
from stopwise.models.spec import build_model

REPS = 200


def best(func, repeat: int) -> tuple[float, float]:
    """(best wall seconds, best CPU seconds of this process) over ``repeat`` calls."""
    wall = cpu = float("inf")
    for _ in range(repeat):
        w, c = time.perf_counter(), time.process_time()
        func()
        wall, cpu = min(wall, time.perf_counter() - w), min(cpu, time.process_time() - c)
    return wall, cpu


def measure(spec: str, seed: int) -> dict:
    data = to_stopping_data(simulated_frame(spec, 80, 40, seed))
    fit = stopwise.fit(spec, data, se="robust")
    problem, _, _ = build_problem(build_model(spec), data)
    one = best(lambda: stopwise.fit(spec, data, se="robust"), 3)
    out = {"spec": spec, "n": data.n_obs, "one": one}
    for label, chunk in (("chunks of 16 (before)", CHUNK), ("chunks of 40 (after)", None)):
        run = partial(bootstrap_estimates, problem, fit.z, REPS, 1, False, chunk=chunk)
        z, ok, _ = run()  # compiles
        out[label] = (*best(run, 2), int(ok.sum()), z)
    gap = np.max(np.abs(out["chunks of 16 (before)"][3] - out["chunks of 40 (after)"][3]))
    out["gap"] = float(gap)
    return out


def section(rows: list[dict], load: tuple) -> str:
    lines = [
        "| model | decisions | one warm fit (wall / CPU) | bootstrap, chunks of 16 (before) | "
        "bootstrap, chunks of 40 (after) | ratio to one fit, before -> after (wall; CPU) |",
        "|---|---|---|---|---|---|",
    ]
    for r in rows:
        b, a, one = r["chunks of 16 (before)"], r["chunks of 40 (after)"], r["one"]
        lines.append(
            f"| `{r['spec']}` | {r['n']} | {one[0] * 1000:.0f} / {one[1] * 1000:.0f} ms | "
            f"{b[0]:.2f} / {b[1]:.2f} s ({b[2]} converged) | {a[0]:.2f} / {a[1]:.2f} s "
            f"({a[2]} converged) | {b[0] / one[0]:.0f}x -> {a[0] / one[0]:.0f}x; "
            f"{b[1] / one[1]:.0f}x -> {a[1] / one[1]:.0f}x |"
        )
    gaps = ", ".join(f"{r['gap']:.1e}" for r in rows)
    lines += [
        "",
        f"Replicated estimates, before vs after: largest difference {gaps}. Load average "
        f"at start {load[0]}, at end {load[1]} on {machine()}.",
    ]
    return "\n".join(lines)


if __name__ == "__main__":
    start = tuple(round(x, 2) for x in os.getloadavg())
    rows = [measure("crra+myopic+logit", 1), measure("crra+planner+logit", 2)]
    print(section(rows, (start, tuple(round(x, 2) for x in os.getloadavg()))))
