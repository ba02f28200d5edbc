"""Figures: the statistics they draw are checked against outside references, every colour
comes from the one palette, and each figure renders to non-empty PNG and SVG files."""

from __future__ import annotations

import matplotlib.colors as mcolors
import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.proportion import proportion_confint

import stopwise
from stopwise.figures import comparison, contest, palette, stopping, subjects
from stopwise.models.normative import draw_threshold, dynamic_programme

PALETTE = {mcolors.to_hex(c) for c in (*palette.MODELS, palette.OBSERVED, palette.BENCHMARK)}


@pytest.mark.parametrize(("k", "n"), [(0, 7), (3, 10), (10, 10), (41, 57), (1, 200)])
def test_clopper_pearson_matches_statsmodels(k, n):
    """Reference: statsmodels proportion_confint(method="beta"), the Clopper & Pearson
    (1934) exact interval."""
    low, high = stopping.clopper_pearson(np.array([k]), np.array([n]))
    ref_low, ref_high = proportion_confint(k, n, alpha=0.05, method="beta")
    assert low[0] == pytest.approx(ref_low, abs=1e-12)
    assert high[0] == pytest.approx(ref_high, abs=1e-12)


@pytest.mark.parametrize(
    ("p", "gain", "start", "keep"),
    [(0.8, 1.0, 0.0, 0.0), (0.9, 1.0, 0.0, 0.0), (0.75, 2.0, 3.0, 0.0), (0.85, 1.0, 1.0, 0.3)],
)
def test_risk_neutral_line_agrees_with_backward_induction(p, gain, start, keep):
    """The figure's closed-form rule (draw below (c - start)/gain, 1/2 at a tie) against the
    brute-force dynamic programme; p = 0.8 and 0.9 with gain 1 are ties (c = 4 and 9)."""
    threshold = (draw_threshold(p, gain, keep) - start) / gain
    solved = dynamic_programme(p, gain, start, keep)
    steps = np.arange(30)
    draw, bank = solved.draw_value[steps], solved.stop_value[steps]
    expected = np.where(np.isclose(draw, bank, rtol=0, atol=1e-9), 0.5, (draw > bank).astype(float))
    np.testing.assert_array_equal(stopping.risk_neutral_draw(steps, threshold), expected)


def _colours(fig):
    found = set()
    for ax in fig.axes:
        for line in ax.get_lines():
            if line.get_visible() and len(line.get_xdata()):
                found.add(mcolors.to_hex(line.get_color()))
        for patch in ax.patches:
            found.add(mcolors.to_hex(patch.get_facecolor()[:3]))
    return found


@pytest.fixture(scope="module")
def solo(small_demo):
    frame = small_demo["stopping"]
    fit = stopwise.fit("crra+myopic+logit", frame, progress=False)
    return frame, {"crra+myopic+logit": fit.predict()["stop_steps"]}


def test_stopping_figures_use_the_palette_and_draw_every_condition(solo, tmp_path):
    frame, predictions = solo
    solo_frame = stopping.solo_rows(frame)
    conditions = solo_frame.groupby(["p_survive", "gain"]).ngroups
    for make in (stopping.stopping_curves_figure, stopping.stop_distribution_figure):
        fig = make(frame, predictions)
        assert sum(ax.get_visible() for ax in fig.axes) == min(conditions, stopping.MAX_PANELS)
        assert _colours(fig) <= PALETTE, _colours(fig) - PALETTE
        png, svg = palette.save_figure(fig, tmp_path / make.__name__)
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and b"<svg" in svg.read_bytes()


def test_observed_draw_rates_count_the_decisions(solo):
    frame, _ = solo
    rates = stopping.observed_draw_rates(frame)
    solo_frame = stopping.solo_rows(frame)
    assert rates["n"].sum() == len(solo_frame)
    assert rates["draws"].sum() == (solo_frame["action"] == "draw").sum()


def test_other_figures_use_the_palette():
    table = pd.DataFrame({"delta_aic": [0.0, 12.5, 3.0]}, index=["m1", "m2", "m3"])
    figs = [comparison.comparison_figure(table)]
    params = pd.DataFrame(
        {
            "subject": ["a", "a", "b", "b"],
            "name": ["r", "precision"] * 2,
            "estimate": [0.3, 2.0, 0.5, 3.0],
            "se": [0.1, np.nan, 0.2, 0.5],
        }
    )
    figs.append(subjects.subject_estimates_figure(params))
    plot = pd.DataFrame(
        {
            "scheme": ["s"] * 4,
            "prediction": ["nash", "nash", "qre", "qre"],
            "target": [0, 1, 0, 1],
            "prob": [0.5, 0.5, 0.2, 0.8],
        }
    )
    figs.append(contest.target_distribution_figure(plot, {"s": pd.Series([1.0], index=[1])}))
    for fig in figs:
        assert _colours(fig) <= PALETTE


def test_bayes_panel_titles_stay_inside_the_figure() -> None:
    # a long name (a between-subject correlation on the unconstrained scale) once ran off the
    # left edge of the report's rank-plot panel; every title must lie within the figure
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    from stopwise.figures.bayes import idata_from_draws, posterior_figure

    rng = np.random.default_rng(3)
    names = ["r, precision: between-subject correlation (unconstrained scale)", "r"]
    draws = {name: rng.normal(size=(4, 100)) for name in names}
    fig = posterior_figure(idata_from_draws(draws), names)
    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    width = fig.bbox.width
    titles = [ax.title for ax in fig.axes if ax.get_title()]
    assert len(titles) == 2 * len(names)
    for title in titles:
        box = title.get_window_extent(renderer)
        assert box.x0 >= 0 and box.x1 <= width, title.get_text()
