"""Figure of a model comparison: each model's difference to the best one.

ML comparisons show ΔAIC_m = AIC_m - min AIC (Akaike 1974; Burnham & Anderson 2002, from
memory, read ΔAIC > 10 as essentially no support) with, where given, its standard error
over subjects 2 sqrt(G) sd(d_g) (estimation/aic_difference.py) as error bars; Bayesian ones show elpd_best - elpd_m
with the standard error of the difference (Vehtari, Gelman & Gabry 2017) as error bars.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from stopwise.figures.palette import BENCHMARK, model_colour, new_figure


def comparison_figure(
    table: pd.DataFrame, value: str = "delta_aic", error: str | None = None
) -> Figure:
    """Horizontal bars, best model on top: ``table`` indexed by model with the column
    ``value`` (e.g. delta_aic, or an elpd difference) and optionally ``error`` (its SE)."""
    ordered = table.sort_values(value)
    values = ordered[value].to_numpy(float)
    errors = ordered[error].to_numpy(float) if error and error in ordered else None
    fig = new_figure(7.0, 1.2 + 0.55 * len(ordered))
    ax = fig.subplots()
    y = np.arange(len(ordered))[::-1]
    ax.barh(
        y,
        values,
        xerr=errors,
        color=[model_colour(i) for i in range(len(ordered))],
        capsize=3,
        height=0.6,
    )
    ends = values + (np.nan_to_num(errors) if errors is not None else 0.0)
    for yi, v, end in zip(y, values, ends):
        label = f"{v:.1f}" if errors is None or end == v else f"{v:.1f} ± {end - v:.1f}"
        ax.annotate(
            label, (end, yi), xytext=(4, 0), textcoords="offset points", va="center", fontsize=8
        )
    ax.set_yticks(y, [str(m) for m in ordered.index])
    if value == "delta_aic":
        ax.axvline(10.0, ls=":", color=BENCHMARK, lw=1)
        bars = " ± 1 SE over subjects" if errors is not None else ""
        ax.set_xlabel(f"ΔAIC to the best model{bars} (dotted: 10)")
    else:
        ax.set_xlabel(value.replace("_", " "))
    ax.set_xlim(0, max(1.0, float(np.nanmax(ends))) * 1.25)
    ax.set_title("Model comparison (best model on top, at 0)")
    return fig
