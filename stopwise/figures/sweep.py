"""Figure of a sweep of contest equilibria: target probabilities against the swept value as
a heat map (colour-blind-safe sequential map "cividis"), and beneath it the jump measure,
the total variation distance (1/2) sum_t |sigma_t - sigma'_t| to the previous point."""

from __future__ import annotations

import io

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

JUMP_COLOUR = "#0072B2"  # Okabe & Ito (2008) blue
MARK_COLOUR = "#D55E00"  # Okabe & Ito (2008) vermillion


def shown_targets(probs: np.ndarray, floor: float = 1e-4) -> int:
    """Number of targets to show: up to the largest carrying probability >= floor, plus 2."""
    used = np.flatnonzero(np.nanmax(probs, axis=0) >= floor)
    return int(min(probs.shape[1], (used.max() if used.size else 0) + 3))


def sweep_figure(table: pd.DataFrame, axis: str, file_format: str = "png") -> bytes:
    """Render the sweep `table` (one line of the grid: rows in order along `axis`)."""
    columns = [c for c in table.columns if c.startswith("prob_")]
    probs = table[columns].to_numpy(dtype=float)
    probs = probs[:, : shown_targets(probs)]
    x = table[axis].to_numpy(dtype=float)
    fig, (top, bottom) = plt.subplots(
        2, 1, figsize=(8, 6), sharex=True, height_ratios=(3, 1), constrained_layout=True
    )
    geometric = axis == "prize" and x.size > 2 and x.max() / x.min() > 20
    edges = _edges(x, geometric)
    image = top.pcolormesh(
        edges, np.arange(probs.shape[1] + 1) - 0.5, probs.T, cmap="cividis", vmin=0.0
    )
    fig.colorbar(image, ax=top, label="probability of aiming for the target")
    top.set_ylabel("target (draws aimed for)")
    first = table.iloc[0]
    fixed = "prize" if axis == "p_survive" else "p_survive"
    top.set_title(
        f"{first['concept']} play, {first['players']} players, "
        f"{'prize + own bank' if first['keep_bank'] else 'winner takes the prize'}, "
        f"{fixed.replace('_', ' ')} {first[fixed]:g}"
    )
    bottom.plot(x, table["tv_prev"].to_numpy(dtype=float), color=JUMP_COLOUR, marker=".", ms=3)
    bad = ~table["certified"].to_numpy(dtype=bool)
    if bad.any():
        bottom.plot(x[bad], np.zeros(bad.sum()), "x", color=MARK_COLOUR, label="not certified")
        bottom.legend(loc="upper left")
    bottom.set_ylabel("jump (total\nvariation)")
    bottom.set_xlabel(axis.replace("_", " "))
    bottom.set_ylim(0.0, 1.0)
    if geometric:
        bottom.set_xscale("log")  # prizes spread over orders of magnitude
    buffer = io.BytesIO()
    fig.savefig(buffer, format=file_format, dpi=120)
    plt.close(fig)
    return buffer.getvalue()


def _edges(x: np.ndarray, geometric: bool = False) -> np.ndarray:
    """Cell edges around the values x: midpoints (geometric midpoints on a log axis), and
    as far beyond each end as the nearest midpoint lies inside."""
    if x.size == 1:
        return np.array([x[0] - 0.5, x[0] + 0.5]) if not geometric else x[0] * np.array([0.8, 1.25])
    if geometric:
        return np.exp(_edges(np.log(x)))
    mid = (x[1:] + x[:-1]) / 2.0
    return np.concatenate([[2 * x[0] - mid[0]], mid, [2 * x[-1] - mid[-1]]])
