"""Recovery study at a demo-like design (120 subjects x 60 trials, survival chances 0.6, 0.75,
0.9, gain 1): simulate crra+planner+logit from known truths, refit with clustered SEs, report
the 95% interval coverage of r and precision, and the share of replications in which AIC
prefers the generating model over pt+tk+target+logit.

Usage: ``python -m benchmarks.study_recovery [REPLICATIONS]`` (default 200; writes its
section into benchmarks/RESULTS.md). Long: minutes per few dozen replications on 2 cores.
Goals (issue 4): coverage in [0.90, 0.98] for r and precision over >= 200 replications; AIC
picks the generating model in >= 90% of them.
"""

from __future__ import annotations

import sys
import time

import stopwise  # noqa: F401  (float64)
from benchmarks._common import machine, write_section
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.recovery import Recovery, recover, stopping_design
from stopwise.models.spec import build_model

TRUTH = {"r": 0.4, "precision": 2.0}
# The reverse direction: prospect-theory target setters (invented values); only AIC's choice
# is reported (with no losses in this task, beta, loss_aversion and delta are not identified).
PT_TRUTH = {
    "alpha": 0.7,
    "beta": 0.8,
    "loss_aversion": 1.5,
    "gamma": 0.7,
    "delta": 0.7,
    "precision": 2.0,
}
P_SURVIVE = (0.6, 0.75, 0.9)
# The planner's induction cap follows the design's largest survival chance (model option).
OPTIONS = {"max_p_survive": max(P_SURVIVE)}


def run_study(
    n_reps: int = 200,
    subjects: int = 120,
    trials: int = 60,
    seed: int = 2026,
    progress: bool = True,
) -> tuple[Recovery, float]:
    """The recovery study; returns the Recovery and the seconds it took."""
    model = build_model("crra+planner+logit", **OPTIONS)
    rival = build_model("pt+tk+target+logit", **OPTIONS)
    design = stopping_design(subjects, trials, P_SURVIVE, 1.0, seed)
    t0 = time.perf_counter()
    result = recover(
        model,
        TRUTH,
        design,
        lambda frame, horizon=None: to_stopping_data(frame, horizon=horizon),
        n_reps=n_reps,
        seed=seed,
        se="robust",
        starts=1,
        rivals=[rival],
        rival_starts=2,
        progress=progress,
    )
    return result, time.perf_counter() - t0


def run_reverse(
    n_reps: int = 100, subjects: int = 120, trials: int = 60, seed: int = 7, progress: bool = True
) -> dict:
    """Share of replications simulated from pt+tk+target+logit in which AIC prefers it over
    crra+planner+logit."""
    model = build_model("pt+tk+target+logit", **OPTIONS)
    rival = build_model("crra+planner+logit", **OPTIONS)
    design = stopping_design(subjects, trials, P_SURVIVE, 1.0, seed)
    result = recover(
        model,
        PT_TRUTH,
        design,
        lambda frame, horizon=None: to_stopping_data(frame, horizon=horizon),
        n_reps=n_reps,
        seed=seed,
        se=None,
        starts=2,
        rivals=[rival],
        rival_starts=2,
        progress=progress,
    )
    return result.selection


def section(
    result: Recovery, seconds: float, subjects: int, trials: int, reverse: dict | None = None
) -> str:
    t = result.table
    lines = [
        "## Parameter recovery (study_recovery)",
        "",
        f"`crra+planner+logit` with r = {TRUTH['r']}, precision = {TRUTH['precision']}; "
        f"{subjects} subjects x {trials} trials, survival chances {P_SURVIVE}, gain 1; "
        f"{int(t['replications'].iloc[0])} replications, subject-clustered sandwich SEs, "
        f"{seconds / 60:.1f} minutes.",
        "",
        "| parameter | truth | mean | bias | RMSE | mean SE | SD of estimates | 95% coverage |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for name, row in t.iterrows():
        lines.append(
            f"| {name} | {row.truth:.3g} | {row['mean']:.4f} | {row.bias:.4f} | "
            f"{row.rmse:.4f} | {row.mean_se:.4f} | {row.sd:.4f} | "
            f"{row.coverage_95:.3f} |"
        )
    sel = result.selection
    lines += [
        "",
        f"AIC picks the generating model over {', '.join(sel['rivals'])} in "
        f"{sel['rate']:.1%} of {sel['replications']} replications.",
    ]
    if reverse:
        lines.append(
            f"Reverse direction (data from `pt+tk+target+logit`, {PT_TRUTH}): AIC picks it "
            f"over crra+planner+logit in {reverse['rate']:.1%} of {reverse['replications']} "
            "replications."
        )
    lines += [
        "",
        "Goals: coverage in [0.90, 0.98]; AIC selection >= 90%.",
        f"Machine: {machine()}.",
    ]
    return "\n".join(lines)


def main(n_reps: int = 200) -> str:
    result, seconds = run_study(n_reps)
    reverse = run_reverse(max(n_reps // 2, 1))
    return section(result, seconds, 120, 60, reverse)


if __name__ == "__main__":
    reps = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    text = main(reps)
    write_section("study_recovery", text)
    print(text)
