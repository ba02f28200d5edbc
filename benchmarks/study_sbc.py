"""Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018) of pooled
Bayesian fits: two solo models and one contest model.

For each replication: draw the parameters from the default priors (truncated to the bounds),
simulate a data set, sample the posterior with NUTS at the engine's default start (the ML
estimate and Laplace covariance, estimation/bayes_pooled.py), thin to L = 99 draws (the first
99 of 2 x 50) and record the rank of the true value among them. If the sampler and the
likelihood are right, ranks are uniform on 0..99. Ranks are binned into 10 bins; each bin
count is Binomial(N, 1/10) under uniformity, and the 99% simultaneous band is the
Bonferroni band [binom.ppf(0.005/10), binom.isf(0.005/10)] (every bin inside it with
probability >= 0.99). Pearson's chi-square (9 df) is reported beside it. The rank
histograms with the band are drawn to benchmarks/sbc_ranks_<model>.png.

Every replication builds its own sampler and releases the compiled programs afterwards
(``bayes.release_compiled_programs``): JAX would otherwise keep one compiled loop per run,
about 960 memory mappings each, and reach Linux's limit of 65,530 after about 60.

Run ``python -m benchmarks.study_sbc [replications] [model ...]`` (default 1,000 and all
three); the section goes into benchmarks/RESULTS.md. ``SBC_BUDGET_SECONDS`` bounds a run: no
replication starts after that many seconds, and the section says how many were done. In-process with a progress line per
replication (no distributed runner exists in this branch).
"""

from __future__ import annotations

import math
import os
import sys
import time
from typing import Any

import jax
import numpy as np
from scipy import stats

import stopwise
from benchmarks._common import write_section
from stopwise.commands.simulate import contest_design, price_list_design
from stopwise.estimation import bayes
from stopwise.estimation.priors import resolve_priors
from stopwise.estimation.recovery import stopping_design
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


def one_replication(spec: str, model: Any, design: Any, key: Any) -> tuple[dict, int]:
    """Ranks of the true values among KEPT thinned draws, and the divergent transitions."""
    k_truth, k_sim, k_run = jax.random.split(key, 3)
    truth = draw_truth(model, resolve_priors(model), k_truth)
    frame = model.simulate(truth, design, k_sim)
    post = bayes.fit_bayes(
        model,
        stopwise.load(frame),
        chains=CHAINS,
        draws=DRAWS,
        warmup=WARMUP,
        seed=int(jax.random.randint(k_run, (), 0, 2**30)),
        progress=False,
        loo="trial",
        loo_refits=False,
    )
    ranks = {}
    for s in model.params:
        x = post.idata.posterior[s.name].values[:, ::THIN].reshape(-1)[:KEPT]
        ranks[s.name] = int(np.sum(x < truth[s.name]))
    return ranks, int(post.diagnostics["divergences"])


def band(replications: int) -> tuple[int, int]:
    """Bonferroni 99% simultaneous band of BINS Binomial(N, 1/BINS) bin counts."""
    tail = (1.0 - BAND) / 2.0 / BINS
    return (
        int(stats.binom.ppf(tail, replications, 1.0 / BINS)),
        int(stats.binom.isf(tail, replications, 1.0 / BINS)),
    )


def run(spec: str, replications: int, budget: float = math.inf) -> dict[str, Any]:
    """``replications`` replications, or those started within ``budget`` seconds (the
    section then reports how many were done; every finished one counts, none is dropped)."""
    options, make_design = MODELS[spec]
    model = build_model(spec, **options)
    design = make_design()
    key = jax.random.PRNGKey(SEED)
    ranks: dict[str, list[int]] = {s.name: [] for s in model.params}
    divergent = failed = 0
    t0 = time.perf_counter()
    for rep in range(replications):
        if time.perf_counter() - t0 > budget:
            print(f"{spec}: time budget of {budget:.0f} s reached after {rep} replications")
            break
        key, k_rep = jax.random.split(key)
        try:
            got, div = one_replication(spec, model, design, k_rep)
        except Exception as exc:  # counted and reported, never hidden
            failed += 1
            print(f"{spec} replication {rep}: failed ({type(exc).__name__}: {exc})", flush=True)
            continue
        divergent += div
        for name, value in got.items():
            ranks[name].append(value)
        print(f"{spec} {rep + 1}/{replications} {time.perf_counter() - t0:.0f} s", flush=True)
    n = len(next(iter(ranks.values())))
    lo, hi = band(n)
    params = {}
    for name, values in ranks.items():
        counts = np.bincount(np.asarray(values) * BINS // (KEPT + 1), minlength=BINS)
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
        f"seed {SEED}. {BINS} bins; band: Bonferroni {BAND:.0%} simultaneous binomial band; "
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
            f"Stopped by the time budget (SBC_BUDGET_SECONDS) after {done} of {planned} "
            "planned replications; every finished replication is counted.",
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
    argv = sys.argv[1:] if argv is None else argv
    replications = int(argv[0]) if argv else 1000
    specs = argv[1:] or list(MODELS)
    budget = float(os.environ.get("SBC_BUDGET_SECONDS", "inf"))
    for spec in specs:  # one section and one figure per model: re-run any one alone
        results = [run(spec, replications, budget)]
        draw_figure(results, FIGURE.format(spec.replace("+", "_")))
        text = section(results)
        write_section(f"study_sbc {spec}", text)
        print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
