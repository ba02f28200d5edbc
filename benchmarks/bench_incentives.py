"""Incentive design (issue 21): ``design_incentives`` in-process and ``stopwise incentives``
as a whole process, against the grid-only search (no refinement) measured in the same run.

Problem (invented fitted values, crra+qre r = 0.3, precision = 2): maximise the expected
total bank of 3-player groups, prize 1..10, schemes winner and top2, bust rate <= 0.55,
4 grid prizes per setting. Every time is one run after a warm-up run of the same call
(compiled programs in memory); the whole-process run starts a fresh interpreter with the
persistent compilation cache off (a cold start).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from stopwise.contest import design_incentives

FIT = {
    "model": "crra+qre",
    "params": {"r": 0.3, "precision": 2.0},
    "max_target": 8,
    "se": {"r": 0.05, "precision": 0.3},
}
PROBLEM = dict(players=(3,), schemes=("winner", "top2"), max_bust=0.55, grid_points=4)
RECORD = {
    "model": "crra+qre",
    "method": "mle",
    "params": [
        {"name": "r", "estimate": 0.3, "se": 0.05},
        {"name": "precision", "estimate": 2.0, "se": 0.3},
    ],
    "spec": {"options": {"max_target": 8}},
}


def timed(fn) -> tuple[float, object]:
    t0 = time.perf_counter()
    value = fn()
    return time.perf_counter() - t0, value


def run_in_process(refine_steps: int):
    return design_incentives(FIT, "efficiency", (1.0, 10.0), refine_steps=refine_steps, **PROBLEM)


def run_command(folder: Path) -> float:
    fit = folder / "fit.json"
    fit.write_text(json.dumps(RECORD))
    argv = [
        sys.executable,
        "-m",
        "stopwise",
        "incentives",
        str(fit),
        "--goal",
        "efficiency",
        "--prize",
        "1:10",
        "--players",
        "3",
        "--scheme",
        "winner,top2",
        "--max-bust",
        "0.55",
        "--grid",
        "4",
        "--json",
        str(folder / "design.json"),
    ]
    env = {**os.environ, "STOPWISE_CACHE_DIR": "off"}
    t0 = time.perf_counter()
    subprocess.run(argv, check=True, env=env, capture_output=True)
    return time.perf_counter() - t0


def main() -> str:
    run_in_process(0), run_in_process(30)  # warm-up: imports and compiled programs
    grid_time, grid = timed(lambda: run_in_process(0))
    ours_time, ours = timed(lambda: run_in_process(30))
    with tempfile.TemporaryDirectory() as folder:
        process_time = run_command(Path(folder))
    gained = ours.choice["model"]["goal_value"] - grid.choice["model"]["goal_value"]
    n_grid = int((grid.candidates["prediction"] == "model").sum())
    n_ours = int((ours.candidates["prediction"] == "model").sum())
    return "\n".join(
        [
            "## Incentive design: 3 players, winner and top2, bust limit (bench_incentives)",
            "",
            "`design_incentives(crra+qre fit, efficiency, prize 1:10, players 3, schemes "
            "winner,top2, max_bust 0.55, grid 4)`. Baseline: the same call with the "
            "refinement off (grid only), after one warm-up call of each, in the same process. "
            "Whole process: `python -m stopwise incentives` on the same problem, a fresh "
            "interpreter with the compilation cache off.",
            "",
            "| task | seconds | ratio to baseline |",
            "|---|---|---|",
            f"| baseline: grid only, {n_grid} certified candidates (with Nash) | "
            f"{grid_time:.2f} | 1 |",
            f"| derivative-steered search, {n_ours} candidates | {ours_time:.2f} | "
            f"{ours_time / grid_time:.2f} |",
            f"| `stopwise incentives` as a whole process (cold) | {process_time:.2f} | "
            f"{process_time / grid_time:.2f} |",
            "",
            f"Choice: {ours.choice['scheme']} at prize {ours.choice['prize']:.6g} (grid only: "
            f"{grid.choice['scheme']} at {grid.choice['prize']:.6g}); expected total bank "
            f"gained by the refinement {gained:.4g}; bust rate at the choice "
            f"{ours.choice['model']['bust_rate']:.10f} (limit 0.55).",
        ]
    )


if __name__ == "__main__":
    print(main())
