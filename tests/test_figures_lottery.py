"""Lottery-choice figure: expected values, the riskier option, exact intervals, predicted
shares, and the report section that draws it from a saved fit."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import stopwise
from stopwise.demo import demo_data
from stopwise.figures.lottery import lottery_choice_figure, lottery_items, option_moments
from stopwise.models.spec import build_model
from stopwise.report.content import build_content


def price_list(rows: int = 10) -> pd.DataFrame:
    """The ten-row list design of Holt & Laury (2002, Table 1): A pays 2.00 or 1.60, B pays
    3.85 or 0.10, the high outcome with probability row / 10 (design only, no choices)."""
    p = np.arange(1, rows + 1) / 10.0
    return pd.DataFrame(
        {
            "subject": "x",
            "item": [f"row{i:02d}" for i in range(1, rows + 1)],
            "a_x1": 2.00,
            "a_p1": p,
            "a_x2": 1.60,
            "a_p2": 1.0 - p,
            "b_x1": 3.85,
            "b_p1": p,
            "b_x2": 0.10,
            "b_p2": 1.0 - p,
            "choice": "A",
        }
    )


def test_expected_values_match_the_published_payoff_differences() -> None:
    frame = price_list()
    ev_a, _ = option_moments(frame, "a")
    ev_b, _ = option_moments(frame, "b")
    # Holt & Laury 2002, Table 1, "expected payoff difference" EV(A) - EV(B), printed to
    # cents (from memory)
    published = [1.17, 0.83, 0.50, 0.16, -0.18, -0.51, -0.85, -1.18, -1.52, -1.85]
    np.testing.assert_allclose(ev_a - ev_b, published, atol=0.005 + 1e-12)
    items = lottery_items(frame)
    # B has the larger spread on every row (on the last row both are sure: a tie, B)
    assert set(items["risky_option"]) == {"B"}
    np.testing.assert_allclose(
        np.sort(items["ev_advantage"].to_numpy()), np.sort(ev_b - ev_a), rtol=1e-12
    )


def test_intervals_are_exact_binomial_and_shares_follow_the_riskier_option() -> None:
    base = price_list(2)
    # item row01 with A made the riskier option (A: 10 or 0 at 1/2; B: sure 4)
    base.loc[0, ["a_x1", "a_p1", "a_x2", "a_p2"]] = [10.0, 0.5, 0.0, 0.5]
    base.loc[0, ["b_x1", "b_p1", "b_x2", "b_p2"]] = [4.0, 1.0, 0.0, 0.0]
    frame = pd.concat([base] * 7, ignore_index=True)
    frame["choice"] = ["A", "B"] * 5 + ["A"] * 4  # 14 rows, 7 per item
    p_b = np.linspace(0.1, 0.9, len(frame))
    items = lottery_items(frame, p_b).set_index("item")
    first = frame["item"] == "row01"
    assert items.loc["row01", "risky_option"] == "A"
    k = int((frame.loc[first, "choice"] == "A").sum())
    assert items.loc["row01", "risky"] == k and items.loc["row01", "n"] == 7
    assert items.loc["row01", "ev_advantage"] == pytest.approx(5.0 - 4.0)
    # by hand: A riskier, so the predicted share is the mean of 1 - P(B) on its rows
    assert items.loc["row01", "predicted"] == pytest.approx(np.mean(1.0 - p_b[first]))
    assert items.loc["row02", "predicted"] == pytest.approx(np.mean(p_b[~first]))
    for item, row in items.iterrows():
        # scipy's exact (Clopper-Pearson 1934) interval, reference library
        ci = stats.binomtest(int(row["risky"]), int(row["n"])).proportion_ci(method="exact")
        assert row["low"] == pytest.approx(ci.low, abs=1e-12), item
        assert row["high"] == pytest.approx(ci.high, abs=1e-12), item


def test_figure_draws_the_observed_and_predicted_shares() -> None:
    frame = price_list()
    frame["choice"] = ["B"] * 3 + ["A"] * 7
    items = lottery_items(frame, np.full(len(frame), 0.3))
    fig = lottery_choice_figure(items, {"model": items})
    ax = fig.axes[0]
    model_line = [line for line in ax.lines if line.get_label() == "model"]
    assert len(model_line) == 1
    np.testing.assert_allclose(model_line[0].get_ydata(), 0.3)
    assert "10 items" in ax.get_title()


@pytest.fixture(scope="module")
def lottery_study(tmp_path_factory):
    folder = tmp_path_factory.mktemp("lottery")
    data = folder / "lottery.csv"
    demo_data(n_subjects=12)["lottery"].to_csv(data, index=False)
    fit = stopwise.fit(build_model("crra+logit", wealth=20.0), data)
    result = folder / "fit.json"
    result.write_text(json.dumps(fit.to_dict()), encoding="utf-8")
    return data, result, fit


def test_report_draws_lottery_choices_from_a_saved_fit(lottery_study) -> None:
    data, result, fit = lottery_study
    content = build_content(data, [result])
    titles = [s.title for s in content.sections]
    assert "Lottery choices" in titles
    section = content.sections[titles.index("Lottery choices")]
    figures = [b for b in section.blocks if b.kind == "figure"]
    assert len(figures) == 1 and figures[0].png.startswith(b"\x89PNG")
    assert not [w for w in content.warnings if "lottery-choice prediction" in w]
    # the saved fit's per-row predictions are the live fit's
    live = fit.predict()["rows"]["p_choose_b"].to_numpy()
    saved = stopwise.load_result(result).predict(data)["rows"]["p_choose_b"].to_numpy()
    np.testing.assert_allclose(saved, live, rtol=1e-10)
