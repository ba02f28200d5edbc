"""Figure of an incentive design search: the goal against the prize for every discrete
setting (players x scheme x p_survive), fitted play solid and Nash play dashed, designs
outside the limits or uncertified drawn hollow, the chosen design starred."""

from __future__ import annotations

from typing import Any

import pandas as pd
from matplotlib.figure import Figure

from stopwise.figures.palette import model_colour, new_figure

GOAL_LABELS = {
    "efficiency": "expected total bank per group",
    "bust": "bust rate",
    "risk": "|mean target - target|",
    "outlay": "expected prize outlay per group",
}


def incentives_figure(result: Any) -> Figure:
    """Goal value vs prize per setting; ``result`` is a DesignResult."""
    frame: pd.DataFrame = result.candidates.sort_values("prize", kind="stable")
    fig = new_figure(10.5, 4.8)
    ax = fig.add_subplot()
    settings = frame[["players", "scheme", "p_survive"]].drop_duplicates()
    for i, (_, s) in enumerate(settings.iterrows()):
        rows = frame[
            (frame["players"] == s["players"])
            & (frame["scheme"] == s["scheme"])
            & (frame["p_survive"] == s["p_survive"])
        ]
        model = rows[rows["prediction"] == "model"]
        nash = rows[rows["prediction"] == "nash"]
        colour = model_colour(i)
        label = f"{s['scheme']}, {int(s['players'])} players, p={s['p_survive']:g}"
        ax.plot(model["prize"], model["goal_value"], "-", color=colour, label=f"{label}: fitted")
        ax.plot(
            nash["prize"], nash["goal_value"], "--", color=colour, alpha=0.7, label=f"{label}: Nash"
        )
        bad = model[~model["admissible"].astype(bool)]
        ax.plot(bad["prize"], bad["goal_value"], "o", mfc="none", color=colour, ms=5)
    choice = result.choice
    ax.plot(
        choice["prize"],
        choice["model"]["goal_value"],
        "*",
        color="black",
        ms=16,
        label=f"chosen: {choice['scheme']}, {choice['players']} players, "
        f"prize {choice['prize']:.3g}",
    )
    ax.set_xlabel("prize")
    ax.set_ylabel(GOAL_LABELS[result.problem.goal])
    ax.set_title(
        f"goal '{result.problem.goal}' against the prize (hollow: outside the limits "
        "or uncertified)",
        fontsize=10,
    )
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return fig
