"""Where the hierarchical benchmark's time goes: compilation, NUTS, start; cold and with the
persistent compilation cache (issue 16, item 6).

The fit of bench_bayes.py (crra+planner+logit, solo trials of the 120 demo subjects,
hierarchical, seed 0) runs in fresh Python processes, one after another, all sharing one new,
empty compilation-cache folder (STOPWISE_CACHE_DIR, stopwise/_compile_cache.py):

1. cold: nothing cached (what bench_bayes measures; the cache is filled on the way);
2. warm: the same fit again, as a researcher's second run of the same model on data of the
   same shape (the ``stopwise`` command line keeps the cache by default);
3. warm, shorter: the same with fewer warm-up and kept iterations (``SHORT`` below);
4. cold, shorter: ``SHORT`` in a fresh process with its own empty cache folder (a first fit
   at the shorter settings).

Each process reports its wall time and CPU seconds (getrusage, user + system, all threads),
the seconds XLA spent compiling (JAX's monitoring event
``/jax/core/compile/backend_compile_duration``, summed), NUTS's seconds (warm-up + sampling,
compilation included), the start (per-subject ML fits), min bulk ESS, max R-hat, leapfrog
steps per kept draw and the four population posterior means. Equal settings and seed give
the same draws whether or not programs come from the cache: the table shows it.

Run ``python -m benchmarks.run bench_bayes_phases`` (about 4 fits' time).
"""

from __future__ import annotations

import contextlib
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator

FULL = (2, 600, 400)  # chains, draws, warm-up: bench_bayes's settings
SHORT = (2, 450, 250)
QUANTITIES = (
    "r: population median",
    "precision: population median",
    "r: between-subject sd",
    "precision: between-subject sd",
)
COMPILE_EVENT = "/jax/core/compile/backend_compile_duration"


def child(chains: int, draws: int, warmup: int) -> dict:
    """One fit in this process (XLA_FLAGS and STOPWISE_CACHE_DIR set by the parent)."""
    import stopwise  # noqa: F401, I001  (cache folder and float64 before any JAX use)
    from jax._src import monitoring

    compiled = [0.0]

    def listen(event: str, seconds: float, **_kw: object) -> None:
        if event == COMPILE_EVENT:
            compiled[0] += seconds

    monitoring.register_event_duration_secs_listener(listen)
    import numpy as np

    from benchmarks.bench_bayes import SPEC, demo_solo_bundle
    from stopwise.estimation.bayes.fit import fit_bayes
    from stopwise.estimation.ml.point_fits import ML_POINT_FITS
    from stopwise.models.spec import build_model

    data = demo_solo_bundle()
    model = build_model(SPEC)
    load0 = os.getloadavg()[0]
    t0 = time.perf_counter()
    post = fit_bayes(
        model,
        data,
        hierarchical=True,
        chains=chains,
        draws=draws,
        warmup=warmup,
        seed=0,
        progress=False,
        loo="trial",
        point_fits=ML_POINT_FITS,
    )
    wall = time.perf_counter() - t0
    d = post.diagnostics
    steps = np.asarray(post.idata.sample_stats["n_steps"].values)
    return {
        "settings": f"{chains} x {draws} ({warmup})",
        "fit_wall": wall,
        "compile": compiled[0],
        "nuts": post.run["sampling_seconds"],
        "start": post.run["start_seconds"],
        "min_ess": float(d["min_ess_bulk"]),
        "max_rhat": float(d["max_rhat"]),
        "divergences": int(d["divergences"]),
        "steps_per_draw": float(steps.mean()),
        "means": [float(post.params.loc[q, "estimate"]) for q in QUANTITIES],
        "load": (load0, os.getloadavg()[0]),
    }


def run_child(settings: tuple[int, int, int], cache: str) -> dict:
    """A fresh process for one fit; adds its wall time and CPU seconds (getrusage of the
    finished child: user + system over all its threads)."""
    env = {
        **os.environ,
        "STOPWISE_CACHE_DIR": cache,
        "XLA_FLAGS": f"--xla_force_host_platform_device_count={settings[0]}",
    }
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    out = subprocess.run(
        [sys.executable, "-m", "benchmarks.bench_bayes_phases", "--child", *map(str, settings)],
        env=env,
        capture_output=True,
        text=True,
        check=True,
        timeout=3600,
    )
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    row = json.loads(out.stdout.strip().splitlines()[-1])
    row["process_wall"] = wall
    row["cpu"] = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return row


@contextlib.contextmanager
def empty_cache_folder() -> Iterator[str]:
    """A new, empty compilation-cache folder (owner-only, as stopwise wants it), removed after."""
    with tempfile.TemporaryDirectory(prefix="stopwise-bench-cache-") as cache:
        os.chmod(cache, 0o700)
        yield cache


def main() -> str:
    with empty_cache_folder() as cache:
        runs = [
            ("cold (empty cache)", run_child(FULL, cache)),
            ("warm (cache filled by the cold run)", run_child(FULL, cache)),
            ("warm, shorter run", run_child(SHORT, cache)),
        ]
    with empty_cache_folder() as cache:
        runs.append(("cold, shorter run (its own empty cache)", run_child(SHORT, cache)))
    head = (
        "| run | chains x draws (warm-up) | process wall s | process CPU s | fit wall s | "
        "of which NUTS s | XLA compile s (all programs) | start s | steps/draw | min bulk ESS "
        "| min bulk ESS per fit second | max R-hat | divergences | load 1 min before / after |"
    )
    lines = [head, "|" + "---|" * 14]
    for label, r in runs:
        lines.append(
            f"| {label} | {r['settings']} | {r['process_wall']:.0f} | {r['cpu']:.0f} | "
            f"{r['fit_wall']:.0f} | {r['nuts']:.0f} | {r['compile']:.0f} | {r['start']:.0f} | "
            f"{r['steps_per_draw']:.1f} | {r['min_ess']:.0f} | {r['min_ess'] / r['fit_wall']:.2f} "
            f"| {r['max_rhat']:.3f} | {r['divergences']} | {r['load'][0]:.1f} / "
            f"{r['load'][1]:.1f} |"
        )
    means = "\n".join(
        f"| {q} | " + " | ".join(f"{r['means'][i]:.4f}" for _, r in runs) + " |"
        for i, q in enumerate(QUANTITIES)
    )
    return (
        "## Bayes: hierarchical benchmark by phase, cold and with the compilation cache\n\n"
        "crra+planner+logit, solo trials of the 120 demo subjects (18,880 decisions), "
        "hierarchical, seed 0, each run a fresh process, all sharing one new cache folder "
        "(benchmarks/bench_bayes_phases.py).\n\n"
        + "\n".join(lines)
        + "\n\nPosterior means (the same seed and settings must give the same draws cold and "
        "warm):\n\n| quantity | "
        + " | ".join(label for label, _ in runs)
        + " |\n|"
        + "---|" * (len(runs) + 1)
        + "\n"
        + means
        + "\n"
    )


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        print(json.dumps(child(*map(int, sys.argv[2:5]))))
    else:
        print(main())
