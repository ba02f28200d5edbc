"""Figure of a design's expected precision: expected SE of each parameter against the number
of participants, SE(N) = SE(1) / sqrt(N) on log-log axes (one panel per parameter), the
band between the best and worst parameter point of the ranges, and the planned N marked."""

from __future__ import annotations

import io

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np

from stopwise.estimation.design_study import DesignResult

LINE_COLOUR = "#0072B2"  # Okabe & Ito (2008) blue
MARK_COLOUR = "#D55E00"  # Okabe & Ito (2008) vermillion


def participant_grid(planned: int) -> np.ndarray:
    """Participants from max(1, N/10) to 10 N, 60 points evenly spaced on a log scale."""
    return np.geomspace(max(1.0, planned / 10), planned * 10, 60)


def precision_figure(result: DesignResult) -> bytes:
    """PNG bytes of the figure described in the module docstring."""
    names = result.names
    planned = result.plan.subjects
    grid = participant_grid(planned)
    se_one = np.array([p.se_one for p in result.precisions])  # (points, k); [0] = given
    fig, axes = plt.subplots(
        1, len(names), figsize=(4.2 * len(names), 3.6), constrained_layout=True, squeeze=False
    )
    for j, (axis, name) in enumerate(zip(axes[0], names)):
        given = se_one[0, j] / np.sqrt(grid)
        axis.plot(grid, given, color=LINE_COLOUR, label="at the given values")
        if len(se_one) > 1:
            axis.fill_between(
                grid,
                se_one[1:, j].min() / np.sqrt(grid),
                se_one[1:, j].max() / np.sqrt(grid),
                color=LINE_COLOUR,
                alpha=0.2,
                label="over the ranges",
            )
        at_plan = se_one[0, j] / np.sqrt(planned)
        axis.plot([planned], [at_plan], "o", color=MARK_COLOUR, label=f"planned N = {planned}")
        axis.annotate(
            f"{at_plan:.3g}",
            (planned, at_plan),
            textcoords="offset points",
            xytext=(6, 6),
            color=MARK_COLOUR,
        )
        axis.set_xscale("log")
        axis.set_yscale("log")
        axis.set_xlabel("participants")
        axis.set_ylabel(f"expected SE of {name}")
        axis.grid(True, which="both", alpha=0.3)
        axis.legend(fontsize="small")
    plan = result.plan
    what = f"{plan.trials} trials" + (
        f", p_survive {', '.join(f'{p:g}' for p in plan.p_survive)}" if plan.p_survive else ""
    )
    fig.suptitle(f"{result.model}: expected precision ({what} per participant)")
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110)
    plt.close(fig)
    return buffer.getvalue()
