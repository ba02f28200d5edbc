"""Model comparison: pairs classified before a test is chosen, LR / chi-bar-square, Vuong and
Clarke against outside computations, indistinguishable fits, cross-validation folds."""

from __future__ import annotations

import dataclasses

import jax
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

import stopwise  # noqa: F401  (float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml import compare as compare_module
from stopwise.estimation.ml.compare import compare_fits
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.estimation.ml.response import _strip
from stopwise.estimation.nesting import classify, verify_nesting
from stopwise.estimation.pair_tests import (
    chi_bar_square_sf,
    clarke_test,
    likelihood_ratio,
    vuong_test,
)
from stopwise.models.spec import build_model

LOGIT = "linear+myopic+logit"


def simulated(spec: str, theta: dict[str, float], subjects: int, seed: int):
    design = stopping_design(subjects, 25, (0.6, 0.75, 0.9), 1.0, seed)
    frame = build_model(spec).simulate(theta, design, jax.random.PRNGKey(seed))
    return to_stopping_data(frame)


@pytest.fixture(scope="module")
def logit_data():
    return simulated(LOGIT, {"precision": 1.2}, 24, 3)


def test_likelihood_ratio_matches_statsmodels_compare_lr_test() -> None:
    rng = np.random.default_rng(0)
    x = rng.normal(size=(200, 3))
    y = x[:, 0] + 0.2 * x[:, 1] + rng.normal(size=200)
    small = sm.OLS(y, sm.add_constant(x[:, :1])).fit()
    big = sm.OLS(y, sm.add_constant(x)).fit()
    # statsmodels RegressionResults.compare_lr_test, reference library: (LR, p, df).
    ref_lr, ref_p, ref_df = big.compare_lr_test(small)
    ours = likelihood_ratio(small.llf, big.llf, df=2)
    np.testing.assert_allclose(ours["statistic"], ref_lr, rtol=1e-10)
    np.testing.assert_allclose(ours["p_value"], ref_p, rtol=1e-8)
    assert ours["df"] == ref_df


def test_chi_bar_square_for_a_boundary_restriction() -> None:
    # Self & Liang 1987, case 5 (from memory): one parameter on its boundary gives the
    # reference 0.5 chi2(0) + 0.5 chi2(1); with one more interior restriction 0.5 chi2(1) +
    # 0.5 chi2(2).
    for c in (0.3, 2.7055, 6.0):
        np.testing.assert_allclose(chi_bar_square_sf(c, 1, 1), 0.5 * stats.chi2.sf(c, 1))
        np.testing.assert_allclose(
            chi_bar_square_sf(c, 2, 1), 0.5 * stats.chi2.sf(c, 1) + 0.5 * stats.chi2.sf(c, 2)
        )
    assert chi_bar_square_sf(0.0, 1, 1) == 1.0
    # Independent check by simulation: the mean of n normal draws restricted to mu >= 0 has
    # LR = n max(xbar, 0)^2 under mu = 0 (common practice, no source).
    rng = np.random.default_rng(1)
    xbar = rng.normal(size=(200_000,))  # sqrt(n) xbar ~ N(0, 1)
    lr = np.maximum(xbar, 0.0) ** 2
    simulated_tail = float(np.mean(lr > 2.7055))
    assert abs(simulated_tail - chi_bar_square_sf(2.7055, 1, 1)) < 0.003
    assert abs(simulated_tail - stats.chi2.sf(2.7055, 1)) > 0.04  # chi2(1) would be wrong


def test_vuong_and_clarke_against_a_hand_computation() -> None:
    ll_a = np.array([-10.0, -12.0, -9.0, -11.0])
    ll_b = np.array([-11.0, -12.5, -9.2, -10.4])
    # By hand (Vuong 1989, Schwarz-corrected form, from memory): d = (1, 0.5, 0.2, -0.6),
    # sum d = 1.1, correction (2 - 1) ln(4) / 2 = 0.693147, numerator 0.406853;
    # mean d = 0.275, sum of squared deviations 1.3475, sd = sqrt(1.3475 / 4) = 0.580409;
    # Z = 0.406853 / (sqrt(4) * 0.580409) = 0.350488; p = 2 (1 - Phi(0.3505)) = 0.7260.
    z, p = vuong_test(ll_a, ll_b, 2, 1)
    assert z == pytest.approx(0.350488, abs=1e-6)
    assert p == pytest.approx(0.7260, abs=1e-4)
    # Clarke (2007, from memory): d - ln(4) / 8 = (0.827, 0.327, 0.027, -0.773): B = 3 of 4,
    # two-sided binomial p = 2 * 5/16 = 0.625.
    b, p_b = clarke_test(ll_a, ll_b, 2, 1)
    assert b == 3 and p_b == pytest.approx(0.625)


def test_pairs_are_classified_with_the_restriction_named() -> None:
    # Facts of the trade (common practice, no source): a tremble of 0 removes the tremble;
    # CRRA at r = 0 and CARA at a = 0 are linear utility; TK weighting at gamma = 1 is none.
    rel = classify(build_model("crra+planner+logit"), build_model("crra+planner+tremble"))
    assert (rel.kind, rel.small, rel.big) == ("nested", 0, 1)
    assert rel.restriction == {"tremble": 0.0} and rel.boundary == ["tremble"]
    rel = classify(build_model("crra+myopic+logit"), build_model(LOGIT))
    assert (rel.kind, rel.small, rel.restriction, rel.boundary) == ("nested", 1, {"r": 0.0}, [])
    rel = classify(build_model("crra+myopic+logit"), build_model("cara+myopic+logit"))
    assert rel.kind == "overlapping" and rel.common == LOGIT
    assert classify(build_model("crra+myopic+logit"), build_model("crra+myopic+probit")).kind == (
        "non-nested"
    )
    assert classify(build_model("crra+myopic+logit"), build_model("crra+planner+logit")).kind == (
        "non-nested"
    )
    rel = classify(build_model("crra+tk+probit"), build_model("crra+probit"))
    assert rel.kind == "nested" and rel.restriction == {"gamma": 1.0, "delta": 1.0}


def test_nesting_claims_are_checked_on_the_data(logit_data) -> None:
    crra = build_model("crra+myopic+logit")
    bare = _strip(logit_data)
    ll = float(np.sum(build_model(LOGIT).loglik_obs({"precision": 1.1}, bare)))
    assert verify_nesting(crra, {"precision": 1.1}, {"r": 0.0}, bare, ll)[0]
    ok, gap = verify_nesting(crra, {"precision": 1.1}, {"r": 0.5}, bare, ll)
    assert not ok and gap > 1.0


def test_nested_pair_gets_the_likelihood_ratio_test(logit_data) -> None:
    result = compare_fits(
        [build_model("crra+myopic+logit"), build_model(LOGIT)], logit_data, cv_folds=0
    )
    assert len(result.tests) == 1
    row = result.tests.iloc[0]
    assert row["relation"] == "nested" and row["restriction"] == "r = 0"
    table = result.table
    lr = 2 * (table.loc["crra+myopic+logit", "loglik"] - table.loc[LOGIT, "loglik"])
    # LR ~ chi2(1) for an interior restriction (Wilks 1938, from memory), by scipy.
    np.testing.assert_allclose(row["statistic"], lr, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(row["p_value"], stats.chi2.sf(lr, 1), rtol=1e-8)
    assert any("verified on the data" in n for n in result.notes)
    assert result.to_dict()["tests"][0]["restriction"] == "r = 0"


def test_tremble_pair_is_nested_on_the_boundary_not_a_vuong_test(logit_data) -> None:
    result = compare_fits(
        [build_model(LOGIT), build_model("linear+myopic+tremble")], logit_data, cv_folds=0
    )
    assert list(result.tests["test"]) == ["likelihood ratio"]
    row = result.tests.iloc[0]
    assert row["restriction"] == "tremble = 0"
    # chi-bar-square 0.5 chi2(0) + 0.5 chi2(1) (Self & Liang 1987, from memory).
    expected = 0.5 * (row["statistic"] <= 0) + 0.5 * stats.chi2.sf(row["statistic"], 1)
    np.testing.assert_allclose(row["p_value"], expected, rtol=1e-10)
    assert any("chi-bar-square" in n for n in result.notes)


def test_identical_fits_read_indistinguishable(logit_data) -> None:
    model = build_model(LOGIT)
    twin = dataclasses.replace(model, name="same model, another name")
    result = compare_fits([model, twin], logit_data, cv_folds=0)
    row = result.tests.iloc[0]
    assert len(result.tests) == 1 and row["favours"] == "indistinguishable"
    assert row["relation"] == "non-nested"
    assert "Vuong" not in " ".join(result.tests["test"])
    assert np.isnan(vuong_test(np.ones(5), np.ones(5), 2, 2)[0])


def test_cv_folds_use_the_full_multistart(logit_data, monkeypatch) -> None:
    seen: list[tuple[int, int]] = []
    real = compare_module.compiled_multistart

    def spy(problem, starts, max_iter, weights):
        seen.append((len(starts), len(weights)))
        return real(problem, starts, max_iter, weights)

    monkeypatch.setattr(compare_module, "compiled_multistart", spy)
    result = compare_fits(
        [build_model(LOGIT), build_model("crra+myopic+logit")], logit_data, cv_folds=3, starts=3
    )
    assert seen == [(3, 3)] * 2  # per model one call: 3 starts for each of 3 folds
    cv = result.table["cv_log_score_3fold"]
    assert np.all(np.isfinite(cv)) and not result.warnings


def test_a_fold_that_does_not_converge_gives_nan_and_a_warning(logit_data) -> None:
    result = compare_fits(
        [build_model(LOGIT), build_model("crra+myopic+logit")],
        logit_data,
        cv_folds=3,
        starts=1,
        max_iter=1,
    )
    cv = result.table["cv_log_score_3fold"]
    # the one-parameter model may converge in one iteration (trust-exact then a Newton
    # polish); crra's two parameters cannot: its folds give NaN, never a start-value score
    assert np.isnan(cv["crra+myopic+logit"])
    # nor did crra's full fit converge in one iteration: the pair test is refused
    assert not result.table["converged"]["crra+myopic+logit"]
    assert result.tests.iloc[0]["favours"].startswith("refused")
    assert any("fold 1 of 3 did not converge" in w for w in result.warnings)
    assert "cross-validation fold" in result.summary()
    assert isinstance(result.to_dict()["warnings"], list)
    assert isinstance(result.table, pd.DataFrame)
