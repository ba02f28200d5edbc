"""Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018) of pooled
Bayesian fits: two solo models and one contest model.

For each replication: draw the parameters from the default priors (truncated to the bounds),
simulate a data set, sample the posterior with NUTS at the engine's default start (the ML
estimate and Laplace covariance, estimation/bayes/pooled_start.py), thin to L = 99 draws (the first
99 of 2 x 50) and record the rank of the true value among them. If the sampler and the
likelihood are right, ranks are uniform on 0..99. Ranks are binned into 10 bins; each bin
count is Binomial(N, 1/10) under uniformity, and the 99% simultaneous band is the
Bonferroni band [binom.ppf(0.005/10), binom.isf(0.005/10)] (every bin inside it with
probability >= 0.99). Pearson's chi-square (9 df) is reported beside it. The rank
histograms with the band are drawn to benchmarks/sbc_ranks_<model>.png.

Every replication builds its own sampler and releases the compiled programs afterwards
(``bayes.release_compiled_programs``): JAX would otherwise keep one compiled loop per run,
about 960 memory mappings each, and reach Linux's limit of 65,530 after about 60.

Replication r's key is the r-th key of the chain key, k_r = split(key) from PRNGKey(SEED),
drawn up front in the parent, so every replication depends only on (SEED, r) and runs as one
task of the study runner (estimation/distributed.py): in-process, on a LocalCluster
(``--workers N``) or on an existing cluster (``--scheduler ADDRESS`` or
$STOPWISE_SCHEDULER), with the same ranks. A replication that fails twice is counted and
reported with its index, never hidden.

Run ``python -m benchmarks.study_sbc [--workers N | --scheduler ADDRESS] [replications]
[model ...]`` (default in-process, 1,000 replications and all three models); the section
goes into benchmarks/RESULTS.md.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from dataclasses import dataclass
from typing import Any

import jax
import numpy as np
from scipy import stats

import stopwise
from benchmarks._common import write_section
from stopwise.commands._cluster import add_cluster_options, cluster_kwargs
from stopwise.commands.simulate import contest_design, price_list_design
from stopwise.estimation.bayes import fit as bayes
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.estimation.distributed import run_tasks
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

CHAINS, WARMUP, DRAWS, THIN = 2, 250, 500, 10  # 2 x 50 thinned draws, first 99 kept
KEPT = 99
BINS = 10
BAND = 0.99
SEED = 20181001
FIGURE = os.path.join(os.path.dirname(__file__), "sbc_ranks_{}.png")

# model -> (model options, design builder); invented designs, no real data
MODELS: dict[str, tuple[dict[str, Any], Any]] = {
    "crra+planner+logit": (
        {"max_target": 50},
        lambda: stopping_design(5, 16, (0.6, 0.75), 1.0, SEED),
    ),
    "crra+logit": ({}, lambda: price_list_design([f"s{i:02d}" for i in range(20)], 10)),
    "crra+qre": (
        {"max_target": 15},
        # players keep their bank: with winner-takes-all money is 0 or the prize and r is
        # not identified (the model warns), which would make its ranks uniform by default
        lambda: contest_design(stopping_design(6, 12, (0.7, 0.8), 1.0, SEED), 2, 10.0, True),
    ),
}


def draw_truth(model: Any, priors: Any, key: Any) -> dict[str, float]:
    keys = jax.random.split(key, len(model.params))
    return {s.name: float(priors[s.name].sample(s, k, 1)[0]) for s, k in zip(model.params, keys)}


@dataclass(frozen=True)
class Sampling:
    """NUTS settings of every replication: chains x draws after warm-up, every thin-th draw
    kept, the first ``kept`` of those ranked (ranks 0..kept)."""

    chains: int = CHAINS
    warmup: int = WARMUP
    draws: int = DRAWS
    thin: int = THIN
    kept: int = KEPT


@dataclass(frozen=True)
class Study:
    """What every replication shares: the model, its design and the sampler settings."""

    model: Any
    design: Any
    sampling: Sampling = Sampling()


def replication_keys(replications: int, seed: int = SEED) -> list[np.ndarray]:
    """k_r for r = 0..R-1: key, k_r = split(key) from PRNGKey(seed), as raw uint32 pairs."""
    key = jax.random.PRNGKey(seed)
    keys = []
    for _ in range(replications):
        key, k_rep = jax.random.split(key)
        keys.append(np.asarray(k_rep))
    return keys


def sbc_task(rep: int, key: np.ndarray, study: Study) -> tuple[dict, int]:
    """Replication ``rep`` of the study with its key (one task of the runner)."""
    return one_replication(study.model, study.design, jax.numpy.asarray(key), study.sampling)


def one_replication(
    model: Any, design: Any, key: Any, sampling: Sampling = Sampling()
) -> tuple[dict, int]:
    """Ranks of the true values among ``sampling.kept`` thinned draws, and the divergent
    transitions."""
    k_truth, k_sim, k_run = jax.random.split(key, 3)
    truth = draw_truth(model, resolve_priors(model), k_truth)
    frame = model.simulate(truth, design, k_sim)
    post = bayes.fit_bayes(
        model,
        stopwise.load(frame),
        chains=sampling.chains,
        draws=sampling.draws,
        warmup=sampling.warmup,
        seed=int(jax.random.randint(k_run, (), 0, 2**30)),
        progress=False,
        loo="trial",
        loo_refits=False,
        point_fits=ML_POINT_FITS,
    )
    ranks = {}
    for s in model.params:
        x = post.idata.posterior[s.name].values[:, :: sampling.thin].reshape(-1)
        x = x[: sampling.kept]
        ranks[s.name] = int(np.sum(x < truth[s.name]))
    return ranks, int(post.diagnostics["divergences"])


def band(replications: int) -> tuple[int, int]:
    """Bonferroni 99% simultaneous band of BINS Binomial(N, 1/BINS) bin counts."""
    tail = (1.0 - BAND) / 2.0 / BINS
    return (
        int(stats.binom.ppf(tail, replications, 1.0 / BINS)),
        int(stats.binom.isf(tail, replications, 1.0 / BINS)),
    )


def run(
    spec: str,
    replications: int,
    workers: int | None = 0,
    scheduler: str | None = None,
    sampling: Sampling = Sampling(),
) -> dict[str, Any]:
    """The study of one model: every replication a task of the runner (module docstring)."""
    options, make_design = MODELS[spec]
    model = build_model(spec, **options)
    study = Study(model, make_design(), sampling)
    inputs = [{"rep": r, "key": k} for r, k in enumerate(replication_keys(replications))]
    t0 = time.perf_counter()
    done = run_tasks(
        sbc_task,
        inputs,
        workers=workers,
        scheduler=scheduler,
        desc=f"SBC {spec}",
        shared={"study": study},
    )
    for failure in done.failures:  # counted and reported, never hidden
        print(f"{spec} replication {failure.index}: failed ({failure.error})", flush=True)
    ranks: dict[str, list[int]] = {s.name: [] for s in model.params}
    divergent = 0
    for got, div in (r for r in done.results if r is not None):
        divergent += div
        for name, value in got.items():
            ranks[name].append(value)
    failed = len(done.failures)
    n = len(next(iter(ranks.values())))
    lo, hi = band(n)
    params = {}
    for name, values in ranks.items():
        counts = np.bincount(
            np.asarray(values, dtype=int) * BINS // (sampling.kept + 1), minlength=BINS
        )
        chi2, p = stats.chisquare(counts)
        inside = bool(np.all((counts >= lo) & (counts <= hi)))
        params[name] = {"counts": counts.tolist(), "chi2": chi2, "p": p, "inside": inside}
    return {
        "spec": spec,
        "replications": n,
        "planned": replications,
        "failed": failed,
        "divergent": divergent,
        "seconds": time.perf_counter() - t0,
        "where": done.where,
        "ranks": ranks,
        "band": (lo, hi),
        "params": params,
    }


def draw_figure(results: list[dict[str, Any]], path: str) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    panels = [(r, name) for r in results for name in r["params"]]
    fig, axes = plt.subplots(1, len(panels), figsize=(3.2 * len(panels), 3.0), squeeze=False)
    for ax, (r, name) in zip(axes[0], panels):
        counts = r["params"][name]["counts"]
        lo, hi = r["band"]
        ax.axhspan(lo, hi, color="0.85", label=f"{BAND:.0%} simultaneous band")
        ax.bar(range(BINS), counts, color="tab:blue", width=0.9)
        ax.axhline(r["replications"] / BINS, color="0.3", lw=0.8)
        ax.set_title(f"{r['spec']}\n{name} (N = {r['replications']})", fontsize=8)
        ax.set_xlabel(f"rank bin (of {KEPT + 1} ranks)", fontsize=8)
        ax.set_ylabel("replications", fontsize=8)
        ax.tick_params(labelsize=7)
    axes[0][0].legend(fontsize=7, loc="upper right", framealpha=0.9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


def section(results: list[dict[str, Any]]) -> str:
    lines = [
        f"## Bayes: simulation-based calibration, pooled {results[0]['spec']}",
        "",
        f"Talts et al. (2018) ranks of the true value among {KEPT} thinned posterior draws "
        f"({CHAINS} chains x {DRAWS} draws after {WARMUP} warm-up, every {THIN}th kept), "
        f"parameters from the default priors, invented designs (benchmarks/study_sbc.py), "
        f"seed {SEED}, replications run {results[0]['where']}. {BINS} bins; band: Bonferroni {BAND:.0%} simultaneous binomial band; "
        f"Pearson chi-square ({BINS - 1} df) beside it. Figure: "
        f"benchmarks/sbc_ranks_{results[0]['spec'].replace('+', '_')}.png. "
        f"Load average (1 min) at the end: {os.getloadavg()[0]:.1f} (shared machine).",
        "",
        "| model | parameter | N | bin counts | band | inside band? | chi-square p | "
        "divergent | failed | seconds |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for r in results:
        for name, p in r["params"].items():
            lines.append(
                f"| {r['spec']} | {name} | {r['replications']} | "
                f"{' '.join(map(str, p['counts']))} | {r['band'][0]}-{r['band'][1]} | "
                f"{'yes' if p['inside'] else 'NO'} | {p['p']:.3f} | {r['divergent']} | "
                f"{r['failed']} | {r['seconds']:.0f} |"
            )
    done, planned = results[0]["replications"], results[0]["planned"]
    if done + results[0]["failed"] < planned:
        lines += [
            "",
            f"Finished {done} of {planned} planned replications (a run stopped early); "
            "every finished replication is counted.",
        ]
    lo, hi = results[0]["band"]
    if lo == 0 and hi >= results[0]["replications"]:
        lines += [
            "",
            f"At N = {results[0]['replications']} no bin can leave the band [{lo}, {hi}]: "
            "this is a run of the machinery, not a calibration check.",
        ]
    return "\n".join(lines) + "\n"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.study_sbc")
    parser.add_argument("replications", nargs="?", type=int, default=1000)
    parser.add_argument("models", nargs="*", default=[], help=", ".join(MODELS))
    add_cluster_options(parser)
    parser.set_defaults(workers=0)  # in-process unless asked
    args = parser.parse_args(sys.argv[1:] if argv is None else argv)
    unknown = sorted(set(args.models) - set(MODELS))
    if unknown:
        parser.error(f"unknown model(s) {', '.join(unknown)}; choose from {', '.join(MODELS)}")
    for spec in args.models or list(MODELS):  # one section and figure per model
        results = [run(spec, args.replications, **cluster_kwargs(args))]
        draw_figure(results, FIGURE.format(spec.replace("+", "_")))
        text = section(results)
        write_section(f"study_sbc {spec}", text)
        print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
