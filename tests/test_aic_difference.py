"""ΔAIC with its standard error over subjects: a hand computation, the link to Vuong's
statistic, and the column in a live comparison and in the report's figure."""

from __future__ import annotations

import jax
import numpy as np
import pytest

import stopwise  # noqa: F401  (float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.aic_difference import delta_aic_se, delta_aic_ses
from stopwise.estimation.ml.compare import compare_fits, subject_logliks
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.estimation.pair_tests import vuong_test
from stopwise.models.spec import build_model

LOGIT = "linear+myopic+logit"
PROBIT = "linear+myopic+probit"


def test_standard_error_against_a_hand_computation() -> None:
    ll_a = [-10.0, -12.5, -8.0, -9.5]
    ll_b = [-10.5, -12.0, -9.0, -9.0]
    # by hand: d = (0.5, -0.5, 1, -0.5), mean 1/8, sum of squared deviations 27/16,
    # variance (divisor 4) 27/64, sd 3 sqrt(3) / 8, SE = 2 sqrt(4) sd = 3 sqrt(3) / 2
    assert delta_aic_se(ll_a, ll_b) == pytest.approx(1.5 * np.sqrt(3.0), rel=1e-14)
    # the SE of a difference is symmetric in the pair
    assert delta_aic_se(ll_b, ll_a) == pytest.approx(1.5 * np.sqrt(3.0), rel=1e-14)
    # the same number from numpy directly: sqrt(G) * sd of the pointwise AIC terms -2 d_g
    terms = -2.0 * (np.array(ll_a) - np.array(ll_b))
    assert delta_aic_se(ll_a, ll_b) == pytest.approx(np.sqrt(4) * terms.std(), rel=1e-14)


def test_minus_delta_aic_over_its_se_is_vuongs_statistic() -> None:
    rng = np.random.default_rng(7)
    ll_a = rng.normal(-20.0, 3.0, size=40)
    ll_b = ll_a + rng.normal(-0.3, 1.0, size=40)
    g = len(ll_a)
    for k_a, k_b in ((2, 2), (3, 2), (2, 4)):
        delta = (2 * k_a - 2 * ll_a.sum()) - (2 * k_b - 2 * ll_b.sum())
        se = delta_aic_se(ll_a, ll_b)
        d = ll_a - ll_b
        # Vuong (1989), adjusted statistic with the AIC-type correction (from memory): Z = (LR - (k_a -
        # k_b)) / (sqrt(G) omega), omega the sd of d with divisor G
        z_aic = (d.sum() - (k_a - k_b)) / (np.sqrt(g) * d.std())
        assert -delta / se == pytest.approx(z_aic, rel=1e-12)
        # and the Schwarz-corrected Z of pair_tests differs from it by the correction only
        z_schwarz, _ = vuong_test(ll_a, ll_b, k_a, k_b)
        shift = (k_a - k_b) * (1.0 - np.log(g) / 2.0) / (np.sqrt(g) * d.std())
        assert z_schwarz == pytest.approx(-delta / se + shift, rel=1e-12)


def test_no_standard_error_without_two_subjects_or_from_unconverged_fits() -> None:
    assert np.isnan(delta_aic_se([-3.0], [-4.0]))
    assert np.isnan(delta_aic_se([-3.0, -2.0], [-4.0]))
    assert np.isnan(delta_aic_se([-3.0, np.nan], [-4.0, -1.0]))
    lls = [[-3.0, -4.0, -5.0], [-3.5, -3.0, -6.0], [-9.0, -9.0, -9.0]]
    ses = delta_aic_ses(lls, aics=[26.0, 27.0, 60.0], usable=[True, True, False])
    assert ses[0] == 0.0 and np.isnan(ses[2])
    assert ses[1] == pytest.approx(delta_aic_se(lls[1], lls[0]))
    # the best model not converged: no SE for anyone
    assert all(np.isnan(delta_aic_ses(lls, [26.0, 27.0, 60.0], [False, True, True])))


@pytest.fixture(scope="module")
def comparison():
    design = stopping_design(24, 25, (0.6, 0.75, 0.9), 1.0, 5)
    frame = build_model(LOGIT).simulate({"precision": 1.2}, design, jax.random.PRNGKey(5))
    data = to_stopping_data(frame)
    return compare_fits([build_model(LOGIT), build_model(PROBIT)], data, cv_folds=0)


def test_comparison_reports_the_se_and_it_matches_the_vuong_row(comparison) -> None:
    table = comparison.table
    assert list(table["delta_aic_se"]).count(0.0) == 1
    best, other = table.index[0], table.index[1]
    fits = {f.model: f for f in comparison.fits}
    expected = delta_aic_se(subject_logliks(fits[other]), subject_logliks(fits[best]))
    assert table.loc[other, "delta_aic_se"] == pytest.approx(expected, rel=1e-12)
    assert expected > 0
    # equal numbers of parameters: Vuong's Z (its correction vanishes) is ΔAIC / SE up to
    # the sign set by the pair's order (Vuong 1989, from memory)
    vuong = comparison.tests[comparison.tests["test"].str.startswith("Vuong")]
    assert len(vuong) == 1
    row = vuong.iloc[0]
    sign = 1.0 if row["model_a"] == best else -1.0
    ratio = table.loc[other, "delta_aic"] / table.loc[other, "delta_aic_se"]
    assert row["statistic"] == pytest.approx(sign * ratio, rel=1e-9)
    saved = comparison.to_dict()["models"]
    assert all("delta_aic_se" in m for m in saved)
    assert any("delta_aic_se" in n for n in comparison.notes)
