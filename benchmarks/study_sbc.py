"""Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018) of the
pooled Bayesian fit of crra+planner+logit on a small design.

For each replication: draw (r, precision) from the default priors (truncated to the bounds),
simulate a data set, sample the posterior with NUTS, thin to L = 99 draws (the first 99 of 2 x 50) and record the rank
of the true value among them. If the sampler and the likelihood are right, ranks are uniform
on 0..99; we bin them into 10 bins and apply Pearson's chi-square test (9 df).

Rows are aggregated and padded to a fixed width with a fixed horizon, so every data set has
the same shapes. NumPyro compiles its sampler loop again for every run and JAX would keep
each compiled loop (about 960 memory mappings per replication: the first 200-replication run
died at Linux's limit of 65,530 after 60), so each replication builds its own sampler and
releases the compiled programs afterwards (``bayes.release_compiled_programs``). Run
``python -m benchmarks.study_sbc [replications]``; the section goes into
benchmarks/RESULTS.md.
"""

from __future__ import annotations

import sys
import time
from functools import partial

import jax
import numpy as np
from scipy import stats

import stopwise  # noqa: F401  (float64 before any JAX use)
from benchmarks._common import write_section

SPEC = "crra+planner+logit"
SUBJECTS, TRIALS = 5, 16
P_SURVIVE = (0.6, 0.75)
HORIZON = 40  # P(40 straight successes at p = 0.75) = 1e-5 per trial
CAP = 50  # planner truncation (exact to double precision here; see bench_bayes)
WIDTH = 2 * 3 * HORIZON  # distinct (condition, step, action/bust) rows at most
CHAINS, WARMUP, DRAWS, THIN = 2, 250, 500, 10  # 2 x 50 thinned draws, first 99 kept
KEPT = 99
BINS = 10
SEED = 20181001


def simulate_dataset(model, priors, design, key):
    from stopwise.data_schemas.bundle import to_stopping_data

    k_r, k_p, k_sim = jax.random.split(key, 3)
    truth = {
        "r": float(priors["r"].sample(model.spec("r"), k_r, 1)[0]),
        "precision": float(priors["precision"].sample(model.spec("precision"), k_p, 1)[0]),
    }
    frame = model.simulate(truth, design, k_sim)
    return truth, to_stopping_data(frame, horizon=HORIZON)


def run(replications: int) -> dict:
    from numpyro.infer import MCMC, NUTS

    from stopwise.estimation import bayes
    from stopwise.estimation.priors import resolve_priors
    from stopwise.estimation.recovery import stopping_design
    from stopwise.models.spec import build_model

    model = build_model(SPEC, max_target=CAP)
    priors = resolve_priors(model)
    design = stopping_design(SUBJECTS, TRIALS, P_SURVIVE, 1.0, SEED)
    key = jax.random.PRNGKey(SEED)
    ranks = {"r": [], "precision": []}
    setup = None
    t0 = time.perf_counter()
    skipped = 0
    divergent = 0
    for rep in range(replications):
        key, k_data, k_run = jax.random.split(key, 3)
        truth, data = simulate_dataset(model, priors, design, k_data)
        if data.horizon != HORIZON:  # a trial beyond the fixed horizon (not seen in practice)
            skipped += 1
            continue
        this_setup, args, *_ = bayes.prepare(
            model, data, hierarchical=False, formulas=None, priors=None, pointwise="row"
        )
        args = bayes.pad_cells(args, WIDTH)
        setup = setup or this_setup  # one Setup: the model's functions stay the same
        kernel = NUTS(
            partial(bayes.numpyro_model, setup),
            init_strategy=bayes.init_near(
                values={f"z_{s.name}": float(s.to_unconstrained(s.start)) for s in model.params}
            ),
        )
        mcmc = MCMC(
            kernel,
            num_warmup=WARMUP,
            num_samples=DRAWS,
            num_chains=CHAINS,
            chain_method="vectorized",
            progress_bar=False,
            jit_model_args=True,
        )
        mcmc.run(k_run, args, extra_fields=("diverging",))
        divergent += int(np.sum(np.asarray(mcmc.get_extra_fields()["diverging"])))
        samples = {k: np.asarray(v) for k, v in mcmc.get_samples(group_by_chain=True).items()}
        bayes.release_compiled_programs()
        for spec in model.params:
            z = np.asarray(samples[f"z_{spec.name}"])[:, ::THIN].reshape(-1)[:KEPT]
            x = np.asarray(spec.to_natural(z))
            ranks[spec.name].append(int(np.sum(x < truth[spec.name])))
        if rep % 10 == 0:
            print(f"replication {rep}: {time.perf_counter() - t0:.0f} s {ranks}", flush=True)
    elapsed = time.perf_counter() - t0
    kept = KEPT
    result = {
        "replications": len(ranks["r"]),
        "skipped": skipped,
        "kept_draws": kept,
        "seconds": elapsed,
        "divergent": divergent,
        "params": {},
    }
    for name, values in ranks.items():
        counts = np.bincount(np.asarray(values) * BINS // (kept + 1), minlength=BINS)
        chi2, p = stats.chisquare(counts)
        result["params"][name] = {
            "counts": counts.tolist(),
            "chi2": float(chi2),
            "p_value": float(p),
        }
    return result


def section(result: dict) -> str:
    lines = [
        "## Bayes: simulation-based calibration (pooled crra+planner+logit)",
        "",
        f"Talts et al. (2018) ranks of the true value among {result['kept_draws']} thinned "
        f"posterior draws ({CHAINS} chains x {DRAWS} draws after {WARMUP} warm-up, every "
        f"{THIN}th kept), {result['replications']} replications from the default priors, "
        f"design {SUBJECTS} subjects x {TRIALS} trials at p_survive {P_SURVIVE}, gain 1, "
        f"seed {SEED}. Ranks binned into {BINS} bins; Pearson chi-square test of uniformity "
        f"(scipy.stats.chisquare, {BINS - 1} df). {result['divergent']} divergent transitions "
        f"in all; {result['skipped']} replications skipped; {result['seconds']:.0f} s.",
        "",
        "| parameter | bin counts | chi-square | p-value | uniform at 1%? |",
        "|---|---|---|---|---|",
    ]
    for name, r in result["params"].items():
        ok = "yes" if r["p_value"] > 0.01 else "NO"
        lines.append(
            f"| {name} | {' '.join(map(str, r['counts']))} | {r['chi2']:.1f} | "
            f"{r['p_value']:.3f} | {ok} |"
        )
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    replications = int(argv[0]) if argv else 200
    text = section(run(replications))
    write_section("study_sbc", text)
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
