"""The demo scenario: an invented lab study of a fictional salvage-diving game.

Each dive adds one crate to the haul; before every further dive the diver may surface and
bank the haul, and a collapse of the wreck (probability 1 - p_survive per dive) loses it.
Participants play three solo blocks (wrecks that hold with p_survive 0.75, 0.85 and 0.95,
block order counterbalanced), then two blocks of two-player contests (p_survive 0.85): a
"winner takes the prize" block (prize 10, keep_bank 0) and a "prize on top" block (prize 5,
keep_bank 1). Half the divers see a running tally of collapses (``treatment`` = 1). A second
task is a ten-row price list of lottery choices plus four mixed gain/loss items.

Choices come from a simple stochastic rule (no fitted model): each diver aims for a noisy
multiple of the risk-neutral target; lottery choices follow a noisy mean-minus-spread
valuation. Everything is synthetic and reproducible from the seed.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from stopwise._io import write_table
from stopwise.data_schemas.convert import trials_to_decisions
from stopwise.models.normative import optimal_target

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


def simulate_stopping(design: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    """Trial-level responses: target = round(m_i * f_block * n* + e), e ~ N(0, 1 + 0.1 n*),
    where n* is the risk-neutral target, m_i ~ lognormal(-0.15 + 0.1 treatment, 0.35) and
    f = 1.3 (winner takes the prize), 1.1 (prize on top), 1 (solo); the diver draws until
    the target or the first collapse."""
    subject_codes, _ = pd.factorize(design["subject"])
    treatment = design.groupby("subject", sort=False)["treatment"].first().to_numpy()
    multiplier = np.exp(rng.normal(-0.15 + 0.1 * treatment, 0.35))[subject_codes]
    p = design["p_survive"].to_numpy()
    rn_target = np.array([optimal_target(float(v), 1.0) for v in p], dtype=np.float64)
    factor = np.select(
        [design["block"] == "contest_winner_takes", design["block"] == "contest_prize_on_top"],
        [1.3, 1.1],
        1.0,
    )
    noise = rng.normal(0.0, 1.0 + 0.1 * rn_target)
    target = np.maximum(np.rint(multiplier * factor * rn_target + noise), 0).astype(np.int64)
    first_collapse = rng.geometric(1.0 - p) - 1  # successful dives before the collapse
    trials = design.copy()
    trials["draws"] = np.minimum(target, first_collapse)
    trials["busted"] = (first_collapse < target).astype(np.int64)
    return trials


def simulate_lottery(design: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    """Choices: value = EV - rho_i SD - (lambda_i - 1) E[loss part]; P(B) = logistic of the
    value difference / 3, with rho_i ~ N(0.3, 0.2), lambda_i ~ lognormal(log 1.5, 0.3)."""
    codes, uniques = pd.factorize(design["subject"])
    rho = rng.normal(0.3, 0.2, size=len(uniques))[codes]
    loss_weight = np.exp(rng.normal(np.log(1.5), 0.3, size=len(uniques)))[codes]
    value = {o: _option_value(design, o, rho, loss_weight) for o in ("a", "b")}
    prob_b = 1.0 / (1.0 + np.exp(-np.clip((value["b"] - value["a"]) / 3.0, -50, 50)))
    choices = design.copy()
    choices.insert(2, "choice", np.where(rng.random(len(design)) < prob_b, "B", "A"))
    return choices


def _option_value(
    design: pd.DataFrame, option: str, rho: np.ndarray, loss_weight: np.ndarray
) -> np.ndarray:
    x = np.nan_to_num(design[[f"{option}_x1", f"{option}_x2"]].to_numpy(dtype=np.float64))
    p = np.nan_to_num(design[[f"{option}_p1", f"{option}_p2"]].to_numpy(dtype=np.float64))
    mean = (p * x).sum(axis=1)
    spread = np.sqrt(np.maximum((p * (x - mean[:, None]) ** 2).sum(axis=1), 0.0))
    losses = (p * np.minimum(x, 0.0)).sum(axis=1)
    return mean - rho * spread + (loss_weight - 1.0) * losses


def demo_data(seed: int = DEMO_SEED, n_subjects: int = 120) -> dict[str, pd.DataFrame]:
    """The demo data set: "stopping" (decision level) and "lottery" choices."""
    design = demo_design(seed, n_subjects)
    rng = np.random.default_rng([seed, 1])
    trials = simulate_stopping(design["stopping"], rng)
    decisions = trials_to_decisions(trials, validate=False)
    return {"stopping": decisions, "lottery": simulate_lottery(design["lottery"], rng)}


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


def run_demo(out: Path) -> None:
    """Write the demo data into ``out``, validate the files and print their summaries."""
    out = Path(out)
    paths = write_demo_files(demo_data(), out)
    print(f"Demo data (invented salvage-diving study) written to {out}/")
    print()
    validate_demo_files(paths)
    describe_demo_files(paths)
