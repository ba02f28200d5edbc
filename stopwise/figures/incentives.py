"""Figure of an incentive design search, two panels against the prize for every discrete
setting (players x scheme x p_survive): the goal, and the predicted bust rate with the
bust limit drawn. Fitted play solid, Nash play dashed; designs outside the limits or
uncertified hollow; the chosen design starred."""

from __future__ import annotations

from typing import Any

import pandas as pd
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from stopwise.figures.palette import BENCHMARK, model_colour, new_figure

GOAL_LABELS = {
    "efficiency": "expected total bank per group",
    "bust": "bust rate",
    "risk": "|mean target - target|",
    "outlay": "expected prize outlay per group",
}
SETTING = ["players", "scheme", "p_survive"]


def _setting_rows(frame: pd.DataFrame, setting: pd.Series) -> pd.DataFrame:
    same = (frame[SETTING] == setting[SETTING].to_numpy()).all(axis=1)
    return frame[same]


def _panel(ax: Axes, frame: pd.DataFrame, column: str, with_labels: bool) -> None:
    """One line per setting: fitted (solid, hollow where inadmissible) and Nash (dashed)."""
    settings = frame[SETTING].drop_duplicates()
    for i, (_, s) in enumerate(settings.iterrows()):
        rows = _setting_rows(frame, s)
        model = rows[rows["prediction"] == "model"]
        nash = rows[rows["prediction"] == "nash"]
        colour = model_colour(i)
        label = f"{s['scheme']}, {int(s['players'])} players, p={s['p_survive']:g}"
        ax.plot(
            model["prize"],
            model[column],
            "-",
            color=colour,
            label=f"{label}: fitted" if with_labels else None,
        )
        ax.plot(
            nash["prize"],
            nash[column],
            "--",
            color=colour,
            alpha=0.7,
            label=f"{label}: Nash" if with_labels else None,
        )
        bad = model[~model["admissible"].astype(bool)]
        ax.plot(bad["prize"], bad[column], "o", mfc="none", color=colour, ms=5)
    ax.set_xlabel("prize")


def incentives_figure(result: Any) -> Figure:
    """Goal and bust rate against the prize; ``result`` is a DesignResult."""
    frame: pd.DataFrame = result.candidates.sort_values("prize", kind="stable")
    fig = new_figure(12.0, 4.8)
    goal_ax, bust_ax = fig.subplots(1, 2)
    _panel(goal_ax, frame, "goal_value", with_labels=True)
    _panel(bust_ax, frame, "bust_rate", with_labels=False)
    choice = result.choice
    goal_ax.plot(
        choice["prize"],
        choice["model"]["goal_value"],
        "*",
        color="black",
        ms=16,
        label=f"chosen: {choice['scheme']}, {choice['players']} players, "
        f"prize {choice['prize']:.3g}",
    )
    bust_ax.plot(choice["prize"], choice["model"]["bust_rate"], "*", color="black", ms=16)
    if result.problem.max_bust is not None:
        bust_ax.axhline(result.problem.max_bust, color=BENCHMARK, lw=1, ls=":")
        bust_ax.annotate(
            "bust limit",
            (frame["prize"].min(), result.problem.max_bust),
            color=BENCHMARK,
            fontsize=8,
            va="bottom",
        )
    goal_ax.set_ylabel(GOAL_LABELS[result.problem.goal])
    bust_ax.set_ylabel("predicted bust rate")
    fig.suptitle(
        f"goal '{result.problem.goal}' against the prize (hollow: outside the limits "
        "or uncertified)",
        fontsize=10,
    )
    fig.legend(fontsize=7, loc="outside right upper")
    return fig
