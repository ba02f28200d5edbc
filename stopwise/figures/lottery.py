"""Figure of lottery choices: the share choosing the riskier option of each item against
its expected-value advantage, observed and predicted.

Per option o with outcomes x_j and probabilities p_j: EV_o = sum_j p_j x_j and
SD_o = sqrt(sum_j p_j (x_j - EV_o)^2). The riskier option of an item is the one with the
larger SD (B when the two are equal); its advantage is EV_risky - EV_safe. Observed shares
k / n carry exact binomial (Clopper & Pearson 1934) 95% intervals; a model's share is the
mean of its per-row P(choose the riskier option).
"""

from __future__ import annotations

import re
from collections.abc import Mapping

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from stopwise.figures.palette import BENCHMARK, OBSERVED, model_colour, new_figure
from stopwise.figures.stopping import clopper_pearson

OUTCOME = re.compile(r"^([ab])_x(\d+)$")


def option_moments(frame: pd.DataFrame, option: str) -> tuple[np.ndarray, np.ndarray]:
    """(EV, SD) of option "a" or "b" on every row (module docstring); a missing outcome
    (empty cell) counts with probability 0."""
    indices = sorted(
        int(m.group(2)) for c in frame.columns if (m := OUTCOME.match(c)) and m.group(1) == option
    )
    x = np.column_stack([frame[f"{option}_x{j}"].to_numpy(float) for j in indices])
    p = np.column_stack([frame[f"{option}_p{j}"].to_numpy(float) for j in indices])
    p = np.nan_to_num(p, nan=0.0)
    x = np.where(p > 0, np.nan_to_num(x, nan=0.0), 0.0)
    ev = (p * x).sum(axis=1)
    sd = np.sqrt((p * (x - ev[:, None]) ** 2).sum(axis=1))
    return ev, sd


def risky_is_b(frame: pd.DataFrame) -> np.ndarray:
    """True where option B is the riskier one (larger SD; B on a tie)."""
    _, sd_a = option_moments(frame, "a")
    _, sd_b = option_moments(frame, "b")
    return sd_b >= sd_a


def ev_advantage(frame: pd.DataFrame) -> np.ndarray:
    """EV_risky - EV_safe on every row."""
    ev_a, _ = option_moments(frame, "a")
    ev_b, _ = option_moments(frame, "b")
    return np.where(risky_is_b(frame), ev_b - ev_a, ev_a - ev_b)


def lottery_items(frame: pd.DataFrame, p_choose_b: np.ndarray | None = None) -> pd.DataFrame:
    """One row per item: ev_advantage, n, risky (choices of the riskier option), share, its
    Clopper-Pearson low/high, and with ``p_choose_b`` (per row, aligned with ``frame``)
    the predicted share."""
    b_risky = risky_is_b(frame)
    chose_b = frame["choice"].astype(str).str.upper().to_numpy() == "B"
    rows = pd.DataFrame(
        {
            "item": frame["item"].astype(str).to_numpy(),
            "ev_advantage": ev_advantage(frame),
            "risky_option": np.where(b_risky, "B", "A"),
            "chose_risky": (chose_b == b_risky).astype(int),
        }
    )
    if p_choose_b is not None:
        p = np.asarray(p_choose_b, dtype=float)
        rows["predicted"] = np.where(b_risky, p, 1.0 - p)
    keys = ["item", "ev_advantage", "risky_option"]
    grouped = rows.groupby(keys, sort=False)
    items = grouped["chose_risky"].agg(n="size", risky="sum").reset_index()
    if p_choose_b is not None:
        items["predicted"] = grouped["predicted"].mean().to_numpy()
    items["share"] = items["risky"] / items["n"]
    items["low"], items["high"] = clopper_pearson(items["risky"], items["n"])
    return items.sort_values(["ev_advantage", "item"]).reset_index(drop=True)


def lottery_choice_figure(
    items: pd.DataFrame, predictions: Mapping[str, pd.DataFrame] | None = None
) -> Figure:
    """Observed shares with their intervals against EV advantage, and each model's
    predicted shares (``predictions``: label -> lottery_items frame with "predicted")."""
    fig = new_figure(7.5, 4.5)
    ax = fig.subplots()
    x = items["ev_advantage"].to_numpy(float)
    share = items["share"].to_numpy(float)
    errors = np.vstack([share - items["low"].to_numpy(float), items["high"] - share])
    ax.errorbar(
        x, share, yerr=errors, fmt="o", color=OBSERVED, ms=5, capsize=3, label="observed (95% CI)"
    )
    for i, (label, table) in enumerate((predictions or {}).items()):
        ordered = table.sort_values("ev_advantage")
        ax.plot(
            ordered["ev_advantage"],
            ordered["predicted"],
            ls="none",
            marker="s",
            ms=6,
            mfc="none",
            color=model_colour(i),
            label=label,
        )
    ax.axvline(0.0, ls=":", color=BENCHMARK, lw=1)
    ax.set_ylim(-0.03, 1.03)
    ax.set_xlabel("EV(riskier option) - EV(safer option)  (dotted: equal EV)")
    ax.set_ylabel("share choosing the riskier option")
    ax.set_title(f"Lottery choices: {len(items)} items, n = {int(items['n'].sum())} choices")
    ax.legend(loc="best", fontsize=8)
    return fig
