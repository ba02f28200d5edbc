"""Hierarchical Bayes on the demo scenario: crra+planner+logit, 2 chains x 600 draws after
400 warm-up, on the solo trials of the 120 demo subjects (issue 16, item 6).

Reports wall time (goal <= 60 s at min bulk ESS >= 400 for every quantity), the largest R-hat
(goal <= 1.01), the smallest bulk and tail ESS, min bulk ESS per second, and, as in-process
baselines, the time of one gradient of the hierarchical log-likelihood, of one gradient of
the same likelihood written the obvious way (every data row evaluated on its own with its
subject's parameters, as the plain NumPyro model of bench_bayes_plain.py does), and of the
pooled maximum-likelihood fit on the same data, so the figures can be read as "NUTS costs N
gradients" on another machine.

What dominates (120 subjects, 2026-12-02): NUTS time = iterations x leapfrog steps per
iteration x gradient time. The former run (4 chains x (1000 + 1000), 190 s) took 31 leapfrog
steps per draw at 1.39 ms per gradient and reached min bulk ESS 1,742 (sd of precision): 4.4
times the 400 the diagnostics ask for, while 4 chains shared 2 cores. The gradient is
latency-bound (the planner's backward scan runs 54 sequential steps on arrays of 120 x 3
entries; unrolling the scan by 8 did not make it faster and doubled compilation, measured on
a loaded machine), float64 is the toolkit's convention, and the parametrisation (r centred,
precision non-centred by the rule of estimation/bayes/subject_start.py) already gives no divergences.
The first cut was the run length: 2 chains, one per core, 600 draws each after 400 warm-up:
2,000 chain iterations instead of 8,000, min bulk ESS 690. Measured at load 10 to 6: 172 s
against 190 s, because the kept draws were no longer the main cost (25 s of gradients per
core); compilation and the warm-up's long early trajectories are (benchmarks/RESULTS.md).

Diagnosis behind the sampler settings (20 demo subjects, crra+myopic+logit, 2 chains x 250
draws after 250 warm-up, shared 2-core machine, 2026-12-02): the former set-up (non-centred,
diagonal mass matrix, sites started uniformly in (-0.5, 0.5), i.e. sd ~ 1 with random eta)
adapted a step size of 1e-15, hit tree depth 10 in every transition of one chain and ended
with R-hat 3.65 (sd_z(precision) 57: subjects started in the region CRRA r >= 1 where a zero
bank has the floor utility). Started at per-subject ML fits with a dense population mass
matrix: non-centred step size 0.145, 33 leapfrog steps per draw, min bulk ESS 143, R-hat
1.02; centred step size 0.30, 15 steps, min bulk ESS 232, R-hat 1.03; with the per-parameter
rule (r centred, precision non-centred, 24 subjects, 2 x 300) R-hat 1.03, min bulk ESS 164,
no divergences, E-BFMI 0.78 (centred precision there: 11 divergences, R-hat 1.18).

Warm-up (120 demo subjects, crra+planner+logit, 1 chain x 200 warm-up, 2026-12-02): started
from the identity inverse mass matrix it took 49,885 leapfrog steps (250 per draw, 126 s);
started from the normal-approximation variances of the per-subject ML fits
(``bayes.initial_inverse_mass``) 7,228 (36 per draw, 36 s). The whole benchmark went from
645 s to 370 s with that change alone (cap 100).

The model is built with its defaults, so the fit uses the automatic planner cap
(estimation/bayes/truncation.py): the backward induction stops at the data horizon + 30 steps
instead of the default cap sized so that reaching it has probability below 1e-15 (about
700 steps at p_survive 0.95). One hierarchical gradient costs about 17 us per cap step (2.2
ms at cap 100, 1.1 ms at cap 50); the fit checks the truncation at 100 posterior draws
(largest |summed log-likelihood(cap) - summed log-likelihood(default cap)|, reported below,
tolerance 1e-6) and would refit at the default cap if it failed.
"""

from __future__ import annotations

import os
import time
from dataclasses import replace

CHAINS, DRAWS, WARMUP = 2, 600, 400
GOAL_SECONDS, ESS_GOAL = 60.0, 400.0  # issue 16, item 6
# One XLA CPU device per chain so that NumPyro runs the chains in parallel (pmap) rather
# than batched on one device: measured on 40 demo subjects, 4 x (150 + 150) iterations,
# the whole fit took 72 s in parallel against 171 s vectorized (shared 2-core machine); the
# flag must be set before JAX starts (here: before ``import stopwise``) and is left alone
# when the user has set XLA_FLAGS.
if "XLA_FLAGS" not in os.environ:
    os.environ["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={CHAINS}"

import jax  # noqa: E402
import jax.numpy as jnp  # noqa: E402
import numpy as np  # noqa: E402

import stopwise  # noqa: E402, F401  (float64 before any JAX use)
from benchmarks._common import best_time  # noqa: E402
from stopwise.data_schemas.arrays import STOPPING_ROW_FIELDS  # noqa: E402
from stopwise.estimation.bayes.truncation import auto_capped  # noqa: E402

SPEC = "crra+planner+logit"


def demo_solo_bundle() -> object:
    from stopwise.data_schemas.bundle import to_stopping_data
    from stopwise.demo import demo_data

    frame = demo_data()["stopping"]
    return to_stopping_data(frame[frame["task"] == "solo"].reset_index(drop=True))


def gradient_seconds(model: object, data: object) -> float:
    """One hierarchical gradient at the cap the fit samples with (the automatic cap)."""
    from stopwise.estimation.bayes import density
    from stopwise.estimation.bayes import prepare as preparation

    model = auto_capped(model, data) or model
    setup, args, *_ = preparation.prepare(
        model, data, hierarchical=True, formulas=None, priors=None, pointwise="trial"
    )
    sites = {f"z_{s.name}": jnp.asarray(float(s.to_unconstrained(s.start))) for s in setup.specs}
    sites.update(density.zero_offset_sites(setup, sites))
    grad = jax.jit(jax.grad(lambda s: density.total_loglik(setup, s, args)))
    jax.block_until_ready(grad(sites))
    return best_time(lambda: jax.block_until_ready(grad(sites)), repeat=5, number=5)


def plain_gradient_seconds(model: object, data: object) -> float:
    """One gradient of the same hierarchical log-likelihood evaluated row by row: every data
    row gets its subject's parameters and runs ``loglik_obs`` alone (jax.vmap over rows)."""
    model = auto_capped(model, data) or model
    bare = replace(data, covariates={})
    axes = replace(
        jax.tree_util.tree_map(lambda _: None, bare), **dict.fromkeys(STOPPING_ROW_FIELDS, 0)
    )
    one_row = jax.vmap(model.loglik_obs, in_axes=(0, axes))
    row_subject = jnp.asarray(data.subject)

    def total(z: dict) -> object:
        theta = {s.name: s.to_natural(z[s.name][row_subject]) for s in model.params}
        return jnp.sum(one_row(theta, bare))

    z = {
        s.name: jnp.full(data.n_subjects, float(s.to_unconstrained(s.start))) for s in model.params
    }
    grad = jax.jit(jax.grad(total))
    jax.block_until_ready(grad(z))
    return best_time(lambda: jax.block_until_ready(grad(z)), repeat=3, number=2)


def main() -> str:
    from stopwise.estimation.bayes.fit import fit_bayes
    from stopwise.estimation.ml.mle import fit_mle
    from stopwise.estimation.ml.point_fits import ML_POINT_FITS
    from stopwise.models.spec import build_model

    data = demo_solo_bundle()
    model = build_model(SPEC)  # defaults: the automatic, checked planner cap
    t_grad = gradient_seconds(model, data)
    t_plain = plain_gradient_seconds(model, data)
    t0 = time.perf_counter()
    fit_mle(model, data, se=None, progress=False)
    t_mle = time.perf_counter() - t0

    load0 = os.getloadavg()[0]
    t0 = time.perf_counter()
    post = fit_bayes(
        model,
        data,
        hierarchical=True,
        chains=CHAINS,
        draws=DRAWS,
        warmup=WARMUP,
        seed=0,
        progress=False,
        loo="trial",  # the sampler is measured here, not leave-one-subject-out refits
        point_fits=ML_POINT_FITS,
    )
    total = time.perf_counter() - t0
    load1 = os.getloadavg()[0]
    d = post.diagnostics
    sampling = post.run["sampling_seconds"]
    check = post.run["truncation_check"]
    leapfrogs = int(np.sum(post.idata.sample_stats["n_steps"].values))
    rows = [
        ("data", f"{data.n_subjects} subjects, {data.n_obs} decisions (solo trials of the demo)"),
        (
            "chains x draws (warm-up)",
            f"{CHAINS} x {DRAWS} ({WARMUP}), {post.run['chain_method']} chains, "
            f"{post.run['parametrisation']}, dense mass matrix for the population, "
            "start at per-subject ML fits",
        ),
        (
            "total wall time (incl. compilation, ML start, post-processing)",
            f"{total:.0f} s (goal <= {GOAL_SECONDS:.0f} s at min bulk ESS >= {ESS_GOAL:.0f}: "
            f"{'met' if total <= GOAL_SECONDS and d['min_ess_bulk'] >= ESS_GOAL else 'NOT met'})",
        ),
        (
            "of which: start (per-subject ML fits, data preparation)",
            f"{post.run['start_seconds']:.0f} s",
        ),
        ("of which: NUTS warm-up + sampling (incl. compilation)", f"{sampling:.0f} s"),
        (
            "of which: pointwise log-likelihood / other post-processing (ArviZ, LOO)",
            f"{post.run['pointwise_seconds']:.0f} s / "
            f"{total - sampling - post.run['start_seconds'] - post.run['pointwise_seconds']:.0f} s",
        ),
        ("machine load average (1 min) before / after the fit", f"{load0:.1f} / {load1:.1f}"),
        (
            "max R-hat (all population and subject quantities)",
            f"{d['max_rhat']:.4f} (goal <= 1.01: {'met' if d['max_rhat'] <= 1.01 else 'NOT met'})",
        ),
        ("min bulk / tail ESS", f"{d['min_ess_bulk']:.0f} / {d['min_ess_tail']:.0f}"),
        (
            "min bulk ESS per second of NUTS (warm-up + sampling)",
            f"{d['min_ess_bulk'] / sampling:.2f}",
        ),
        (
            "bulk ESS/s of r (population median)",
            f"{post.params.loc['r: population median', 'ess_bulk'] / sampling:.2f}",
        ),
        ("divergences / max-tree-depth hits", f"{d['divergences']} / {d['max_treedepth_hits']}"),
        ("leapfrog steps (post warm-up, all chains)", f"{leapfrogs}"),
        (
            "baseline: one hierarchical gradient",
            f"{t_grad * 1e3:.2f} ms; sampling = {sampling / t_grad:.0f} gradient times",
        ),
        (
            "baseline: one gradient of the row-by-row likelihood (plain model's form)",
            f"{t_plain * 1e3:.1f} ms = {t_plain / t_grad:.0f} x the engine's gradient",
        ),
        (
            "baseline: pooled ML fit (no SEs, default planner cap)",
            f"{t_mle:.1f} s; Bayes total = {total / t_mle:.0f} x ML",
        ),
        (
            f"max |loglik(cap {check['max_target']}) - loglik(default cap)| over "
            f"{check['draws_checked']} "
            "posterior draws",
            f"{check['max_abs_loglik_difference']:.2e} (tolerance {check['tolerance']:g}; "
            f"checked in {post.run['truncation_seconds']:.1f} s)",
        ),
    ]
    table = "\n".join(f"| {a} | {b} |" for a, b in rows)
    cores = os.cpu_count() or 1
    reading = (
        f"Reading: {leapfrogs / (CHAINS * DRAWS):.0f} leapfrog steps (gradients) per draw after "
        f"warm-up, {leapfrogs} in all, each {t_grad * 1e3:.2f} ms when timed alone: with "
        f"{CHAINS} chains on {cores} cores the kept draws alone are >= "
        f"{leapfrogs * t_grad / cores:.0f} s of gradient work, warm-up (same length) about as "
        "much again, and other jobs share the cores."
    )
    reading += (
        " History on this machine (4 chains x 1000 draws after 1000 warm-up, 2026-12-02): 645 "
        "s with NUTS's warm-up starting from the identity mass matrix and cap 100; 370 s "
        "starting from the per-subject normal-approximation variances (cap 100); 167 s with "
        "cap 50 as well; 190 s at the automatic cap (data horizon + 30), min bulk ESS 1,742, "
        "9.9 min bulk ESS per second of NUTS. This run: 2 chains x 600 draws after 400 warm-up."
    )
    if total > GOAL_SECONDS or d["min_ess_bulk"] < ESS_GOAL:
        reading += (
            f" The goal is not met in this run (total {total:.0f} s, min bulk ESS "
            f"{d['min_ess_bulk']:.0f}); the machine's load average above says how much of the "
            "time other jobs took."
        )
    est = post.params.loc[
        [
            "r: population median",
            "precision: population median",
            "r: between-subject sd",
            "precision: between-subject sd",
        ],
        ["estimate", "se", "ci_low", "ci_high", "r_hat", "ess_bulk"],
    ]
    return (
        "## Bayes: hierarchical crra+planner+logit on the demo data\n\n"
        "| quantity | value |\n|---|---|\n" + table + "\n\n" + reading + "\n\n"
        "Population estimates (posterior mean, sd, 95% HDI):\n\n```\n"
        + est.to_string(float_format=lambda v: f"{v:.4g}")
        + "\n```\n\n"
        + ("Warnings: " + "; ".join(post.warnings) if post.warnings else "No sampler warnings.")
        + "\n"
    )


if __name__ == "__main__":
    print(main())
