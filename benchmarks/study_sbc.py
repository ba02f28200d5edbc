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
from benchmarks.sbc_summary import (
    SEED,
    draw_figure,
    section,
    study_slug,
    summarise,
)
from stopwise.commands._cluster import add_cluster_options, cluster_kwargs
from stopwise.commands.simulate import contest_design, price_list_design
from stopwise.estimation.bayes.priors import resolve_priors
from stopwise.estimation.distributed import run_tasks
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

CHAINS, WARMUP, DRAWS, THIN = 2, 200, 250, 5  # 2 x 50 thinned draws, first 99 kept
KEPT = 99
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
