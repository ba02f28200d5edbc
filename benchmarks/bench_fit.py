"""Speed of maximum-likelihood fitting.

1. Pooled crra+planner+logit with subject-clustered SEs on demo-like data (120 subjects x 60
   trials, simulated), end to end including JIT compilation, against the same likelihood
   fitted through statsmodels' GenericLikelihoodModel with numerical derivatives (BFGS,
   numerical Hessian, clustered covariance) in the same process, once on our compiled JAX
   likelihood and once on a plain numpy one; estimates must agree to 1e-4. Each run is a
   fresh process: with an empty persistent compilation cache, then with the filled one.
2. Per-subject fits of 1,000 simulated subjects with the vmapped Newton method (including
   compilation), against a Python loop of scipy trust-exact fits, one subject at a time,
   timed on 20 subjects and scaled to 1,000. Both sides include their compilation.
3. The five ratios of issue 13 (benchmarks/fit_ratios.py): warm pooled fits against
   statsmodels, whole-process fit and validate against plain scripts, compare with
   cross-validation against single fits, and the subject bootstrap against one fit.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

import stopwise  # noqa: F401  (float64)
from benchmarks import fit_ratios
from benchmarks._common import machine
from benchmarks.bench_loglik import numpy_rows_loglik
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.by_subject import fit_by_subject
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.problem import (
    PooledRows,
    make_layout,
    natural_np,
    rows_loglik,
    start_vector,
)
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model
from stopwise.models.stopping import Caps

TRUTH = {"r": 0.4, "precision": 2.0}


# The planner's backward induction runs to a cap set by the model option max_p_survive
# (default 0.99: about 3,400 steps); the design's largest survival chance is 0.9, so the cap
# is matched to it (about 330 steps), as a researcher would for this design.
MODEL_OPTIONS = {"max_p_survive": 0.9}


def simulated(subjects: int, trials: int, seed: int):
    model = build_model("crra+planner+logit", **MODEL_OPTIONS)
    design = stopping_design(subjects, trials, (0.6, 0.75, 0.9), 1.0, seed)
    frame = model.simulate(TRUTH, design, jax.random.PRNGKey(seed))
    return model, to_stopping_data(frame)


def ours_pooled(model, data):
    """Seconds of one pooled fit with clustered SEs (the first in a process compiles, or
    loads from the persistent cache)."""
    t0 = time.perf_counter()
    fit = fit_mle(model, data, se="robust", starts=3)
    return fit, time.perf_counter() - t0


def fit_generic(loglikeobs, data, start: np.ndarray):
    """statsmodels GenericLikelihoodModel with the given per-row log-likelihood of the
    unconstrained parameters: BFGS with numerical gradients, numerical Hessian, covariance
    clustered by subject."""
    from statsmodels.base.model import GenericLikelihoodModel

    class Pooled(GenericLikelihoodModel):
        def loglikeobs(self, params):
            return loglikeobs(params)

    n = data.n_obs
    return Pooled(np.asarray(data.draw), np.ones((n, 1))).fit(
        start_params=start,
        method="bfgs",
        maxiter=500,
        disp=0,
        gtol=1e-8,
        cov_type="cluster",
        cov_kwds={"groups": np.asarray(data.subject)},
    )


def statsmodels_pooled(model, data, cold: bool = True):
    """Baseline 1: the same compiled JAX per-row log-likelihood (its compilation timed)."""
    layout = make_layout(model)
    rows = PooledRows(layout)
    if cold:
        jax.clear_caches()
    t0 = time.perf_counter()
    res = fit_generic(
        lambda z: np.asarray(rows_loglik(rows, jnp.asarray(z), data)), data, start_vector(layout)
    )
    return res, time.perf_counter() - t0


def numpy_pooled(model, data):
    """Baseline 2: a plain numpy implementation of the same likelihood (benchmarks/
    bench_loglik.py, same planner cap), as a researcher would write it without stopwise."""
    layout = make_layout(model)
    specs = layout.specs()
    cap = Caps(max_p_survive=MODEL_OPTIONS["max_p_survive"]).planner_cap(data.horizon)

    def loglikeobs(z: np.ndarray) -> np.ndarray:
        theta = {spec.name: float(natural_np(spec, z[i])) for i, spec in enumerate(specs)}
        return numpy_rows_loglik(theta, data, cap)

    t0 = time.perf_counter()
    res = fit_generic(loglikeobs, data, start_vector(layout))
    return res, time.perf_counter() - t0


def pooled_worker() -> dict:
    """One process: ours cold (whatever the compilation cache holds), ours again, then both
    baselines; seconds, estimates and their agreement."""
    model, data = simulated(120, 60, 1)
    fit, t_ours = ours_pooled(model, data)
    _, t_ours_warm = ours_pooled(model, data)
    res_jax, t_sm = statsmodels_pooled(model, data)
    res_np, t_np = numpy_pooled(model, data)
    return {
        "n_obs": data.n_obs,
        "n_subjects": data.n_subjects,
        "ours": t_ours,
        "ours_in_process": t_ours_warm,
        "sm_jax": t_sm,
        "sm_numpy": t_np,
        "diff_jax": float(np.max(np.abs(fit.z - np.asarray(res_jax.params)))),
        "diff_numpy": float(np.max(np.abs(fit.z - np.asarray(res_np.params)))),
        "se_ratio_numpy": float(
            np.max(np.abs(np.sqrt(np.diag(fit.cov_z)) / np.asarray(res_np.bse) - 1))
        ),
        "r": float(fit.params.loc["r", "estimate"]),
        "precision": float(fit.params.loc["precision", "estimate"]),
        "se": [float(x) for x in fit.params["se"]],
    }


def pooled_in_fresh_process(cache_dir: str) -> dict:
    """pooled_worker() in a new Python process whose compilation cache is ``cache_dir``."""
    env = dict(os.environ, STOPWISE_CACHE_DIR=cache_dir)
    env.pop("JAX_COMPILATION_CACHE_DIR", None)
    out = subprocess.run(
        [sys.executable, "-m", "benchmarks.bench_fit", "--pooled-worker"],
        env=env,
        capture_output=True,
        text=True,
        check=True,
        cwd=Path(__file__).parent.parent,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def ours_by_subject(model, data):
    jax.clear_caches()
    t0 = time.perf_counter()
    result = fit_by_subject(model, data)
    return result, time.perf_counter() - t0


def loop_by_subject(model, data, n: int):
    """fit_mle (scipy trust-exact, exact JAX derivatives, one start, Hessian SEs) in a Python
    loop over n subjects; seconds per subject, compilation included as a user would see it."""
    subject = np.asarray(data.subject)
    jax.clear_caches()
    t0 = time.perf_counter()
    for s in range(n):
        part = data.take(np.flatnonzero(subject == s))
        fit_mle(model, part, se="hessian", starts=1)
    return (time.perf_counter() - t0) / n


def main() -> str:
    with tempfile.TemporaryDirectory(prefix="stopwise-bench-cache-") as cache_dir:
        cold = pooled_in_fresh_process(cache_dir)  # empty cache: compiles and stores
        warm = pooled_in_fresh_process(cache_dir)  # a later run: loads the compiled programs
    model = build_model("crra+planner+logit", **MODEL_OPTIONS)

    lines = [
        "## Maximum-likelihood fitting (bench_fit)",
        "",
        f"Pooled `crra+planner+logit` (option max_p_survive=0.9, the design's largest "
        f"survival chance), {cold['n_subjects']} subjects x 60 trials ({cold['n_obs']} "
        "decisions), subject-clustered SEs, 3 starts, timed from the call of `fit_mle` "
        "(imports and data excluded). Each column pair ran in one fresh process: first with "
        "an empty compilation cache (a true cold start), then again in a new process with "
        "the cache the first one filled (a later run of the same fit). Baselines in the same "
        "processes: statsmodels `GenericLikelihoodModel` (BFGS, numerical gradients and "
        "Hessian, clustered covariance) on (a) the same compiled JAX per-row likelihood "
        "(its compilation timed) and (b) a plain numpy implementation of the same "
        "likelihood (bench_loglik.py, same planner cap). Ratio = baseline / stopwise "
        "(above 1: stopwise faster).",
        "",
        "| run | stopwise (s) | baseline (a): JAX likelihood | baseline (b): numpy likelihood |",
        "|---|---|---|---|",
    ]
    for label, res in (("fresh process, empty cache", cold), ("fresh process, cache filled", warm)):
        lines.append(
            f"| {label} | {res['ours']:.2f} | {res['sm_jax']:.2f} s "
            f"({res['sm_jax'] / res['ours']:.2f}x) | {res['sm_numpy']:.2f} s "
            f"({res['sm_numpy'] / res['ours']:.2f}x) |"
        )
    lines += [
        f"| second fit in the same process | {cold['ours_in_process']:.2f} | | |",
        "",
        f"Agreement: largest difference of the unconstrained estimates {cold['diff_jax']:.1e} "
        f"(a) and {cold['diff_numpy']:.1e} (b) (goal < 1e-4); clustered SEs differ from "
        f"baseline (b)'s by at most {100 * cold['se_ratio_numpy']:.2f}%. Estimates r = "
        f"{cold['r']:.4f}, precision = {cold['precision']:.4f}; SEs "
        f"{np.round(cold['se'], 4).tolist()}.",
        f"Goals: <= 5 s end to end ({'met' if cold['ours'] <= 5 else 'missed'} cold: "
        f"{cold['ours']:.2f} s) and >= 20x faster than the baseline (missed: the best "
        f"ratio is {max(warm['sm_numpy'], warm['sm_jax']) / warm['ours']:.1f}x). With two "
        "parameters the numerical-derivative baseline needs few likelihood evaluations, "
        "and a cold stopwise fit is dominated by tracing and compiling the exact second "
        "derivatives (fully optimised: they run at every optimiser step).",
    ]
    _, big = simulated(1000, 60, 2)
    result, t_vmap = ours_by_subject(model, big)
    per_loop = loop_by_subject(model, big, 20)
    n_conv = sum(f.converged for _, f in result.fits)
    lines += [
        "",
        f"Per-subject fits, 1,000 simulated subjects x 60 trials ({big.n_obs} decisions):",
        "",
        "| run | seconds | ratio |",
        "|---|---|---|",
        f"| stopwise vmapped damped Newton (one compilation) | {t_vmap:.1f} | 1 |",
        f"| fit_mle in a Python loop per subject (20 timed, x50) | "
        f"{per_loop * 1000:.1f} | {per_loop * 1000 / t_vmap:.1f}x the time of stopwise |",
        "",
        f"{n_conv} of 1000 subjects converged; goal <= 60 s.",
        "",
        fit_ratios.section(fit_ratios.measure()),
        "",
        f"Machine: {machine()}.",
    ]
    return "\n".join(lines)


if __name__ == "__main__":
    if sys.argv[1:] == ["--pooled-worker"]:
        with warnings.catch_warnings(), np.errstate(divide="ignore"):
            warnings.simplefilter("ignore")  # statsmodels' df notes for a generic model
            print(json.dumps(pooled_worker()))
    else:
        print(main())
