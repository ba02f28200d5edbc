"""Figures of per-subject estimates: their spread, their precision, and shrinkage.

Shrinkage of a subject's estimate towards the population centre m is drawn as an arrow from
the per-subject ML estimate to the hierarchical posterior mean; the share shrunk is
1 - (posterior mean - m) / (ML estimate - m) (stopwise.estimation.bayes.ppc.shrinkage_table).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from stopwise.figures.palette import BENCHMARK, OBSERVED, model_colour, new_figure


def subject_estimates_figure(params: pd.DataFrame, max_se: float | None = None) -> Figure:
    """Per parameter: a histogram of the subjects' estimates with each subject as a tick
    beneath (top row) and estimate against its standard error (bottom row).
    ``params``: long frame with columns subject, name, estimate, se (FitBySubject.params).
    Estimates with a missing or non-finite SE are drawn at the top edge, marked 'x'."""
    names = list(dict.fromkeys(params["name"]))
    fig = new_figure(3.6 * len(names), 6.0)
    axes = fig.subplots(2, len(names), squeeze=False)
    for j, name in enumerate(names):
        here = params[params["name"] == name]
        estimates = here["estimate"].to_numpy(float)
        ses = here["se"].to_numpy(float)
        finite = np.isfinite(estimates)
        top, bottom = axes[0, j], axes[1, j]
        top.hist(estimates[finite], bins="auto", color=model_colour(0), alpha=0.6)
        top.plot(estimates[finite], np.zeros(finite.sum()), "|", color=OBSERVED, ms=12)
        top.set_title(name)
        top.set_xlabel("estimate")
        good = finite & np.isfinite(ses)
        bottom.plot(estimates[good], ses[good], "o", ms=4, color=model_colour(0))
        cap = max_se if max_se is not None else (np.nanmax(ses[good]) if good.any() else 1.0)
        missing = finite & ~np.isfinite(ses)
        if missing.any():
            bottom.plot(
                estimates[missing],
                np.full(missing.sum(), cap),
                "x",
                color=model_colour(1),
                label="no finite SE",
            )
            bottom.legend(fontsize=8)
        bottom.set_xlabel("estimate")
        bottom.set_ylabel("standard error")
    axes[0, 0].set_ylabel("subjects")
    fig.suptitle(f"Per-subject estimates ({params['subject'].nunique()} subjects)")
    return fig


def shrinkage_figure(table: pd.DataFrame) -> Figure:
    """Per parameter, one row per subject (sorted by ML estimate): an arrow from the
    per-subject ML estimate to the hierarchical posterior mean, the population median as a
    dashed line. ``table``: stopwise.estimation.bayes.ppc.shrinkage_table (columns subject, param,
    ml_estimate, posterior_mean, population_median)."""
    names = list(dict.fromkeys(table["param"]))
    fig = new_figure(4.2 * len(names), max(3.5, 0.18 * table["subject"].nunique() + 1.5))
    axes = fig.subplots(1, len(names), squeeze=False)[0]
    for ax, name in zip(axes, names):
        here = table[table["param"] == name].sort_values("ml_estimate").reset_index(drop=True)
        y = np.arange(len(here))
        ax.plot(here["ml_estimate"], y, "o", color=model_colour(1), ms=4, label="per-subject ML")
        ax.plot(
            here["posterior_mean"],
            y,
            "o",
            color=model_colour(0),
            ms=4,
            label="hierarchical posterior mean",
        )
        for i, row in here.iterrows():
            if np.isfinite(row["ml_estimate"]):
                ax.annotate(
                    "",
                    xy=(row["posterior_mean"], i),
                    xytext=(row["ml_estimate"], i),
                    arrowprops={"arrowstyle": "->", "color": BENCHMARK, "lw": 0.8},
                )
        ax.axvline(
            float(here["population_median"].iloc[0]),
            ls="--",
            color=OBSERVED,
            lw=1,
            label="population median",
        )
        ax.set_yticks(y, [str(s) for s in here["subject"]], fontsize=6)
        ax.set_title(name)
        ax.set_xlabel("estimate")
    axes[0].legend(fontsize=7, loc="lower right")
    fig.suptitle("Shrinkage: per-subject ML estimates pulled towards the population")
    return fig
