"""Divergences of the pooled planner model before and after sampling r below the cliff
(estimation/bayes/support.py), on the same replications and seeds (issue 16, item 2).

The design and parameter draws are those of the calibration study (benchmarks/study_sbc.py:
crra+planner+logit, 5 subjects x 16 trials at p_survive 0.6 / 0.75, cap 50, parameters from
the default priors, seed 20181001, the same key sequence), the sampler the engine's default
(ML start, Laplace mass matrix), 2 chains x 500 draws after 250 warm-up. "Before" replaces the
engine's hook by one that keeps the bounds; "after" is the engine as it is. Each row: the true
values, whether the data rule out r >= 1 (the hook's check), divergent transitions before /
after, and the r values of the divergent draws (where they remain).

Run ``python -m benchmarks.study_cliff [replications]`` (default 14); the section goes into
benchmarks/RESULTS.md.
"""

from __future__ import annotations

import os
import sys
import time
from typing import Any
from unittest import mock

import jax
import numpy as np

import stopwise
from benchmarks._common import write_section
from benchmarks.study_sbc import CHAINS, DRAWS, MODELS, SEED, WARMUP, draw_truth
from stopwise.estimation.bayes import fit as bayes
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.estimation.bayes.support import sample_below_cliff
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.models.spec import build_model

SPEC = "crra+planner+logit"


def keep_bounds(model: Any, data: Any, **_: Any) -> tuple[Any, None]:
    """The hook switched off: the model's bounds as built."""
    return model, None


def fit_divergences(model: Any, data: Any, seed: int) -> tuple[int, np.ndarray, float]:
    """(divergent transitions, r at the divergent draws, max R-hat) of one default fit."""
    post = bayes.fit_bayes(
        model,
        data,
        chains=CHAINS,
        draws=DRAWS,
        warmup=WARMUP,
        seed=seed,
        progress=False,
        loo="trial",
        loo_refits=False,
        point_fits=ML_POINT_FITS,
    )
    diverging = post.idata.sample_stats["diverging"].values.astype(bool)
    r_at = post.idata.posterior["r"].values[diverging]
    return int(diverging.sum()), r_at, float(post.diagnostics["max_rhat"])


def one_replication(model: Any, design: Any, key: Any) -> dict[str, Any]:
    k_truth, k_sim, k_run = jax.random.split(key, 3)
    truth = draw_truth(model, resolve_priors(model), k_truth)
    data = stopwise.load(model.simulate(truth, design, k_sim)).arrays()
    seed = int(jax.random.randint(k_run, (), 0, 2**30))
    model.options["prepare"](data)  # as fit_bayes does before its hook
    restricted = sample_below_cliff(model, data, hierarchical=False, formulas=None, priors=None)
    with mock.patch.object(bayes, "sample_below_cliff", keep_bounds):
        before = fit_divergences(model, data, seed)
    after = fit_divergences(model, data, seed)
    return {"truth": truth, "below": restricted[1] is not None, "before": before, "after": after}


def r_range(values: np.ndarray) -> str:
    if values.size == 0:
        return "-"
    return f"{np.min(values):.2f} / {np.median(values):.2f} / {np.max(values):.2f}"


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    replications = int(argv[0]) if argv else 14
    options, make_design = MODELS[SPEC]
    model = build_model(SPEC, **options)
    design = make_design()
    key = jax.random.PRNGKey(SEED)
    rows = []
    t0 = time.perf_counter()
    for rep in range(replications):
        key, k_rep = jax.random.split(key)
        rows.append(one_replication(model, design, k_rep))
        row = rows[-1]
        print(
            f"{rep + 1}/{replications} {time.perf_counter() - t0:.0f} s: truth {row['truth']}, "
            f"rule out r >= 1: {row['below']}, divergent {row['before'][0]} -> "
            f"{row['after'][0]}, r at divergences after {r_range(row['after'][1])}",
            flush=True,
        )
    lines = [
        "## Bayes: pooled planner divergences before / after sampling r below the cliff",
        "",
        f"{SPEC}, the calibration study's design and draws (benchmarks/study_sbc.py, seed "
        f"{SEED}, first {replications} replications), engine defaults (ML start, Laplace mass "
        f"matrix), {CHAINS} chains x {DRAWS} draws after {WARMUP} warm-up, the same sampler "
        "seed before and after. 'data rule out r >= 1': the check of "
        "estimation/bayes/support.py (summed log-likelihood <= -1e10 at r >= 1 over the other "
        "parameter's prior quantiles 1e-300 .. 1 - 1e-300). Script: benchmarks/study_cliff.py. "
        f"{time.perf_counter() - t0:.0f} s; load average (1 min) at the end "
        f"{os.getloadavg()[0]:.1f} (shared machine).",
        "",
        "| rep | true r | true precision | data rule out r >= 1 | divergent before | "
        "divergent after | r at divergences after (min / median / max) | max R-hat before / "
        "after |",
        "|---|---|---|---|---|---|---|---|",
    ]
    for rep, row in enumerate(rows):
        t, (d0, _, h0), (d1, r1, h1) = row["truth"], row["before"], row["after"]
        lines.append(
            f"| {rep} | {t['r']:.2f} | {t['precision']:.3g} | {'yes' if row['below'] else 'no'} "
            f"| {d0} | {d1} | {r_range(r1)} | {h0:.3f} / {h1:.3f} |"
        )
    total0 = sum(r["before"][0] for r in rows)
    total1 = sum(r["after"][0] for r in rows)
    lines += ["", f"Divergent transitions in all: {total0} before, {total1} after."]
    text = "\n".join(lines) + "\n"
    write_section("study_cliff", text)
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
