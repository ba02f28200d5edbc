"""Figures of solo stopping behaviour against fitted models.

Observed draw rates come with exact binomial (Clopper & Pearson 1934) 95% intervals:
for k draws in n decisions, low = Beta^-1(0.025; k, n - k + 1), high = Beta^-1(0.975; k + 1,
n - k) (low = 0 at k = 0, high = 1 at k = n). The risk-neutral rule draws while the bank
b = start + step * gain is below c = p g / ((1 - p)(1 - k)) (stopwise.models.normative).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator
from scipy.stats import beta

from stopwise.figures.palette import BENCHMARK, OBSERVED, model_colour, new_figure
from stopwise.models.normative import draw_threshold

CONDITION = ["p_survive", "gain"]
MAX_PANELS = 6


def clopper_pearson(
    k: np.ndarray, n: np.ndarray, level: float = 0.95
) -> tuple[np.ndarray, np.ndarray]:
    """Exact binomial interval for k successes in n trials (module docstring)."""
    k, n = np.asarray(k, dtype=float), np.asarray(n, dtype=float)
    tail = (1.0 - level) / 2.0
    with np.errstate(invalid="ignore"):
        low = np.where(k > 0, beta.ppf(tail, k, n - k + 1), 0.0)
        high = np.where(k < n, beta.ppf(1.0 - tail, k + 1, n - k), 1.0)
    return low, high


def solo_rows(frame: pd.DataFrame) -> pd.DataFrame:
    """The solo decisions of a decision-level frame (all rows when there is no task column)."""
    if "task" in frame.columns:
        return frame[frame["task"].astype(str) != "contest"]
    return frame


def observed_draw_rates(frame: pd.DataFrame) -> pd.DataFrame:
    """Per condition (p_survive, gain) and step: decisions n, draws, rate = draws / n and its
    Clopper-Pearson 95% interval."""
    rows = solo_rows(frame)
    drew = (rows["action"].astype(str) == "draw").astype(int)
    table = (
        rows.assign(drew=drew)
        .groupby([*CONDITION, "step"], sort=True)["drew"]
        .agg(n="size", draws="sum")
        .reset_index()
    )
    table["rate"] = table["draws"] / table["n"]
    table["low"], table["high"] = clopper_pearson(table["draws"], table["n"])
    return table


def trial_ends(frame: pd.DataFrame) -> pd.DataFrame:
    """One row per solo trial: condition, the step of its last decision and whether it busted."""
    rows = solo_rows(frame)
    last = rows.groupby(["subject", "trial"], sort=False).tail(1)
    return pd.DataFrame(
        {
            "p_survive": last["p_survive"].to_numpy(float),
            "gain": last["gain"].to_numpy(float),
            "step": last["step"].to_numpy(int),
            "busted": (last["action"].astype(str) == "draw").to_numpy(),
            "start": last["start"].to_numpy(float) if "start" in last else 0.0,
            "bust_keep": last["bust_keep"].to_numpy(float) if "bust_keep" in last else 0.0,
        }
    )


def risk_neutral_steps(frame: pd.DataFrame) -> dict[tuple[float, float], float]:
    """Per condition: the step from which the risk-neutral rule stops, (c - start) / gain,
    with c = draw_threshold(p, gain, bust_keep) and start, bust_keep of the condition's
    first trial."""
    ends = trial_ends(frame).groupby(CONDITION, sort=True).first().reset_index()
    return {
        (row.p_survive, row.gain): (
            draw_threshold(row.p_survive, row.gain, row.bust_keep) - row.start
        )
        / row.gain
        for row in ends.itertuples()
    }


def risk_neutral_draw(steps: np.ndarray, threshold: float) -> np.ndarray:
    """The risk-neutral P(draw) at each step: 1 below the threshold step, 0 above, 1/2 at a
    whole-number threshold (drawing and stopping tie there)."""
    steps = np.asarray(steps, dtype=float)
    tie = np.isclose(steps, threshold, rtol=0.0, atol=1e-9)
    return np.where(tie, 0.5, (steps < threshold).astype(float))


def condition_prediction(table: pd.DataFrame, condition: tuple[float, float]) -> pd.DataFrame:
    """A model's stop-step rows of one (p_survive, gain) condition, one row per step: the
    prediction table has one block per condition of the data (contest conditions too, whose
    solo prediction is the same), so the first block of the condition is kept."""
    here = table[(table["p_survive"] == condition[0]) & (table["gain"] == condition[1])]
    if "cond" in here and here["cond"].nunique() > 1:
        here = here[here["cond"] == here["cond"].iloc[0]]
    return here


def _panels(conditions: list[tuple[float, float]]) -> tuple[Figure, list]:
    shown = conditions[:MAX_PANELS]
    cols = min(3, len(shown))
    nrows = int(np.ceil(len(shown) / cols))
    fig = new_figure(4.0 * cols, 3.3 * nrows)
    axes = fig.subplots(nrows, cols, squeeze=False, sharey=True).ravel()
    for ax in axes[len(shown) :]:
        ax.set_visible(False)
    for ax in axes:
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))  # steps are whole numbers
    return fig, list(axes[: len(shown)])


def _condition_title(condition: tuple[float, float]) -> str:
    return f"p_survive {condition[0]:g}, gain {condition[1]:g}"


def stopping_curves_figure(
    frame: pd.DataFrame, predictions: Mapping[str, pd.DataFrame] | None = None
) -> Figure:
    """P(draw | step) by condition: observed rates with 95% intervals (steps with at least 5
    decisions), each model's predicted P(draw | step) (``predictions``: label -> the
    "stop_steps" frame of Fit.predict) and the risk-neutral rule (1 below its threshold)."""
    observed = observed_draw_rates(frame)
    observed = observed[observed["n"] >= 5]
    thresholds = risk_neutral_steps(frame)
    conditions = sorted(thresholds)
    fig, axes = _panels(conditions)
    for ax, condition in zip(axes, conditions):
        here = observed[
            (observed["p_survive"] == condition[0]) & (observed["gain"] == condition[1])
        ]
        steps = here["step"].to_numpy()
        ax.errorbar(
            steps,
            here["rate"],
            yerr=[here["rate"] - here["low"], here["high"] - here["rate"]],
            fmt="o",
            ms=3.5,
            color=OBSERVED,
            capsize=2,
            label="observed (95% CI)",
        )
        last = int(steps.max()) + 1 if steps.size else 10
        grid = np.arange(last + 1)
        threshold = thresholds[condition]
        ax.step(
            grid,
            risk_neutral_draw(grid, threshold),
            where="mid",
            ls="--",
            color=BENCHMARK,
            label="risk-neutral rule",
        )
        if threshold > last:
            ax.annotate(
                f"risk-neutral rule: draw up to step {threshold:.3g}",
                (0.02, 0.03),
                xycoords="axes fraction",
                ha="left",
                fontsize=8,
                color=BENCHMARK,
            )
        for i, (label, table) in enumerate((predictions or {}).items()):
            pred = condition_prediction(table, condition)
            pred = pred[pred["step"] <= last]
            ax.plot(pred["step"], pred["p_draw"], color=model_colour(i), lw=2, label=label)
        ax.set_title(_condition_title(condition), fontsize=10)
        ax.set_xlabel("step (successful draws so far)")
        ax.set_ylim(-0.03, 1.03)
    axes[0].set_ylabel("P(draw again)")
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncol=len(labels), fontsize=8)
    fig.suptitle("Stopping curves: observed against the models")
    return fig


def stop_distribution_figure(
    frame: pd.DataFrame, predictions: Mapping[str, pd.DataFrame] | None = None
) -> Figure:
    """Per condition: the share of trials ended by stopping at each step (bars; the bank
    banked is start + step * gain) against each model's P(stop at s) = reach_s (1 - h_s);
    the legend gives observed and predicted bust rates."""
    ends = trial_ends(frame)
    conditions = sorted({(r.p_survive, r.gain) for r in ends.itertuples()})
    fig, axes = _panels(conditions)
    for ax, condition in zip(axes, conditions):
        here = ends[(ends["p_survive"] == condition[0]) & (ends["gain"] == condition[1])]
        stopped = here.loc[~here["busted"], "step"]
        last = int(here["step"].max()) + 2
        counts = np.bincount(stopped, minlength=last + 1)[: last + 1] / len(here)
        ax.bar(
            np.arange(last + 1),
            counts,
            color=OBSERVED,
            alpha=0.35,
            label=f"observed (bust rate {here['busted'].mean():.2f})",
        )
        for i, (label, table) in enumerate((predictions or {}).items()):
            pred = condition_prediction(table, condition)
            bust = float(pred["p_bust_here"].sum())
            pred = pred[pred["step"] <= last]
            ax.plot(
                pred["step"],
                pred["p_stop_here"],
                "o-",
                ms=3,
                color=model_colour(i),
                label=f"{label} (bust rate {bust:.2f})",
            )
        ax.set_title(_condition_title(condition), fontsize=10)
        ax.set_xlabel("stop step (bank = start + step x gain)")
        ax.legend(fontsize=7)
    axes[0].set_ylabel("share of trials")
    fig.suptitle("Where trials end: stops by step, observed against the models")
    return fig
