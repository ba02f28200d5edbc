"""Pooled Bayesian fits at the default settings: bulk ESS and R-hat at 2 chains x 500 draws.

Issue 16's goal: bulk ESS >= 0.8 x total draws and R-hat <= 1.01 for crra+myopic+logit,
crra+planner+logit, pt+tk+target+logit (stopping data, 80 simulated subjects x 30 trials)
and crra+logit (the ten-row price list of Holt & Laury 2002, 400 simulated subjects). Each
model is fitted twice in the same run on the same data and seed: "before" starts at the
model's start values with an identity mass matrix adapted in warm-up (the former default,
``init="start", dense_mass=False``), "after" at the ML estimate with the ML covariance as
the inverse mass matrix (the default now, estimation/bayes/pooled_start.py). Invented data from
stopwise's own simulator; the values below are settings of the simulation, not checks.
Run ``python -m benchmarks.run bench_pooled``.
"""

from __future__ import annotations

import os
import time
from typing import Any

import stopwise
from stopwise.commands.simulate import price_list_design
from stopwise.estimation.bayes.fit import fit_bayes
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.simulation import simulate

CHAINS, DRAWS, WARMUP, SEED = 2, 500, 500, 1
CASES: tuple[tuple[str, dict[str, float]], ...] = (
    ("crra+myopic+logit", {"r": 0.4, "precision": 3.0}),
    ("crra+planner+logit", {"r": 0.4, "precision": 3.0}),
    (
        "pt+tk+target+logit",
        {
            "alpha": 0.7,
            "beta": 0.8,
            "loss_aversion": 1.5,
            "gamma": 0.7,
            "delta": 0.7,
            "precision": 2.0,
        },
    ),
    ("crra+logit", {"r": 0.5, "precision": 1.0}),
)


def simulated(spec: str, values: dict[str, float]) -> Any:
    """The invented data set of a case (stopping: 80 x 30 trials; lottery: 400 x 10 rows)."""
    if spec == "crra+logit":
        design = price_list_design([f"s{i:03d}" for i in range(400)], 10)
    else:
        design = stopping_design(80, 30, (0.75, 0.85, 0.9), 1.0, seed=1)
    return stopwise.load(simulate(spec, values, design, seed=2))


def one_fit(spec: str, data: Any, **options: Any) -> dict[str, Any]:
    t0 = time.perf_counter()
    post = fit_bayes(
        spec,
        data,
        chains=CHAINS,
        draws=DRAWS,
        warmup=WARMUP,
        seed=SEED,
        progress=False,
        **options,
        point_fits=ML_POINT_FITS,
    )
    d = post.diagnostics
    worst = post.params["ess_bulk"].idxmin()
    return {
        "ess": d["min_ess_bulk"],
        "worst": worst,
        "rhat": d["max_rhat"],
        "div": d["divergences"],
        "seconds": time.perf_counter() - t0,
        "sampling": post.run["sampling_seconds"],
    }


def main() -> str:
    total = CHAINS * DRAWS
    load0 = os.getloadavg()[0]
    rows = []
    for spec, values in CASES:
        data = simulated(spec, values)
        before = one_fit(spec, data, init="start", dense_mass=False)
        after = one_fit(spec, data)
        met = after["ess"] >= 0.8 * total and after["rhat"] <= 1.01
        rows.append(
            f"| {spec} | {data.arrays().n_obs} | {before['ess']:.0f} ({before['worst']}) / "
            f"{before['rhat']:.3f} / {before['div']} | {after['ess']:.0f} ({after['worst']}) / "
            f"{after['rhat']:.3f} / {after['div']} | {'met' if met else 'NOT met'} | "
            f"{after['sampling'] / before['sampling']:.2f} |"
        )
    load1 = os.getloadavg()[0]
    return (
        "## Bayes: pooled fits at the default settings (issue 16)\n\n"
        f"{CHAINS} chains x {DRAWS} draws after {WARMUP} warm-up, seed {SEED}; goal: min bulk "
        f"ESS >= {0.8 * total:.0f} (0.8 x {total} draws) and max R-hat <= 1.01. Before: model "
        "start values, identity mass matrix; after: ML estimate, ML covariance as the inverse "
        "mass matrix. Cells: min bulk ESS (its quantity) / max R-hat / divergences. Load "
        f"average (1 min) before / after the study: {load0:.1f} / {load1:.1f} (shared "
        "machine).\n\n"
        "| model | decisions | before | after | goal | sampling time after/before |\n"
        "|---|---|---|---|---|---|\n" + "\n".join(rows)
    )


if __name__ == "__main__":
    print(main())
