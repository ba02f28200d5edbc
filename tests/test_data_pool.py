"""Task variants in the data: draws from a known pool (pool_size, pool_bad) and odds not
told (odds_known); validation messages name the line, the column and what was expected."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import hypergeom

from stopwise.data_schemas.checks_pool import pool_survival_chance
from stopwise.data_schemas.validate import validate


def pool_trial_rows(subject: int, trial: int, size: int, bad: int, stop_at: int) -> list[dict]:
    """One pool trial drawing ``stop_at`` times successfully, then stopping."""
    return [
        {
            "subject": subject,
            "trial": trial,
            "step": s,
            "p_survive": (size - bad - s) / (size - s),
            "gain": 1.0,
            "action": "stop" if s == stop_at else "draw",
            "outcome": None if s == stop_at else "success",
            "pool_size": size,
            "pool_bad": bad,
        }
        for s in range(stop_at + 1)
    ]


@pytest.fixture
def pool_frame() -> pd.DataFrame:
    rows = pool_trial_rows(1, 1, 10, 3, 3) + pool_trial_rows(1, 2, 20, 3, 5)
    return pd.DataFrame(rows)


@pytest.mark.parametrize(("size", "bad"), [(10, 3), (20, 3), (7, 6), (52, 4)])
def test_pool_chance_is_the_hypergeometric_conditional(size: int, bad: int) -> None:
    # scipy.stats.hypergeom (SciPy reference library): with G good items among N, P(the
    # first s + 1 draws are all good) / P(the first s draws are all good) is the chance that
    # the draw at step s survives, given s good items drawn.
    good = size - bad
    steps = np.arange(good)
    all_good = hypergeom.pmf(steps + 1, size, good, steps + 1) / hypergeom.pmf(
        steps, size, good, steps
    )
    np.testing.assert_allclose(pool_survival_chance(size, bad, steps), all_good, rtol=1e-12)


def test_clean_pool_file_passes_with_changing_p_survive(pool_frame) -> None:
    report = validate(pool_frame)
    assert report.ok, report.summary()


def _problems(frame: pd.DataFrame) -> list[tuple[str, int, str, str]]:
    report = validate(frame)
    return [(p.kind, p.line, p.column, p.expected) for p in report.problems]


def test_p_survive_off_the_pool_names_line_column_and_the_expected_chance(pool_frame) -> None:
    frame = pool_frame.copy()
    frame.loc[2, "p_survive"] = 0.5  # line 4, step 2 of a 10-item pool with 3 bad
    problems = _problems(frame)
    assert problems == [
        ("pool_p_survive", 4, "p_survive", "(good left)/(items left) = (7 - 2)/(10 - 2) = 0.625")
    ]


def test_pool_bad_not_below_pool_size_and_half_given_pool_are_refused(pool_frame) -> None:
    frame = pool_frame.copy()
    frame["pool_bad"] = frame["pool_bad"].astype(float)
    frame.loc[frame.trial == 1, "pool_bad"] = 12.0  # whole trial, so no design change
    frame.loc[frame.trial == 2, "pool_size"] = np.nan
    kinds = {(p[0], p[2]) for p in _problems(frame)}
    assert ("pool_range", "pool_bad") in kinds  # 12 bad of 10
    assert ("pool_range", "pool_size") in kinds  # pool_bad without pool_size
    lines = sorted(p[1] for p in _problems(frame) if p[0] == "pool_range")
    assert lines == [2, 3, 4, 5, 6, 7, 8, 9, 10, 11]


def test_pool_changing_inside_a_trial_is_a_design_change(pool_frame) -> None:
    frame = pool_frame.copy()
    frame.loc[1, "pool_size"] = 11  # line 3
    problems = _problems(frame)
    assert ("config_changes", 3, "pool_size") in [p[:3] for p in problems]


def cleared_trial() -> list[dict]:
    """A 4-item pool with 2 bad: both good items drawn, then the forced stop at step 2."""
    rows = pool_trial_rows(1, 1, 4, 2, 1)
    rows[1] = dict(rows[1], action="draw", outcome="success")
    rows.append(dict(rows[-1], step=2, action="stop", outcome=None, p_survive=0.0))
    return rows


def test_a_cleared_pool_ends_with_a_stop_at_p_survive_0() -> None:
    assert validate(pd.DataFrame(cleared_trial())).ok


def test_p_survive_0_elsewhere_a_draw_at_a_cleared_pool_and_steps_beyond_are_refused() -> None:
    rows = cleared_trial()
    rows[2] = dict(rows[2], action="draw", outcome="bust")
    problems = _problems(pd.DataFrame(rows))
    expected = "'stop': no good item is left in the pool, so the trial ends here"
    assert ("pool_p_survive", 4, "action", expected) in problems
    rows = cleared_trial()
    rows[2] = dict(rows[2], step=3)
    problems = _problems(pd.DataFrame(rows))
    assert ("pool_p_survive", 4, "step", "at most the pool's 2 good items") in problems
    assert any(p[:3] == ("p_survive_range", 4, "p_survive") for p in problems)
    plain = pd.DataFrame(cleared_trial()).drop(columns=["pool_size", "pool_bad"])
    assert any(p[:3] == ("p_survive_range", 4, "p_survive") for p in _problems(plain))


def test_odds_known_must_be_0_or_1_and_constant(pool_frame) -> None:
    frame = pool_frame.copy()
    frame["odds_known"] = 0
    assert validate(frame).ok
    frame.loc[0, "odds_known"] = 2
    problems = _problems(frame)
    assert any(p[0] == "value_range" and p[1] == 2 and p[2] == "odds_known" for p in problems)


def test_trial_level_data_refuse_pool_columns() -> None:
    frame = pd.DataFrame(
        {"subject": [1], "trial": [1], "p_survive": [0.7], "gain": [1.0], "draws": [2]}
    ).assign(busted=0, pool_size=10, pool_bad=3)
    problems = _problems(frame)
    assert [p[:3] for p in problems] == [
        ("wrong_format", 1, "pool_size"),
        ("wrong_format", 1, "pool_bad"),
    ]


def test_contests_from_a_pool_or_with_untold_odds_are_refused(decision_frame) -> None:
    frame = decision_frame.assign(odds_known=1)
    frame.loc[frame.task == "contest", "odds_known"] = 0
    problems = _problems(frame)
    contest_lines = [i + 2 for i in np.flatnonzero(frame.task == "contest")]
    assert [p[1] for p in problems if p[0] == "variant_contest"] == contest_lines
    assert all(p[2] == "odds_known" for p in problems if p[0] == "variant_contest")
