"""The risk-neutral benchmark, checked by independent routes: the threshold rule in closed
form, enumeration of the expected-bank curve, and brute-force backward induction."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from scipy import stats

from stopwise.models.normative import (
    best_targets_on_curve,
    certainty_equivalent,
    draw_threshold,
    dynamic_programme,
    expected_bank,
    expected_bank_curve,
    optimal_target,
    optimal_targets,
    outcome_distribution,
)


@pytest.mark.parametrize(("p", "tie"), [(0.9, (9, 10)), (0.95, (19, 20))])
def test_known_ties(p: float, tie: tuple[int, int]) -> None:
    # Derived analytically: with gain 1 and start 0, E[bank | n] = n p^n, and
    # (n + 1) p^(n+1) = n p^n  <=>  n = p / (1 - p), which is 9 for p = 0.9 and 19 for 0.95.
    assert optimal_targets(p, 1.0) == tie
    assert dynamic_programme(p, 1.0).targets == tie
    _, curve = expected_bank_curve(p, 1.0, max_target=60)
    assert best_targets_on_curve(curve) == tie
    assert expected_bank(tie[0], p, 1.0) == pytest.approx(expected_bank(tie[1], p, 1.0), rel=1e-12)


def test_threshold_rule_of_the_issue() -> None:
    # Draw while bank < p * gain / (1 - p) with start 0 (issue 2, derived analytically):
    # p = 0.85 -> 5.67, so the optimal target is 6; p = 0.75 -> exactly 3, a tie of 3 and 4.
    assert draw_threshold(0.85, 1.0) == pytest.approx(0.85 / 0.15)
    assert optimal_targets(0.85, 1.0) == (6,)
    assert optimal_targets(0.75, 1.0) == (3, 4)
    # p = 0.5, gain 1: E[bank | n] = n / 2^n, maximal at n = 1 and 2 (0.5 each); derived
    # analytically.
    assert optimal_targets(0.5, 1.0) == (1, 2)
    assert expected_bank(np.array([1, 2, 3]), 0.5, 1.0) == pytest.approx([0.5, 0.5, 0.375])


GRID = list(
    itertools.product(
        [0.3, 0.6, 0.75, 0.82, 0.9, 0.97], [0.5, 1.0, 3.0], [0.0, 2.0, 7.5], [0.0, 0.25, 0.6]
    )
)


@pytest.mark.parametrize(("p", "gain", "start", "keep"), GRID)
def test_closed_form_enumeration_and_dynamic_programme_agree(p, gain, start, keep) -> None:
    closed = optimal_targets(p, gain, start, keep)
    programme = dynamic_programme(p, gain, start, keep)
    _, curve = expected_bank_curve(p, gain, start, keep, max_target=closed[-1] + 40)
    assert programme.targets == closed
    assert best_targets_on_curve(curve, rtol=1e-10) == closed
    assert programme.optimal_value == pytest.approx(
        float(expected_bank(closed[0], p, gain, start, keep)), rel=1e-10
    )


@pytest.mark.parametrize(
    ("p", "gain", "start", "keep", "n"),
    [
        (0.8, 1.0, 0.0, 0.0, 4),
        (0.7, 2.0, 3.0, 0.4, 6),
        (0.95, 0.5, 1.0, 0.9, 25),
        (0.6, 1.0, 0.0, 1.0, 3),
    ],
)
def test_expected_bank_closed_form_matches_direct_sum(p, gain, start, keep, n) -> None:
    values, probs = outcome_distribution(n, p, gain, start, keep)
    assert probs.sum() == pytest.approx(1.0, abs=1e-14)
    direct = float(np.sum(values * probs))
    assert float(expected_bank(n, p, gain, start, keep)) == pytest.approx(direct, rel=1e-12)


def test_certainty_equivalent_linear_utility_is_the_expected_bank() -> None:
    # Risk neutrality: the certainty equivalent equals the expected value (common practice,
    # no source).
    for n in (0, 3, 9, 15):
        ce = certainty_equivalent(n, 0.9, 1.0, lambda x: x, start=1.0, bust_keep=0.2)
        assert ce == pytest.approx(float(expected_bank(n, 0.9, 1.0, 1.0, 0.2)), rel=1e-9)


@pytest.mark.parametrize("r", [0.3, 0.5, 0.8])
def test_certainty_equivalent_crra_closed_form(r: float) -> None:
    # CRRA u(x) = x^(1-r)/(1-r) (DESIGN.md); its inverse gives
    # CE = (sum_i p_i x_i^(1-r))^(1/(1-r)), derived analytically; also CE < E[bank] for a
    # concave utility (Jensen's inequality, common practice, no source).
    n, p, gain, start, keep = 6, 0.85, 1.0, 2.0, 0.5
    values, probs = outcome_distribution(n, p, gain, start, keep)
    closed = float(np.sum(probs * values ** (1 - r))) ** (1 / (1 - r))

    def crra(x: float) -> float:
        return x ** (1 - r) / (1 - r)

    ce = certainty_equivalent(n, p, gain, crra, start=start, bust_keep=keep)
    assert ce == pytest.approx(closed, rel=1e-9)
    assert ce < float(expected_bank(n, p, gain, start, keep))


@pytest.mark.parametrize(
    ("p", "gain", "start", "keep", "n"), [(0.9, 1.0, 0.0, 0.0, 9), (0.75, 2.0, 1.0, 0.3, 5)]
)
def test_expected_bank_against_scipy_geometric_distribution(p, gain, start, keep, n) -> None:
    # Reference library: the number of dives up to and including the first collapse is
    # geometric with success probability 1 - p (scipy.stats.geom); successes X = K - 1.
    def final_bank(k: np.ndarray) -> np.ndarray:  # vectorised over K
        successes = np.asarray(k, dtype=float) - 1
        kept = keep * (start + successes * gain)
        return np.where(successes >= n, start + n * gain, kept)

    reference = stats.geom.expect(final_bank, args=(1 - p,))
    assert float(expected_bank(n, p, gain, start, keep)) == pytest.approx(reference, rel=1e-8)


def test_bust_keep_one_has_no_finite_target() -> None:
    with pytest.raises(ValueError, match="no finite optimal target"):
        optimal_target(0.9, 1.0, bust_keep=1.0)
    with pytest.raises(ValueError, match="p_survive"):
        expected_bank(3, 1.0, 1.0)
