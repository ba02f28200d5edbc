"""The geometry behind the divergences that remain in the pooled planner model at low
precision (issue 16, item 2): how wide the posterior of r is at each precision.

For a logit choice P(draw) = sigmoid(precision * D_i(r)), as precision -> 0

    log L = n log(1/2) + precision * sum_i (y_i - 1/2) D_i(r) + O(precision^2),

so the data inform r only through precision * S(r): the curvature of log L in r shrinks in
proportion to precision and r's conditional posterior widens towards its prior as precision
falls. In the sampler's coordinates (z_r, log precision) that is a funnel (narrow in z_r at
high precision, wide at low precision); when the posterior of precision spans orders of
magnitude, no single step size suits both ends and NUTS diverges in the narrow part.

This script measures it without MCMC, on a grid: for the calibration study's replications
(benchmarks/study_cliff.py: the same design, parameter draws and model, r below the cliff
where the data rule out r >= 1), the exact log posterior (engine's likelihood and priors,
estimation/bayes/density.py) on 41 values of log precision x 801 values of z_r; per log
precision the conditional sd of z_r (normalised grid density) and the marginal mass. Reported:
precision's posterior 1% / 50% / 99% quantiles (grid marginal) and the conditional sd of z_r
at the 1% and 99% quantiles, whose ratio is the funnel's width ratio the sampler must cross.

Run ``python -m benchmarks.study_funnel [replications]`` (default 6); the section goes into
benchmarks/RESULTS.md.
"""

from __future__ import annotations

import os
import sys
import time
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

import stopwise
from benchmarks._common import write_section
from benchmarks.study_sbc import MODELS, SEED, draw_truth
from stopwise.estimation.bayes import density
from stopwise.estimation.bayes import prepare as preparation
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.estimation.bayes.support import sample_below_cliff
from stopwise.models.spec import build_model

SPEC = "crra+planner+logit"
LOG_PRECISION = np.linspace(np.log(1e-3), np.log(1e2), 41)
Z_R = np.linspace(-12.0, 12.0, 801)


def log_posterior_grid(model: Any, data: Any) -> np.ndarray:
    """log p(z_r, log precision | data) up to a constant, shape (41, 801)."""
    setup, args, *_ = preparation.prepare(
        model, data, hierarchical=False, formulas=None, priors=None, pointwise="trial"
    )

    def at(z_r: Any, z_p: Any) -> Any:
        sites = {"z_r": z_r, "z_precision": z_p}
        return density.total_loglik(setup, sites, args) + density.intercept_prior(setup, sites)

    spec = model.spec("precision")
    z_prec = np.array([float(spec.to_unconstrained(np.exp(v))) for v in LOG_PRECISION])
    row = jax.jit(jax.vmap(at, in_axes=(0, None)))
    return np.stack([np.asarray(row(jnp.asarray(Z_R), zp)) for zp in z_prec])


def funnel_figures(logp: np.ndarray) -> dict[str, float]:
    """Marginal quantiles of precision and the conditional sd of z_r there (grid sums;
    log precision is the sampler's coordinate up to the transform's shift)."""
    logp = np.where(np.isfinite(logp), logp, -np.inf)
    weights = np.exp(logp - np.max(logp))
    conditional = weights / np.maximum(weights.sum(axis=1, keepdims=True), 1e-300)
    mean = conditional @ Z_R
    sd = np.sqrt(np.maximum(conditional @ Z_R**2 - mean**2, 0.0))
    marginal = weights.sum(axis=1)
    cdf = np.cumsum(marginal) / marginal.sum()
    q = {p: int(np.searchsorted(cdf, p)) for p in (0.01, 0.5, 0.99)}
    return {
        "p01": float(np.exp(LOG_PRECISION[q[0.01]])),
        "p50": float(np.exp(LOG_PRECISION[q[0.5]])),
        "p99": float(np.exp(LOG_PRECISION[q[0.99]])),
        "sd_low": float(sd[q[0.01]]),
        "sd_high": float(sd[q[0.99]]),
    }


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    replications = int(argv[0]) if argv else 6
    options, make_design = MODELS[SPEC]
    model = build_model(SPEC, **options)
    design = make_design()
    key = jax.random.PRNGKey(SEED)
    t0 = time.perf_counter()
    lines = [
        "## Bayes: the funnel at low precision in the pooled planner model (issue 16, item 2)",
        "",
        f"{SPEC}, the calibration study's design and draws (the first {replications} "
        "replications of benchmarks/study_cliff.py, whose divergences are in the section "
        "above), r sampled below the cliff where the data rule it out. Exact log posterior "
        "on a grid (41 log precision x 801 z_r, no MCMC; script benchmarks/study_funnel.py): "
        "precision's posterior quantiles and the conditional posterior sd of z_r (the "
        "sampler's coordinate for r) at precision's 1% and 99% quantiles.",
        "",
        "| rep | true r | true precision | precision 1% / 50% / 99% | sd(z_r) at precision "
        "1% | sd(z_r) at 99% | width ratio |",
        "|---|---|---|---|---|---|---|",
    ]
    for rep in range(replications):
        key, k_rep = jax.random.split(key)
        k_truth, k_sim, _ = jax.random.split(k_rep, 3)
        truth = draw_truth(model, resolve_priors(model), k_truth)
        data = stopwise.load(model.simulate(truth, design, k_sim)).arrays()
        model.options["prepare"](data)
        used, _note = sample_below_cliff(
            model, data, hierarchical=False, formulas=None, priors=None
        )
        f = funnel_figures(log_posterior_grid(used, data))
        lines.append(
            f"| {rep} | {truth['r']:.2f} | {truth['precision']:.3g} | {f['p01']:.3g} / "
            f"{f['p50']:.3g} / {f['p99']:.3g} | {f['sd_low']:.2f} | {f['sd_high']:.2f} | "
            f"{f['sd_low'] / max(f['sd_high'], 1e-12):.1f} |"
        )
        print(lines[-1], flush=True)
    lines += [
        "",
        f"{time.perf_counter() - t0:.0f} s; load average (1 min) at the end "
        f"{os.getloadavg()[0]:.1f} (shared machine).",
    ]
    text = "\n".join(lines) + "\n"
    write_section("study_funnel", text)
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
