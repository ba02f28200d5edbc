"""Load + validate 1,000,000 decision rows against a bare ``pandas.read_csv`` of the same
file (best of 3, same process); goal: at most 3x. Also reports peak memory (tracemalloc)."""

from __future__ import annotations

import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

import stopwise  # noqa: F401  (x64 on, as everywhere)
from benchmarks._common import best_time, peak_memory_mib
from stopwise.data_schemas.convert import trials_to_decisions
from stopwise.data_schemas.load import load

N_ROWS = 1_000_000
GOAL = 3.0


def decision_rows(n_rows: int, seed: int = 7) -> pd.DataFrame:
    """About ``n_rows`` valid decision rows: 500 subjects, random targets and collapses."""
    rng = np.random.default_rng(seed)
    p_values = np.array([0.75, 0.85, 0.95])
    n_trials = n_rows // 3
    p = p_values[rng.integers(0, 3, n_trials)]
    target = rng.integers(1, 12, n_trials)
    first_collapse = rng.geometric(1 - p) - 1
    subject = np.arange(n_trials) % 500
    trials = pd.DataFrame(
        {
            "subject": [f"s{i:04d}" for i in subject],
            "trial": np.arange(n_trials) // 500 + 1,
            "p_survive": p,
            "gain": 1.0,
            "draws": np.minimum(target, first_collapse),
            "busted": (first_collapse < target).astype(np.int64),
        }
    )
    decisions = trials_to_decisions(trials, validate=False).iloc[:n_rows].copy()
    return _close_last_trial(decisions)


def _close_last_trial(decisions: pd.DataFrame) -> pd.DataFrame:
    """Make the final (possibly cut) trial end with a stop, so every trial is complete."""
    last = len(decisions) - 1
    decisions.iloc[last, decisions.columns.get_loc("action")] = "stop"
    decisions.iloc[last, decisions.columns.get_loc("outcome")] = np.nan
    return decisions


def main() -> str:
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "decisions.csv"
        frame = decision_rows(N_ROWS)
        frame.to_csv(path, index=False)
        del frame
        baseline = best_time(lambda: pd.read_csv(path), repeat=3)
        ours = best_time(lambda: load(path), repeat=3)
        dataset, peak_ours = peak_memory_mib(lambda: load(path))
        bundle_time = best_time(dataset.arrays, repeat=3)
        _, peak_base = peak_memory_mib(lambda: pd.read_csv(path))
        size_mib = path.stat().st_size / 2**20
    ratio = ours / baseline
    verdict = "meets" if ratio <= GOAL else "misses"
    return (
        "## Load and validate 1,000,000 decision rows\n\n"
        f"File: {dataset.n_rows:,} decision rows, {size_mib:.0f} MiB CSV "
        f"({dataset.n_subjects} subjects). Best of 3 runs each.\n\n"
        "| step | time (s) | ratio to read_csv | peak memory (MiB) |\n"
        "|---|---|---|---|\n"
        f"| bare `pandas.read_csv` (baseline) | {baseline:.2f} | 1.00 | {peak_base:.0f} |\n"
        f"| `stopwise.load` (read + validate + normalise) | {ours:.2f} | {ratio:.2f} | "
        f"{peak_ours:.0f} |\n"
        f"| then `Dataset.arrays()` (array bundle for the models) | {bundle_time:.2f} | "
        f"{bundle_time / baseline:.2f} | |\n\n"
        f"Goal: at most {GOAL:.0f}x the bare read; this run {verdict} it ({ratio:.2f}x).\n"
    )


if __name__ == "__main__":
    print(main())
