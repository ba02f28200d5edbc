"""Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018) of pooled
Bayesian fits: two solo models and one contest model.

For each replication: draw the parameters from the default priors (truncated to the bounds),
simulate a data set, run the product's pooled-fit start (the Laplace posterior's mode and
covariance, estimation/bayes/laplace_mode.py) and
NumPyro's NUTS on the product's density through one compiled program per data shape
(benchmarks/sbc_sampler.py says what is the same as a user's fit and what differs), thin
every chain to every THIN-th draw, keep the first KEPT = 99 and record the rank of the true
value among them. Ranks are binned into 10 bins with the Bonferroni 99% simultaneous
binomial band (benchmarks/sbc_ranks.py); Pearson's chi-square (9 df) is reported beside it.
The thinning is checked: the bulk ESS of the unthinned draws (ArviZ) per replication is
reported; thinned draws are near-independent when ESS x THIN >= the draws.

Replication r's key is the r-th key of the chain key, k_r = split(key) from PRNGKey(SEED),
drawn up front, so every replication depends only on (SEED, r). In-process (the default) the
study writes its progress to stdout and its results so far to
benchmarks/sbc_results_<model>.json every CHECKPOINT replications (written atomically:
temporary file, then rename); ``--stop-at HH:MM`` (UTC) ends it before that time and reports
the replications not run. With ``--workers N`` or ``--scheduler`` every replication is a task
of the study runner (estimation/distributed.py). A replication that fails is counted and
reported with its index, never hidden.

Run ``python -m benchmarks.study_sbc [replications] [model ...] [--stop-at HH:MM]``;
``--report`` draws the figure and the RESULTS.md section from the saved results; ``--seed N``
runs a second study of the same design with other replication keys (its own results file,
figure and section).
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import resource
import sys
import tempfile
import time
from dataclasses import dataclass
from typing import Any

import arviz as az
import jax
import numpy as np

import stopwise
from benchmarks import sbc_ranks as R
from benchmarks import sbc_sampler as S
from benchmarks._common import write_section
from stopwise.commands._cluster import add_cluster_options, cluster_kwargs
from stopwise.commands.simulate import contest_design, price_list_design
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.estimation.distributed import run_tasks
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

CHAINS, WARMUP, DRAWS, THIN = 2, 200, 250, 5  # 2 x 50 thinned draws, first 99 kept
KEPT = 99
FROZEN_ESS = 5.0  # a smallest bulk ESS under this: chains that hardly moved (reported by index)
BINS = R.BINS
SEED = 20181001
CHECKPOINT = 10
HERE = os.path.dirname(__file__)
FIGURE = os.path.join(HERE, "sbc_ranks_{}.png")
SAVED = os.path.join(HERE, "sbc_results_{}.json")

# model -> (model options, design builder); invented designs, no real data
MODELS: dict[str, tuple[dict[str, Any], Any]] = {
    "crra+logit": ({}, lambda: price_list_design([f"s{i:02d}" for i in range(20)], 10)),
    "crra+myopic+logit": ({}, lambda: stopping_design(5, 16, (0.6, 0.75), 1.0, SEED)),
    "crra+planner+logit": (
        {"max_target": 50},
        lambda: stopping_design(5, 16, (0.6, 0.75), 1.0, SEED),
    ),
    "crra+qre": (
        {"max_target": 8},
        # players keep their bank: with winner-takes-all money is 0 or the prize and r is
        # not identified (the model warns), which would make its ranks uniform by default.
        # A small design (one group of 2, 8 trials, one survival chance, cap 8): every new
        # data size costs a new trace of the QRE likelihood in the ML start
        lambda: contest_design(stopping_design(2, 8, (0.75,), 1.0, SEED), 2, 10.0, True),
    ),
    # the same contest design under the cognitive hierarchy (no fixed point to solve per
    # gradient: 8-11 s per replication here against 14-100+ s for the QRE)
    "crra+ch": (
        {"max_target": 8},
        lambda: contest_design(stopping_design(2, 8, (0.75,), 1.0, SEED), 2, 10.0, True),
    ),
}
DESIGNS = {
    "crra+logit": "20 subjects x 10 price-list rows",
    "crra+myopic+logit": "5 subjects x 16 trials at p_survive 0.6 / 0.75, gain 1",
    "crra+planner+logit": "5 subjects x 16 trials at p_survive 0.6 / 0.75, gain 1, cap 50",
    "crra+qre": "one group of 2 players x 8 contest trials at p_survive 0.75, gain 1, "
    "prize 10, banks kept, cap 8",
    "crra+ch": "one group of 2 players x 8 contest trials at p_survive 0.75, gain 1, "
    "prize 10, banks kept, cap 8",
}
DEFAULT_MODELS = ("crra+logit", "crra+myopic+logit", "crra+qre")


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


def sbc_task(rep: int, key: np.ndarray, study: Study) -> dict[str, Any]:
    """Replication ``rep`` of the study with its key (one task of the runner); the cells and
    padding are checked against the plain row sum in replications 0..49 and every 10th."""
    check = rep < 50 or rep % 10 == 0
    S.release_when_crowded()
    return one_replication(study.model, study.design, jax.numpy.asarray(key), study.sampling, check)


def one_replication(
    model: Any, design: Any, key: Any, sampling: Sampling = Sampling(), check: bool = True
) -> dict[str, Any]:
    """Ranks of the true values among ``sampling.kept`` thinned draws, the divergent
    transitions, the smallest bulk ESS of the unthinned draws and the padding residual."""
    k_truth, k_sim, k_run = jax.random.split(key, 3)
    truth = draw_truth(model, resolve_priors(model), k_truth)
    frame = model.simulate(truth, design, k_sim)
    prepared = S.prepare_replication(model, stopwise.load(frame), ML_POINT_FITS)
    invariant = bool((model.options or {}).get("horizon_invariant"))
    shape = S.padded_shape(prepared.args, pad_horizon=invariant)
    padded = S.pad_args(prepared.args, shape)
    residual = S.row_sum_residual(prepared, padded) if check else 0.0
    if not residual <= 1e-9:
        raise ValueError(f"cells and padding changed the log-likelihood by {residual:.3g}")
    sampler = S.sampler_for(
        prepared, padded, shape, sampling.chains, sampling.warmup, sampling.draws
    )
    z, divergent, redraws = sampler.draw(k_run, prepared, padded)
    ranks, ess = {}, []
    for spec in prepared.setup.specs:
        x = np.asarray(spec.to_natural(z[f"z_{spec.name}"]))
        ranks[spec.name] = R.rank_of_truth(
            R.thinned(x, sampling.thin, sampling.kept), truth[spec.name]
        )
        ess.append(float(az.ess(x, method="bulk")))
    return {
        "ranks": ranks,
        "divergent": divergent,
        "min_ess": min(ess),
        "laplace": prepared.laplace,
        "refused": any("Laplace start was refused" in n for n in prepared.notes),
        "redraws": redraws,
        "residual": residual,
        "checked": check,
    }


def run(
    spec: str,
    replications: int,
    workers: int | None = 0,
    scheduler: str | None = None,
    sampling: Sampling = Sampling(),
    stop_at: float | None = None,
    saved: str | None = None,
    seed: int = SEED,
) -> dict[str, Any]:
    """The study of one model (module docstring): in-process with checkpoints in ``saved``
    (default benchmarks/sbc_results_<model>.json, with _seed<seed> for a replication seed
    other than SEED; resumed from when it holds the same study), or every replication a
    task of the runner. ``seed`` draws the replications' keys; the design is the same."""
    options, make_design = MODELS[spec]
    study = Study(build_model(spec, **options), make_design(), sampling)
    keys = replication_keys(replications, seed)
    t0, cpu0 = time.perf_counter(), time.process_time()
    if workers == 0 and scheduler is None:
        path = saved or SAVED.format(study_slug(spec, seed))
        outcomes = _in_process(spec, study, keys, stop_at, t0, path, seed)
        where = "in-process"
    else:
        inputs = [{"rep": r, "key": k} for r, k in enumerate(keys)]
        done = run_tasks(
            sbc_task,
            inputs,
            workers=workers,
            scheduler=scheduler,
            desc=f"SBC {spec}",
            shared={"study": study},
        )
        failures = {f.index: f.error for f in done.failures}
        outcomes = [
            {"error": failures[i]} if i in failures else got for i, got in enumerate(done.results)
        ]
        where = done.where
        if saved:  # the command line keeps the results of a distributed study too
            save_atomically(
                saved,
                {
                    "spec": spec,
                    "seed": seed,
                    "where": where,
                    "outcomes": outcomes,
                    "sampling": sampling.__dict__,
                    "seconds": time.perf_counter() - t0,
                    "cpu": time.process_time() - cpu0,
                    "programs": S.compiled_programs(),
                },
            )
    return summarise(spec, replications, outcomes, sampling, where, t0, cpu0, seed)


def _in_process(
    spec: str,
    study: Study,
    keys: list[np.ndarray],
    stop_at: float | None,
    t0: float,
    path: str,
    seed: int = SEED,
) -> list[dict[str, Any] | None]:
    """Replications one after another; progress lines and an atomic checkpoint of the
    results in ``path`` every CHECKPOINT replications; None for those not run before
    ``stop_at``."""
    cpu0 = time.process_time()
    outcomes, earlier, earlier_cpu = resumed(spec, study.sampling, len(keys), path, seed)
    t0 -= earlier
    cpu0 -= earlier_cpu
    for r, key in enumerate(keys):
        if outcomes[r] is not None:
            continue
        if stop_at is not None and time.time() >= stop_at:
            print(f"{spec}: stopped at the deadline after {r} replications", flush=True)
            break
        try:
            outcomes[r] = sbc_task(r, key, study)
        except Exception as exc:  # counted and reported, never hidden
            outcomes[r] = {"error": f"{type(exc).__name__}: {exc}"}
            print(f"{spec} replication {r}: failed ({outcomes[r]['error']})", flush=True)
        if (r + 1) % CHECKPOINT == 0 or r + 1 == len(keys):
            elapsed = time.perf_counter() - t0
            print(
                f"{spec}: {r + 1}/{len(keys)} replications, {elapsed:.0f} s, "
                f"{elapsed / (r + 1):.2f} s each, load {os.getloadavg()[0]:.1f}",
                flush=True,
            )
            save_atomically(
                path,
                {
                    "spec": spec,
                    "seed": seed,
                    "outcomes": outcomes[: r + 1],
                    "sampling": study.sampling.__dict__,
                    "seconds": elapsed,
                    "cpu": time.process_time() - cpu0,
                    "programs": S.compiled_programs(),
                },
            )
    return outcomes


def resumed(
    spec: str, sampling: Sampling, n: int, path: str, seed: int = SEED
) -> tuple[list[dict[str, Any] | None], float, float]:
    """Outcomes saved by an earlier run of the same study (same sampling), to go on from
    (replication r depends only on (SEED, r), so the results are those of one run), with
    that run's wall and CPU seconds; nothing when there is no such file."""
    if not os.path.exists(path):
        return [None] * n, 0.0, 0.0
    with open(path, encoding="utf-8") as fh:
        saved = json.load(fh)
    same = saved.get("spec") == spec and saved.get("seed", SEED) == seed
    if saved.get("sampling") != sampling.__dict__ or not same:
        return [None] * n, 0.0, 0.0
    done = saved["outcomes"][:n]
    print(f"{spec}: resuming after {len(done)} saved replications", flush=True)
    return done + [None] * (n - len(done)), float(saved["seconds"]), float(saved["cpu"])


def slug(spec: str) -> str:
    return spec.replace("+", "_")


def study_slug(spec: str, seed: int = SEED) -> str:
    """The model's slug, with _seed<seed> for a replication seed other than SEED."""
    return slug(spec) if seed == SEED else f"{slug(spec)}_seed{seed}"


def save_atomically(path: str, payload: dict[str, Any]) -> None:
    """JSON to a temporary file in the same folder, then renamed over ``path``."""
    folder = os.path.dirname(path) or "."
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=".sbc-", suffix=".json")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(payload, fh)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def summarise(
    spec: str,
    planned: int,
    outcomes: list[dict[str, Any] | None],
    sampling: Sampling,
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


def report(spec: str, result: dict[str, Any]) -> str:
    """Figure, RESULTS.md section and the printed text of one finished study."""
    seed = result.get("seed", SEED)
    draw_figure(result, FIGURE.format(study_slug(spec, seed)))
    text = section(result)
    write_section(f"study_sbc {spec}" + ("" if seed == SEED else f" seed {seed}"), text)
    return text


def from_saved(spec: str, planned: int, seed: int = SEED) -> dict[str, Any]:
    """The summary of a study from its checkpoint file (``--report``): replications after
    the last checkpoint of a stopped run count as not run."""
    with open(SAVED.format(study_slug(spec, seed)), encoding="utf-8") as fh:
        saved = json.load(fh)
    outcomes = saved["outcomes"] + [None] * max(0, planned - len(saved["outcomes"]))
    result = summarise(
        spec,
        len(outcomes),
        outcomes,
        Sampling(**saved["sampling"]),
        saved.get("where", "in-process"),
        time.perf_counter() - saved["seconds"],
        time.process_time() - saved["cpu"],
        seed,
    )
    result["programs"] = saved.get("programs", result["programs"])
    return result


def utc_today_at(hhmm: str) -> float:
    """Epoch seconds of HH:MM UTC today."""
    hour, minute = (int(x) for x in hhmm.split(":"))
    now = dt.datetime.now(dt.timezone.utc)
    return now.replace(hour=hour, minute=minute, second=0, microsecond=0).timestamp()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.study_sbc")
    parser.add_argument("replications", nargs="?", type=int, default=1000)
    parser.add_argument("models", nargs="*", default=[], help=", ".join(MODELS))
    parser.add_argument("--stop-at", default=None, metavar="HH:MM", help="UTC deadline")
    parser.add_argument("--report", action="store_true", help="report the saved results")
    parser.add_argument(
        "--seed", type=int, default=SEED, help=f"replication seed (default {SEED}; same design)"
    )
    add_cluster_options(parser)
    parser.set_defaults(workers=0)  # in-process unless asked
    args = parser.parse_args(sys.argv[1:] if argv is None else argv)
    unknown = sorted(set(args.models) - set(MODELS))
    if unknown:
        parser.error(f"unknown model(s) {', '.join(unknown)}; choose from {', '.join(MODELS)}")
    stop_at = utc_today_at(args.stop_at) if args.stop_at else None
    for spec in args.models or list(DEFAULT_MODELS):  # one section and figure per model
        if args.report:
            result = from_saved(spec, args.replications, args.seed)
        else:
            result = run(
                spec,
                args.replications,
                stop_at=stop_at,
                seed=args.seed,
                saved=SAVED.format(study_slug(spec, args.seed)),
                **cluster_kwargs(args),
            )
        print(report(spec, result), flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
