"""The demo scenario: an invented lab study of a fictional salvage-diving game.

Each dive adds one crate to the haul; before every further dive the diver may surface and
bank the haul, and a collapse of the wreck (probability 1 - p_survive per dive) loses it.
Participants play three solo blocks (wrecks that hold with p_survive 0.75, 0.85 and 0.95,
block order counterbalanced), then two blocks of two-player contests (p_survive 0.85): a
"winner takes the prize" block (prize 10, keep_bank 0) and a "prize on top" block (prize 5,
keep_bank 1). Half the divers see a running tally of collapses (``treatment`` = 1). A second
task is a ten-row price list of lottery choices plus four mixed gain/loss items.

Choices come from stopwise's own models (see ``demo_population``): solo dives from
crra+planner+logit with a risk attitude and a noise level of each diver's own, contest
dives from the logit QRE of crra+qre, and lottery choices from crra+logit with the diver's
risk attitude over a 20-crate endowment (model option wealth = 20, since the mixed items
can lose crates). Everything is synthetic and reproducible from the seed.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from stopwise._io import write_table
from stopwise.bayes_draws import result_record
from stopwise.data_schemas.load import load
from stopwise.figures.lottery import lottery_choice_figure, lottery_items
from stopwise.figures.palette import save_figure

DEMO_SEED = 20261201
TRIALS_PER_BLOCK = 12
SOLO_BLOCKS = (("solo_p75", 0.75), ("solo_p85", 0.85), ("solo_p95", 0.95))
CONTEST_BLOCKS = (  # (block, p_survive, prize, keep_bank)
    ("contest_winner_takes", 0.85, 10.0, 0),
    ("contest_prize_on_top", 0.85, 5.0, 1),
)
PRICE_LIST = {"a": (32.0, 26.0), "b": (61.0, 2.0)}  # high and low crate values
MIXED_ITEMS = ((12.0, -6.0), (12.0, -9.0), (12.0, -12.0), (12.0, -15.0))


def demo_design(seed: int = DEMO_SEED, n_subjects: int = 120) -> dict[str, pd.DataFrame]:
    """The study design without responses: "stopping" (one row per trial) and "lottery"
    (one row per subject and item)."""
    if n_subjects < 2:
        raise ValueError("the demo needs at least 2 subjects (contests are played in pairs)")
    rng = np.random.default_rng(seed)
    subjects = pd.DataFrame(
        {
            "subject": [f"d{i + 1:03d}" for i in range(n_subjects)],
            "treatment": rng.permutation(np.arange(n_subjects) % 2),
            "age": rng.integers(18, 46, size=n_subjects),
        }
    )
    return {"stopping": _stopping_design(subjects, rng), "lottery": _lottery_design(subjects)}


def _stopping_design(subjects: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    blocks = []
    for _, person in subjects.iterrows():
        order = rng.permutation(len(SOLO_BLOCKS))
        for position, b in enumerate(order):
            name, p = SOLO_BLOCKS[b]
            blocks.append(_block_rows(person, name, p, position, "solo", None, 1, 0.0, 1))
    for c, (name, p, prize, keep) in enumerate(CONTEST_BLOCKS):
        position = len(SOLO_BLOCKS) + c
        for g, members in enumerate(_pairs(len(subjects), rng)):
            group = f"c{c + 1}-g{g + 1:02d}"
            for m in members:
                blocks.append(
                    _block_rows(
                        subjects.iloc[m],
                        name,
                        p,
                        position,
                        "contest",
                        group,
                        len(members),
                        prize,
                        keep,
                    )
                )
    design = pd.concat(blocks, ignore_index=True)
    return design.sort_values(["subject", "trial"], kind="stable").reset_index(drop=True)


def _pairs(n: int, rng: np.random.Generator) -> list[list[int]]:
    """Random pairs; with an odd number the last group has three players."""
    order = [int(i) for i in rng.permutation(n)]
    groups = [order[i : i + 2] for i in range(0, n - n % 2, 2)]
    if n % 2:
        groups[-1].append(order[-1])
    return groups


def _block_rows(
    person: pd.Series,
    block: str,
    p: float,
    position: int,
    task: str,
    group: str | None,
    n_players: int,
    prize: float,
    keep_bank: int,
) -> pd.DataFrame:
    trial = position * TRIALS_PER_BLOCK + np.arange(1, TRIALS_PER_BLOCK + 1)
    return pd.DataFrame(
        {
            "subject": person["subject"],
            "trial": trial,
            "p_survive": p,
            "gain": 1.0,
            "block": block,
            "task": task,
            "group": group,
            "n_players": n_players,
            "prize": prize,
            "keep_bank": keep_bank,
            "treatment": int(person["treatment"]),
            "age": int(person["age"]),
        }
    )


def _lottery_design(subjects: pd.DataFrame) -> pd.DataFrame:
    items = []
    for k in range(1, 11):
        p = k / 10
        items.append(
            {
                "item": f"P{k:02d}",
                "block": "price_list",
                "a_x1": PRICE_LIST["a"][0],
                "a_p1": p,
                "a_x2": PRICE_LIST["a"][1],
                "a_p2": round(1 - p, 10),
                "b_x1": PRICE_LIST["b"][0],
                "b_p1": p,
                "b_x2": PRICE_LIST["b"][1],
                "b_p2": round(1 - p, 10),
            }
        )
    for k, (win, loss) in enumerate(MIXED_ITEMS, start=1):
        items.append(
            {
                "item": f"M{k}",
                "block": "mixed",
                "a_x1": 0.0,
                "a_p1": 1.0,
                "a_x2": np.nan,
                "a_p2": np.nan,
                "b_x1": win,
                "b_p1": 0.5,
                "b_x2": loss,
                "b_p2": 0.5,
            }
        )
    item_frame = pd.DataFrame(items)
    design = subjects.merge(item_frame, how="cross")
    columns = [
        "subject",
        "item",
        "block",
        "a_x1",
        "a_p1",
        "a_x2",
        "a_p2",
        "b_x1",
        "b_p1",
        "b_x2",
        "b_p2",
        "treatment",
        "age",
    ]
    return design[columns]


# The invented population: per-diver risk attitude and noise. Divers shown the running tally of
# collapses (treatment 1) are a little more risk-averse on average.
SOLO_MODEL = "crra+planner+logit"
CONTEST_MODEL = "crra+qre"
LOTTERY_MODEL = "crra+logit"
LOTTERY_WEALTH = 20.0
CONTEST_TRUTH = {"r": 0.3, "precision": 3.0}
CONTEST_MAX_TARGET = 30


def demo_population(design: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    """One row per diver: r ~ N(0.25 + 0.15 treatment, 0.2) clipped to [-0.5, 0.9],
    precision ~ lognormal(log 3, 0.35) for the dives and lognormal(log 0.6, 0.3) for the
    lottery list (its payoffs are larger, so utility differences are larger too)."""
    people = design.groupby("subject", sort=True)["treatment"].first()
    n = len(people)
    r = np.clip(rng.normal(0.25 + 0.15 * people.to_numpy(), 0.2), -0.5, 0.9)
    return pd.DataFrame(
        {
            "subject": people.index.to_numpy(),
            "r": r,
            "precision": np.exp(rng.normal(np.log(3.0), 0.35, n)),
            "lottery_precision": np.exp(rng.normal(np.log(0.6), 0.3, n)),
        }
    )


def simulate_stopping(design: pd.DataFrame, population: pd.DataFrame, seed: int) -> pd.DataFrame:
    """Decision rows: solo trials from crra+planner+logit with each diver's own (r,
    precision); contest trials from the symmetric logit QRE of crra+qre (CONTEST_TRUTH,
    targets capped at CONTEST_MAX_TARGET dives)."""
    from stopwise.models.simulation import simulate
    from stopwise.models.spec import build_model

    solo = design[design["task"] == "solo"]
    contest = design[design["task"] == "contest"]
    pieces = [
        simulate(build_model(SOLO_MODEL), population[["subject", "r", "precision"]], solo, seed)
    ]
    if len(contest):
        contest_model = build_model(CONTEST_MODEL, max_target=CONTEST_MAX_TARGET)
        pieces.append(simulate(contest_model, CONTEST_TRUTH, contest, seed + 1))
    decisions = pd.concat(pieces, ignore_index=True)
    return decisions.sort_values(["subject", "trial", "step"], kind="stable").reset_index(drop=True)


def simulate_lottery(design: pd.DataFrame, population: pd.DataFrame, seed: int) -> pd.DataFrame:
    """Choices from crra+logit (wealth LOTTERY_WEALTH) with each diver's r and lottery
    precision."""
    from stopwise.models.simulation import simulate
    from stopwise.models.spec import build_model

    params = population[["subject", "r", "lottery_precision"]].rename(
        columns={"lottery_precision": "precision"}
    )
    return simulate(build_model(LOTTERY_MODEL, wealth=LOTTERY_WEALTH), params, design, seed)


def demo_data(seed: int = DEMO_SEED, n_subjects: int = 120) -> dict[str, pd.DataFrame]:
    """The demo data set: "stopping" (decision level) and "lottery" choices."""
    design = demo_design(seed, n_subjects)
    population = demo_population(design["stopping"], np.random.default_rng([seed, 1]))
    return {
        "stopping": simulate_stopping(design["stopping"], population, seed + 2),
        "lottery": simulate_lottery(design["lottery"], population, seed + 3),
    }


def write_demo_files(data: dict[str, pd.DataFrame], out: Path) -> dict[str, Path]:
    """Write each demo table atomically as ``<out>/<name>.csv``."""
    return {name: write_table(Path(out) / f"{name}.csv", frame) for name, frame in data.items()}


def validate_demo_files(paths: dict[str, Path]) -> None:
    """Validate the written files and print each one-screen summary."""
    from stopwise.data_schemas.errors import StopwiseDataError
    from stopwise.data_schemas.validate import validate

    for path in paths.values():
        report = validate(path)
        if not report.ok:
            raise StopwiseDataError(report.format(), report)
        print(report.summary())
        print()


def describe_demo_files(paths: dict[str, Path]) -> None:
    """Print the descriptive summary of each written file."""
    from stopwise.describe import describe

    for path in paths.values():
        print(describe(path))
        print()


SOLO_SPECS = ("crra+planner+logit", "crra+myopic+logit", "pt+tk+target+logit")
CONTEST_SPECS = ("crra+qre", "linear+levelk")
BONUS_SCHEMES = (  # counterfactual incentive schemes for the contest block
    {"name": "winner takes 10", "p_survive": 0.85, "players": 2, "prize": 10.0},
    {
        "name": "5 on top of own haul",
        "p_survive": 0.85,
        "players": 2,
        "prize": 5.0,
        "keep_bank": True,
    },
    {"name": "4 divers, winner takes 20", "p_survive": 0.85, "players": 4, "prize": 20.0},
)


def _heading(text: str) -> None:
    print(f"\n=== {text} ===\n", flush=True)


def fit_solo_models(path: Path, out: Path) -> Any:
    """Compare solo stopping models, then fit the generating model with a treatment effect
    on r (both written to ``out`` as JSON/CSV)."""
    from stopwise._io import write_json
    from stopwise.api import compare, fit

    _heading("Solo dives: model comparison (maximum likelihood, 5-fold CV by diver)")
    comparison = compare(list(SOLO_SPECS), path, seed=1)
    print(comparison.summary())
    write_table(out / "compare_solo.csv", comparison.table.reset_index())
    _heading("Solo dives: crra+planner+logit with r ~ 1 + treatment")
    result = fit(SOLO_SPECS[0], path, formulas=["r ~ 1 + treatment"], seed=1)
    print(result.summary())
    write_json(out / "fit_solo.json", result.to_dict())
    write_json(out / "compare_solo.json", comparison.to_dict())
    return comparison


def fit_lottery_model(path: Path, out: Path) -> Any:
    """Fit crra+logit to the price list over the 20-crate endowment."""
    from stopwise._io import write_json
    from stopwise.api import fit
    from stopwise.models.spec import build_model

    _heading(f"Lottery list: {LOTTERY_MODEL} over a {LOTTERY_WEALTH:g}-crate endowment")
    result = fit(build_model(LOTTERY_MODEL, wealth=LOTTERY_WEALTH), path, seed=1)
    print(result.summary())
    write_json(out / "fit_lottery.json", result.to_dict())
    frame = load(path).frame
    items = lottery_items(frame, result.predict(path)["rows"]["p_choose_b"].to_numpy())
    save_figure(lottery_choice_figure(lottery_items(frame), {result.model: items}), out / "lottery")
    print(
        f"\nFigure {out}/lottery.png (and .svg): share choosing the riskier option per item "
        "against its expected-value advantage, observed (exact 95% intervals) and predicted; "
        "the report below covers the dive data"
    )
    return result


def fit_contest_models(path: Path, out: Path) -> Any:
    """Compare contest play concepts and predict play under other bonus schemes."""
    from stopwise.api import compare
    from stopwise.contest import counterfactual

    cap = CONTEST_MAX_TARGET
    _heading(f"Contest dives: play concepts (targets capped at {cap} dives)")
    comparison = compare(list(CONTEST_SPECS), path, max_target=cap, cv_folds=0, seed=1)
    print(comparison.summary())
    write_table(out / "compare_contest.csv", comparison.table.reset_index())
    best = next(f for f in comparison.fits if f.model == CONTEST_SPECS[0])
    _heading(f"Counterfactual bonus schemes: Nash vs fitted {best.model}")
    schemes = [{**scheme, "max_target": cap} for scheme in BONUS_SCHEMES]
    table = counterfactual(best, schemes).table
    print(table.to_string(index=False, float_format=lambda v: f"{v:.3f}"))
    write_table(out / "counterfactual.csv", table)
    return comparison


HIER_MODEL = "crra+myopic+logit"  # cheap policy: the demo's Bayesian step stays short
HIER_SUBJECTS = 20
# 4 chains (in parallel: the command line gives JAX one CPU device per chain) x 1000 draws
# after 500 warm-up. The between-subject sd of precision mixes slowly: at 4 x 600 (300) its
# R-hat sat at the 1.01 line (seed 1: 1.02, tail ESS 272; seeds 1-3 started at the ML fits:
# 1.02 / 1.01 / 1.01), so a change of XLA's machine code at rounding level turned the demo's
# "converged: yes" into "NO". At 4 x 1000 (500), seeds 1-3: R-hat 1.01 / 1.01 / 1.00, bulk
# ESS 701-972, tail ESS 781-1222 (December 2026, 2 cores; the step takes about 22 s).
HIER_CHAINS, HIER_DRAWS, HIER_WARMUP = 4, 1000, 500


def fit_hierarchical_model(path: Path, out: Path) -> Any:
    """A small hierarchical Bayesian fit (NUTS) of HIER_MODEL to the solo dives of the first
    HIER_SUBJECTS divers, with its diagnostics, written to ``out/fit_hier.json``."""
    from stopwise._io import write_json
    from stopwise.api import fit

    frame = load(path).frame
    frame = frame[frame["task"] == "solo"]
    divers = sorted(frame["subject"].unique())[:HIER_SUBJECTS]
    frame = frame[frame["subject"].isin(divers)].reset_index(drop=True)
    _heading(
        f"Solo dives: hierarchical Bayesian {HIER_MODEL} for {len(divers)} divers "
        f"(NUTS, {HIER_CHAINS} chains x {HIER_DRAWS} draws after {HIER_WARMUP} warm-up)"
    )
    posterior = fit(
        HIER_MODEL,
        frame,
        method="bayes",
        hierarchical=True,
        chains=HIER_CHAINS,
        draws=HIER_DRAWS,
        warmup=HIER_WARMUP,
        seed=1,
        progress=False,
        loo="trial",  # leave-one-subject-out would refit the hierarchy per flagged subject
    )
    print(posterior.summary())
    write_json(out / "fit_hier.json", result_record(posterior))
    return posterior


def write_demo_report(data: Path, results: list[Any], out: Path, n_subjects: int) -> Path:
    """The HTML report of the demo (stopwise.report): data, fits, comparisons, figures."""
    from stopwise.report.write import write_report

    _heading("Report")
    return write_report(
        out / "report.html",
        data,
        results,
        title="stopwise demo: an invented salvage-diving study",
        call=f"stopwise demo --out {out} --subjects {n_subjects}",
    )


def timed(
    timings: list[tuple[str, float, float]], label: str, step: Callable[..., Any], *args: Any
) -> Any:
    """step(*args), appending (label, wall-clock seconds, CPU seconds of this process, all
    threads) to ``timings``; CPU far below wall means other programs held the processors."""
    start, cpu = time.perf_counter(), time.process_time()
    value = step(*args)
    timings.append((label, time.perf_counter() - start, time.process_time() - cpu))
    return value


def run_demo(out: Path, n_subjects: int = 120) -> None:
    """Write the demo data into ``out``, validate and describe the files, fit and compare
    solo, lottery and contest models, predict play under other bonus schemes, and run a
    small hierarchical Bayesian fit with its diagnostics."""
    out = Path(out)
    start, cpu = time.perf_counter(), time.process_time()
    paths = write_demo_files(demo_data(n_subjects=n_subjects), out)
    print(f"Demo data (invented salvage-diving study) written to {out}/")
    print()
    validate_demo_files(paths)
    describe_demo_files(paths)
    timings = [
        (
            "data: simulate, validate, describe",
            time.perf_counter() - start,
            time.process_time() - cpu,
        )
    ]
    results = [
        timed(
            timings, "solo comparison and treatment fit", fit_solo_models, paths["stopping"], out
        ),
        timed(timings, "lottery fit", fit_lottery_model, paths["lottery"], out),
        timed(timings, "contest comparison", fit_contest_models, paths["stopping"], out),
        timed(timings, "hierarchical Bayes", fit_hierarchical_model, paths["stopping"], out),
    ]
    report = timed(
        timings, "report", write_demo_report, paths["stopping"], results, out, n_subjects
    )
    print("\nTime per step on this machine (seconds: wall clock, CPU of this process):")
    for label, seconds, cpu_seconds in timings:
        print(f"  {label:<36} {seconds:7.1f} {cpu_seconds:7.1f}")
    print(
        f"\nTables and JSON results are in {out}/. These are research estimates on invented "
        "data, not a basis for individual financial, clinical or hiring decisions."
    )
    print(f"\nReport: {report.resolve()}")
