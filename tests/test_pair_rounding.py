"""Vuong and Clarke on differences at rounding level (issue 12 follow-up): two fits whose
per-subject log-likelihoods agree up to numerical noise read "indistinguishable" instead of
a Vuong Z of 1e4 or more, ties at rounding level are ties in Clarke's sign test, and a
genuine small difference still gets the statistic a hand computation gives."""

from __future__ import annotations

import dataclasses

import jax
import numpy as np
import pytest
from scipy import stats

import stopwise  # noqa: F401  (float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml import compare as compare_module
from stopwise.estimation.ml.compare import subject_logliks, subject_rows
from stopwise.estimation.ml.identification import fit_identified
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.estimation.nesting import Relation
from stopwise.estimation.pair_tests import (
    ROW_TOLERANCE,
    clarke_test,
    indistinguishable,
    vuong_test,
)
from stopwise.models.spec import build_model

SPEC = "linear+myopic+logit"


@pytest.fixture(scope="module")
def fitted():
    """A real fit: 24 simulated subjects (about 75 decision rows each, predictable choices,
    |ln L| per row 0.2-0.4), the fit, its per-subject log-likelihoods and row counts."""
    design = stopping_design(24, 25, (0.6, 0.75, 0.9), 1.0, 3)
    frame = build_model(SPEC).simulate({"precision": 4.0}, design, jax.random.PRNGKey(3))
    fit = fit_identified(build_model(SPEC), to_stopping_data(frame), seed=0, starts=1)
    assert fit.converged
    return fit, subject_logliks(fit), subject_rows(fit)


def hand_vuong(d: np.ndarray, k_a: int, k_b: int) -> float:
    """Vuong (1989, from memory), Schwarz-corrected: Z = (sum d - (k_a - k_b) ln(G) / 2) /
    (sqrt(G) sd(d)), sd with divisor G, written out with numpy."""
    g = len(d)
    return (d.sum() - (k_a - k_b) * np.log(g) / 2.0) / (np.sqrt(g) * d.std(ddof=0))


def test_rounding_noise_on_a_real_fit_reads_indistinguishable(fitted) -> None:
    _fit, ll_a, rows = fitted
    signs = np.random.default_rng(0).choice([-1.0, 1.0], size=ll_a.shape)
    ll_b = ll_a + 1e-13 * signs
    # Without the rule the Schwarz term over a 1e-13 sd would give |Z| ~ 1e12.
    assert abs(hand_vuong(ll_a - ll_b, 1, 2)) > 1e4
    assert indistinguishable(ll_a, ll_b, rows)
    assert np.isnan(vuong_test(ll_a, ll_b, 1, 2, rows)[0])
    assert np.isnan(clarke_test(ll_a, ll_b, 1, 2, rows)[0])


def test_a_bounded_parameter_approximating_the_other_model_reads_indistinguishable(
    fitted,
) -> None:
    """The level-at-its-bound mechanism on a solo pair: model B is model A's likelihood
    computed to an accuracy of 8e-7 per row (one-signed errors, as a fixed point solved to
    that accuracy) with one more parameter. Each subject's difference (about 75 rows x 4e-7)
    exceeds the old per-subject tolerance 1e-6 (1 + |ln L_g|), which scaled with |ln L_g|
    (about 0.3 per row here) instead of the rows, so the old code reported Vuong's Z ~ 1e5."""
    fit, ll_a, rows = fitted
    problem = fit.extras["problem"]
    row_ll = problem.row_loglik(fit.z)
    error = np.random.default_rng(1).uniform(0.0, 8e-7, size=row_ll.shape)
    weighted = np.where(problem.weights > 0, problem.weights * (row_ll - error), 0.0)
    ll_b = np.bincount(problem.cluster, weights=weighted, minlength=problem.n_clusters)
    d = ll_a - ll_b
    assert np.any(np.abs(d) > 1e-6 * (1.0 + np.abs(ll_a)))  # beyond the old tolerance
    assert abs(hand_vuong(d, fit.k, fit.k + 1)) > 1e4  # what the old code printed
    assert indistinguishable(ll_a, ll_b, rows)
    twin = dataclasses.replace(fit, model="approximating model", k=fit.k + 1)
    out, notes = compare_module._non_nested_rows(
        Relation("non-nested"), fit, twin, ll_a, ll_b, rows
    )
    assert len(out) == 1 and out[0]["favours"] == "indistinguishable"
    assert "Vuong" not in out[0]["test"]
    assert notes and "per decision row" in notes[0] and f"{ROW_TOLERANCE:g}" in notes[0]


def test_a_genuine_small_difference_keeps_vuong_and_clarke(fitted) -> None:
    fit, ll_a, rows = fitted
    rng = np.random.default_rng(2)
    for per_row in (1e-3, 5.0 * ROW_TOLERANCE):  # well above, and 5x the rounding level
        gap = per_row * rows * rng.uniform(1.5, 3.0, size=ll_a.shape)  # no subject ties
        ll_b = ll_a - gap
        d = ll_a - ll_b
        assert not indistinguishable(ll_a, ll_b, rows)
        z, p = vuong_test(ll_a, ll_b, 1, 2, rows)
        expected = hand_vuong(d, 1, 2)
        assert z == pytest.approx(expected, rel=1e-10)
        assert p == pytest.approx(2.0 * stats.norm.sf(abs(expected)), rel=1e-8, abs=1e-300)
        # Clarke (2007, from memory): B = #{d_g - (k_a - k_b) ln(G) / (2G) > 0} of G.
        g = len(d)
        b_hand = int(np.sum(d - (1 - 2) * np.log(g) / (2.0 * g) > 0))
        b, p_b = clarke_test(ll_a, ll_b, 1, 2, rows)
        assert b == b_hand
        assert p_b == pytest.approx(stats.binomtest(b_hand, g, 0.5).pvalue)
        twin = dataclasses.replace(fit, model="other model", k=fit.k + 1)
        out, notes = compare_module._non_nested_rows(
            Relation("non-nested"), fit, twin, ll_a, ll_b, rows
        )
        assert [r["test"] for r in out] == [
            "Vuong (Schwarz-corrected)",
            "Clarke sign (Schwarz-corrected)",
        ]
        assert out[0]["statistic"] == pytest.approx(expected, rel=1e-10)
        # The note that the Schwarz term, not the fit, sets Z's sign appears exactly when
        # |sum d| < ln(G) / 2 (here 1.589): sum d is about 0.02 at 5e-6 per row, 4 at 1e-3.
        penalty_sets_sign = abs(d.sum()) < np.log(g) / 2.0
        assert penalty_sets_sign == (per_row < 1e-4)
        assert any("Schwarz term" in n for n in notes) == penalty_sets_sign


def test_clarke_drops_ties_at_rounding_level(fitted) -> None:
    _fit, ll_a, rows = fitted
    rng = np.random.default_rng(3)
    g = len(ll_a)
    tied = np.arange(g) % 2 == 0
    d = np.where(tied, 1e-13 * rng.choice([-1.0, 1.0], size=g), rng.normal(0.05, 0.2, size=g))
    ll_b = ll_a - d
    # Sign test with ties dropped (common practice, no source), equal parameter counts so
    # no correction: B counts the untied positives of the 12 untied subjects.
    b_hand = int(np.sum(d[~tied] > 0))
    b, p_b = clarke_test(ll_a, ll_b, 2, 2, rows)
    assert b == b_hand
    assert p_b == pytest.approx(stats.binomtest(b_hand, int((~tied).sum()), 0.5).pvalue)
