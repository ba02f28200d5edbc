"""Study design (issue 18), the parts added after bench_design: the joint search over
survival chances, gains per draw and trial splits, the expected information of a contest
design, and the LR-test sample size; each against one compiled log-likelihood + gradient
of the same model on simulated data of the same design, measured in this run."""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp

import stopwise
from benchmarks._common import best_time, timed
from stopwise.commands.simulate import contest_design
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation import design_allocation as A
from stopwise.estimation import design_study as S
from stopwise.estimation.design_contest import ContestScheme
from stopwise.estimation.design_power import lr_test_plan
from stopwise.estimation.ml.recovery import stopping_design

SOLO_THETA = {"r": 0.4, "precision": 2.0}
SOLO_PLAN = S.Plan(p_survive=(0.6, 0.75, 0.9), trials=60, subjects=100)
CONTEST_THETA = {"r": 0.3, "precision": 1.0}
CONTEST_PLAN = S.Plan(
    p_survive=(0.6, 0.75), trials=60, subjects=100, contest=ContestScheme(2, 5.0, True)
)
CONTEST_CAP = 20


def loglik_gradient_seconds(model: Any, theta: dict[str, float], frame: Any) -> float:
    """Best of 7 compiled calls of sum(loglik_obs) and its gradient on ``frame``."""
    data = to_stopping_data(frame)
    if model.options.get("prepare") is not None:
        model.options["prepare"](data)
    values = {k: jnp.float64(v) for k, v in theta.items()}
    objective = jax.jit(jax.value_and_grad(lambda t: jnp.sum(model.loglik_obs(t, data))))
    jax.block_until_ready(objective(values))
    return best_time(lambda: jax.block_until_ready(objective(values)), repeat=7)


def main() -> str:
    solo = stopwise.model("crra+planner+logit")
    design = stopping_design(SOLO_PLAN.subjects, SOLO_PLAN.trials, SOLO_PLAN.p_survive, 1.0, 0)
    solo_base = loglik_gradient_seconds(
        solo, SOLO_THETA, solo.simulate(SOLO_THETA, design, jax.random.PRNGKey(0))
    )
    p_grid = [round(0.5 + 0.03 * i, 2) for i in range(16)]
    found, joint_s = timed(
        lambda: A.search_allocations(
            solo, SOLO_THETA, SOLO_PLAN, p_grid, (0.5, 1.0, 2.0), 3, 10, "se:r"
        )
    )
    small = stopwise.model("linear+planner+logit")
    low_r = {"r": 0.05, "precision": 2.0}
    power, power_s = timed(lambda: lr_test_plan(solo, low_r, small, SOLO_PLAN))

    contest = stopwise.model("crra+qre", max_target=CONTEST_CAP)
    plan = CONTEST_PLAN
    base = stopping_design(plan.subjects, plan.trials, plan.p_survive, 1.0, 0)
    frame = contest.simulate(
        CONTEST_THETA, contest_design(base, 2, 5.0, True), jax.random.PRNGKey(0)
    )
    contest_base = loglik_gradient_seconds(contest, CONTEST_THETA, frame)
    result, contest_first = timed(lambda: S.expected_precision(contest, CONTEST_THETA, plan))
    contest_best = best_time(lambda: S.expected_precision(contest, CONTEST_THETA, plan), repeat=3)
    se = result.se_table()[f"se_{plan.subjects}_subjects"]
    needed = power["participants_needed"]
    return "\n".join(
        [
            "## Study design: joint search, contests, LR-test sample size (bench_design_more)",
            "",
            "| quantity | seconds | ratio to its baseline |",
            "|---|---|---|",
            f"| crra+planner+logit loglik + gradient, 100 x 60 simulated, compiled (baseline) "
            f"| {solo_base:.4f} | 1 |",
            f"| joint search: 16 chances x 3 gains, best 3 with splits of 60 in steps of 10 "
            f"({found.n_designs} designs; first call, compiles) | {joint_s:.2f} | "
            f"{joint_s / solo_base:.0f}x |",
            f"| LR-test sample size, crra vs linear planner (pseudo-true fit, nesting check; "
            f"first call) | {power_s:.2f} | {power_s / solo_base:.0f}x |",
            f"| crra+qre contest loglik + gradient, 100 x 60 simulated, cap {CONTEST_CAP}, "
            f"compiled (baseline) | {contest_base:.4f} | 1 |",
            f"| contest expected information + SEs + QRE residual, first call (compiles) | "
            f"{contest_first:.2f} | {contest_first / contest_base:.0f}x |",
            f"| contest expected information + SEs + QRE residual, compiled (best of 3) | "
            f"{contest_best:.3f} | {contest_best / contest_base:.1f}x |",
            "",
            f"Joint search best: chances {found.table.iloc[0]['p_survive']}, gains "
            f"{found.table.iloc[0]['gain']}, trials {found.table.iloc[0]['trials']}, SE of r "
            f"{found.table.iloc[0]['se_gain']:.3g} times smaller than the baseline (no payout "
            f"cap). LR test of r = 0 at true r = 0.05: participants for 80% / 95% power "
            f"{needed['power_80']} / {needed['power_95']} (certified {power['certified']}). "
            f"Contest crra+qre (keep bank, 2 players, prize 5) at r=0.3, precision=1, "
            f"p_survive 0.6/0.75: expected SE r {se['r']:.4g}, precision {se['precision']:.4g} "
            f"(certified {result.certified}, QRE residual {result.qre_residual:.2g}).",
        ]
    )
