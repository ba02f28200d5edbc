"""Figures of contest play: predicted target distributions against observed stopping, and
counterfactual schemes side by side.

A contest trial that ends by a stop reveals its target (the step it stopped at); a bust at
step s only says the target was above s. The observed histogram therefore counts stopped
trials only and says so; the predicted distribution is the model's P(target = t).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from stopwise.figures.palette import OBSERVED, model_colour, new_figure

SCHEME_MEASURES = (
    ("expected_bank", "expected bank"),
    ("bust_rate", "bust rate"),
    ("efficiency_loss", "efficiency loss"),
)


CONTEST_CONDITION = ["p_survive", "n_players", "prize", "keep_bank"]


def contest_conditions(frame: pd.DataFrame) -> pd.DataFrame:
    """One row per contest trial: its condition (p_survive, n_players, prize, keep_bank),
    last step and whether it ended by a stop."""
    if "task" not in frame:
        return pd.DataFrame(columns=[*CONTEST_CONDITION, "step", "stopped"])
    rows = frame[frame["task"].astype(str) == "contest"]
    last = rows.groupby(["subject", "trial"], sort=False).tail(1)
    out = last[CONTEST_CONDITION].copy()
    out["keep_bank"] = out["keep_bank"].fillna(0).astype(bool)
    out["step"] = last["step"].astype(int)
    out["stopped"] = last["action"].astype(str) == "stop"
    return out.reset_index(drop=True)


def observed_contest_stops(trials: pd.DataFrame) -> pd.Series:
    """Share of the stopped trials among ``trials`` (contest_conditions rows) stopping at
    each step."""
    stops = trials.loc[trials["stopped"], "step"]
    return stops.value_counts(normalize=True).sort_index()


def target_distribution_figure(
    plot_frame: pd.DataFrame, observed: Mapping[str, pd.Series] | None = None
) -> Figure:
    """One panel per scheme: each prediction's P(target = t) as lines (``plot_frame``:
    Counterfactual.plot_frame, columns scheme, prediction, target, prob) and, where
    ``observed`` has the scheme, the stop steps of its stopped contest trials as bars."""
    schemes = list(dict.fromkeys(plot_frame["scheme"]))
    fig = new_figure(4.2 * len(schemes), 3.6)
    axes = fig.subplots(1, len(schemes), squeeze=False, sharey=True)[0]
    carried = plot_frame[plot_frame["prob"] > 1e-3]["target"]
    last = int(carried.max()) + 2 if len(carried) else 10
    for ax, scheme in zip(axes, schemes):
        here = plot_frame[plot_frame["scheme"] == scheme]
        seen = (observed or {}).get(scheme)
        if seen is not None and len(seen):
            ax.bar(
                seen.index,
                seen.to_numpy(),
                color=OBSERVED,
                alpha=0.3,
                label="observed stops (stopped trials)",
            )
        for i, (label, part) in enumerate(here.groupby("prediction", sort=False)):
            part = part[part["target"] <= last]
            ax.plot(part["target"], part["prob"], "o-", ms=3, color=model_colour(i), label=label)
        ax.set_title(str(scheme), fontsize=10)
        ax.set_xlabel("target (draws aimed for)")
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    axes[0].set_ylabel("probability")
    axes[0].legend(fontsize=8)
    fig.suptitle("Contest play: target distributions")
    return fig


def schemes_figure(table: pd.DataFrame) -> Figure:
    """Counterfactual schemes side by side (``table``: Counterfactual.table): grouped bars
    of expected bank, bust rate and efficiency loss per scheme, one colour per prediction."""
    schemes = list(dict.fromkeys(table["scheme"]))
    predictions = list(dict.fromkeys(table["prediction"]))
    fig = new_figure(4.0 * len(SCHEME_MEASURES), 3.8)
    axes = fig.subplots(1, len(SCHEME_MEASURES), squeeze=False)[0]
    width = 0.8 / len(predictions)
    x = np.arange(len(schemes))
    for ax, (column, title) in zip(axes, SCHEME_MEASURES):
        for i, prediction in enumerate(predictions):
            part = table[table["prediction"] == prediction].set_index("scheme").reindex(schemes)
            ax.bar(
                x + (i - (len(predictions) - 1) / 2) * width,
                part[column].to_numpy(float),
                width=width,
                color=model_colour(i),
                label=prediction,
            )
        ax.set_xticks(x, schemes, rotation=15, fontsize=8)
        ax.set_title(title)
    axes[0].legend(fontsize=8)
    fig.suptitle("Counterfactual schemes")
    return fig
