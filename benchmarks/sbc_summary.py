"""The summary and report of a calibration study (benchmarks/study_sbc.py): bin counts,
band and tests per parameter, counts of the replications to look at (refused starts, start
redraws, chains that hardly moved), the rank-histogram figure and the RESULTS.md section."""

from __future__ import annotations

import os
import resource
import time
from typing import Any

import numpy as np

from benchmarks import sbc_ranks as R
from benchmarks import sbc_sampler as S

BINS = R.BINS
SEED = 20181001  # the first study's replication seed (study_sbc.replication_keys)
FROZEN_ESS = 5.0  # a smallest bulk ESS under this: chains that hardly moved (reported by index)

DESIGNS = {
    "crra+logit": "20 subjects x 10 price-list rows",
    "crra+myopic+logit": "5 subjects x 16 trials at p_survive 0.6 / 0.75, gain 1",
    "crra+planner+logit": "5 subjects x 16 trials at p_survive 0.6 / 0.75, gain 1, cap 50",
    "crra+qre": "one group of 2 players x 8 contest trials at p_survive 0.75, gain 1, "
    "prize 10, banks kept, cap 8",
    "crra+ch": "one group of 2 players x 8 contest trials at p_survive 0.75, gain 1, "
    "prize 10, banks kept, cap 8",
}


def slug(spec: str) -> str:
    return spec.replace("+", "_")


def study_slug(spec: str, seed: int = SEED) -> str:
    """The model's slug, with _seed<seed> for a replication seed other than SEED."""
    return slug(spec) if seed == SEED else f"{slug(spec)}_seed{seed}"


def summarise(
    spec: str,
    planned: int,
    outcomes: list[dict[str, Any] | None],
    sampling: Any,
    where: str,
    t0: float,
    cpu0: float,
    seed: int = SEED,
) -> dict[str, Any]:
    """Bin counts, band and tests per parameter from the replications that ran."""
    ranked = [o for o in outcomes if o is not None and "error" not in o]
    failed = [i for i, o in enumerate(outcomes) if o is not None and "error" in o]
    names = list(ranked[0]["ranks"]) if ranked else []
    ranks = {n: [o["ranks"][n] for o in ranked] for n in names}
    band = R.simultaneous_band(len(ranked), BINS)
    params = {}
    for name, values in ranks.items():
        counts = R.bin_counts(values, sampling.kept, BINS)
        params[name] = {
            "counts": counts.tolist(),
            "p": R.chi_square_p(counts),
            "inside": R.inside_band(counts, band),
        }
    ess = np.asarray([o["min_ess"] for o in ranked]) if ranked else np.zeros(1)
    return {
        "spec": spec,
        "replications": len(ranked),
        "planned": planned,
        "not_run": sum(o is None for o in outcomes),
        "failed": failed,
        "errors": sorted({o["error"] for o in outcomes if o is not None and "error" in o}),
        "divergent": int(sum(o["divergent"] for o in ranked)),
        "adapted": int(sum(not o["laplace"] for o in ranked)),
        "redraws": int(sum(o.get("redraws", 0) for o in ranked)),
        "frozen": [
            i
            for i, o in enumerate(outcomes)
            if o and "error" not in o and o["min_ess"] < FROZEN_ESS
        ],
        "redraw_recorded": int(sum("redraws" in o for o in ranked)),
        "refused": [i for i, o in enumerate(outcomes) if o is not None and o.get("refused")],
        "refusal_recorded": int(sum("refused" in o for o in ranked)),
        "seed": seed,
        "ess_median": float(np.median(ess)),
        "ess_low": float(np.quantile(ess, 0.05)),
        "max_residual": float(max((o["residual"] for o in ranked), default=0.0)),
        "checked": int(sum(o.get("checked", True) for o in ranked)),
        "seconds": time.perf_counter() - t0,
        "cpu_seconds": time.process_time() - cpu0,
        "children_cpu": resource.getrusage(resource.RUSAGE_CHILDREN).ru_utime,
        "programs": S.compiled_programs(),
        "where": where,
        "ranks": ranks,
        "band": band,
        "params": params,
        "sampling": sampling.__dict__,
    }


def draw_figure(result: dict[str, Any], path: str) -> None:
    """One panel per parameter: bin counts, the 99% simultaneous band, the expected count."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    names = list(result["params"])
    fig, axes = plt.subplots(1, len(names), figsize=(3.6 * len(names), 3.2), squeeze=False)
    lo, hi = result["band"]
    for ax, name in zip(axes[0], names):
        p = result["params"][name]
        ax.axhspan(lo, hi, color="0.85", label=f"{R.LEVEL:.0%} simultaneous band [{lo}, {hi}]")
        ax.bar(range(BINS), p["counts"], color="tab:blue" if p["inside"] else "tab:red", width=0.9)
        ax.axhline(result["replications"] / BINS, color="0.3", lw=0.8, label="expected")
        verdict = "inside band" if p["inside"] else "OUTSIDE band"
        ax.set_title(
            f"{result['spec']}: {name}\nN = {result['replications']}, {verdict}, "
            f"chi-sq p = {p['p']:.3f}",
            fontsize=8,
        )
        ax.set_xlabel(
            f"rank bin ({(result['sampling']['kept'] + 1) // BINS} ranks each)", fontsize=8
        )
        ax.set_ylabel("replications", fontsize=8)
        ax.set_ylim(0, max(hi, max(p["counts"])) * 1.25)
        ax.tick_params(labelsize=7)
    axes[0][0].legend(fontsize=6, loc="upper left", framealpha=0.9)
    fig.tight_layout()
    fig.savefig(path + ".tmp.png", dpi=110)
    os.replace(path + ".tmp.png", path)
    plt.close(fig)


def section(r: dict[str, Any]) -> str:
    s = r["sampling"]
    per = r["seconds"] / max(1, r["replications"] + len(r["failed"]))
    seed = r.get("seed", SEED)
    title = "" if seed == SEED else f" (replication seed {seed}, a second study)"
    lines = [
        f"## Bayes: simulation-based calibration, pooled {r['spec']}{title}",
        "",
        f"Talts et al. (2018) ranks of the true value among {s['kept']} thinned posterior "
        f"draws ({s['chains']} chains x {s['draws']} draws after {s['warmup']} warm-up, every "
        f"{s['thin']}th kept, the first {s['kept']} ranked), parameters from the default "
        f"priors, invented design: {DESIGNS[r['spec']]} (benchmarks/study_sbc.py), seed {seed}, "
        f"run {r['where']}. "
        "Sampler: the product's pooled start (chains at the mode of the Laplace posterior "
        "N(ML estimate, ML covariance) x prior, one sd of its covariance apart; the warm-up "
        "starts from that covariance as inverse mass matrix and adapts it; where the ML "
        "Hessian is not positive definite its positive part stands in for the ML precision, "
        "and only where it and the prior leave a direction flat do the chains start at the ML "
        "point with the identity, as in the product; a start wider than ten prior sds is "
        "refused and the chains start at the exact posterior mode, "
        "estimation/bayes/mode_start.py) and NumPyro's NUTS on the product's "
        "density, one "
        "compiled program per padded data shape (benchmarks/sbc_sampler.py). "
        f"{BINS} bins; band: Bonferroni {R.LEVEL:.0%} simultaneous binomial band "
        "(benchmarks/sbc_ranks.py); Pearson chi-square (9 df) beside it. Figure: "
        f"benchmarks/sbc_ranks_{study_slug(r['spec'], seed)}.png.",
        "",
        "| parameter | N | bin counts | band | inside band? | chi-square p |",
        "|---|---|---|---|---|---|",
    ]
    for name, p in r["params"].items():
        lines.append(
            f"| {name} | {r['replications']} | {' '.join(map(str, p['counts']))} | "
            f"{r['band'][0]}-{r['band'][1]} | {'yes' if p['inside'] else 'NO'} | {p['p']:.3f} |"
        )
    lines += [
        "",
        f"Replications: {r['replications']} ranked of {r['planned']} planned, "
        f"{len(r['failed'])} failed{' (indices ' + ', '.join(map(str, r['failed'][:20])) + ')' if r['failed'] else ''}, "
        f"{r['not_run']} not run{' (the run was stopped at its deadline)' if r['not_run'] else ''}. "
        "Divergent transitions after warm-up: "
        f"{r['divergent']} in all. Started from the identity, not the Laplace mass matrix: "
        f"{r['adapted']}. Laplace start refused (wider than ten prior sds; exact posterior "
        f"mode instead): {len(r.get('refused', []))} of the {r.get('refusal_recorded', 0)} "
        "replications that record it"
        f"{' (' + ', '.join(map(str, r['refused'][:20])) + ')' if r.get('refused') else ''}. "
        f"Chain starts drawn again because the density or its gradient was not finite there: "
        f"{r.get('redraws', 0)} in the {r.get('redraw_recorded', 0)} replications that record it. "
        f"Replications whose chains hardly moved (smallest bulk ESS under {FROZEN_ESS:g}): "
        f"{len(r.get('frozen', []))}"
        f"{' (' + ', '.join(map(str, r['frozen'][:20])) + ')' if r.get('frozen') else ''}. "
        "Thinning check, smallest bulk ESS over the parameters of the "
        f"{s['chains'] * s['draws']} unthinned draws: median {r['ess_median']:.0f}, 5% quantile "
        f"{r['ess_low']:.0f} (draws {s['thin']} apart are near-independent when ESS >= "
        f"{s['chains'] * s['draws'] // s['thin']}). Aggregation and padding check (relative "
        f"difference of the padded cell sum from the plain row sum, failed above 1e-9; replications 0-49 and every 10th, {r['checked']} in all): max "
        f"{r['max_residual']:.1e}. Compiled sampler "
        f"programs: {r['programs']}. Time: {r['seconds']:.0f} s wall, {r['cpu_seconds']:.0f} s "
        f"CPU (this process), {per:.2f} s wall per replication; load average (1 min) at the "
        f"end {os.getloadavg()[0]:.1f} (shared 2-core machine).",
    ]
    for error in r["errors"][:5]:
        lines.append(f"Failure: {error}")
    lo, hi = r["band"]
    if lo == 0 and hi >= r["replications"]:
        lines += ["", f"At N = {r['replications']} no bin can leave the band: not a check."]
    return "\n".join(lines) + "\n"
