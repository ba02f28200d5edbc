"""Participants a likelihood-ratio test needs (stopwise.estimation.design_power): the
reference distributions, the power equation, the command, and power against simulation."""

from __future__ import annotations

import json
from pathlib import Path

import jax
import numpy as np
import pytest
from scipy import stats

import stopwise
from stopwise import cli
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation import design_power as W
from stopwise.estimation import design_study as S
from stopwise.estimation.design_discrimination import discrimination
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.recovery import stopping_design

BIG, SMALL = "crra+myopic+logit", "linear+myopic+logit"
THETA = {"r": 0.15, "precision": 2.0}
PLAN = S.Plan(p_survive=(0.6, 0.8), trials=20, subjects=12)


def test_reference_critical_values() -> None:
    """chi2(1) at 5%: 3.841; one parameter on a bound: the 50:50 mixture of chi2(0) and
    chi2(1) has its 5% point at the chi2(1) 10% point, 2.706 (Self & Liang 1987, case 5;
    values from memory, recomputed by scipy); with the boundary the power at lambda = 0 is
    the level, as the one-sided test's must be."""
    assert W.critical_value(1, 0) == pytest.approx(3.841459, abs=1e-6)
    assert W.critical_value(1, 1) == pytest.approx(stats.chi2.isf(0.10, 1), abs=1e-9)
    assert W.critical_value(1, 1) == pytest.approx(2.705543, abs=1e-6)
    assert W.lr_power(0.0, 1, 1) == pytest.approx(0.05, abs=1e-12)
    assert W.lr_power(0.0, 2, 0) == pytest.approx(0.05, abs=1e-12)
    # the boundary changes the answer: the two-sided non-central tail with the chi-bar
    # critical value would double the size at lambda = 0
    assert stats.ncx2.sf(W.critical_value(1, 1), 1, 1e-12) == pytest.approx(0.10, abs=1e-6)


def test_participants_are_the_smallest_with_the_target_power() -> None:
    """N(pi) is the first N with P(N) >= pi under lambda = 2 N mu."""
    for n_boundary in (0, 1):
        n = W.participants_for_power(0.1, 1, n_boundary, 0.8)
        assert W.lr_power(2 * n * 0.1, 1, n_boundary) >= 0.8
        assert W.lr_power(2 * (n - 1) * 0.1, 1, n_boundary) < 0.8
    assert W.participants_for_power(0.0, 1, 0, 0.8) is None


def test_lr_plan_is_certified_and_refuses_non_nested_pairs() -> None:
    """The nesting holds on the design (B at the restriction reproduces S), the pseudo-true
    values converge, and a non-nested pair is refused with a clear message."""
    row = W.lr_test_plan(stopwise.model(BIG), THETA, stopwise.model(SMALL), PLAN)
    assert row["certified"] and row["df"] == 1 and row["restriction"] == {"r": 0.0}
    assert row["checks"]["nesting_gap"] < 1e-10
    assert row["participants_needed"]["power_80"] < row["participants_needed"]["power_95"]
    with pytest.raises(StopwiseInputError, match="nested"):
        W.lr_test_plan(stopwise.model(BIG), THETA, stopwise.model("crra+myopic+probit"), PLAN)


def test_gains_and_splits_reach_the_discrimination() -> None:
    """A plan written with per-chance gains and a trial split gives the same expected
    log-likelihood ratio as the same study written as plain chances: 5 trials at 0.6 and 15
    at 0.8 equal round robin over (0.6, 0.8, 0.8, 0.8); gains (2, 2) equal gain 2."""
    big, small = stopwise.model(BIG), stopwise.model(SMALL)

    def mu(plan: S.Plan) -> float:
        return discrimination(big, THETA, small, plan)["llr_mean_per_subject"]

    split = S.Plan(p_survive=(0.6, 0.8), trials=20, subjects=12, allocation=(5, 15))
    spelled = S.Plan(p_survive=(0.6, 0.8, 0.8, 0.8), trials=20, subjects=12)
    assert mu(split) == pytest.approx(mu(spelled), rel=1e-6)
    gains = S.Plan(p_survive=(0.6, 0.8), trials=20, subjects=12, gains=(2.0, 2.0))
    scalar = S.Plan(p_survive=(0.6, 0.8), trials=20, subjects=12, gain=2.0)
    assert mu(gains) == pytest.approx(mu(scalar), rel=1e-6)
    assert abs(mu(scalar) - mu(PLAN)) > 1e-3  # the gain changes the answer


def test_command_reports_the_lr_test(tmp_path: Path) -> None:
    """``--versus`` a nested rival adds the LR-test power and sample sizes to the JSON."""
    out = tmp_path / "d.json"
    argv = ["design", "--model", BIG, "--set", "r=0.15", "--set", "precision=2"]
    argv += ["--p-survive", "0.6,0.8", "--trials", "20", "--subjects", "12"]
    assert cli.main([*argv, "--versus", SMALL, "--json", str(out)]) == 0
    written = json.loads(out.read_text())
    assert written["lr_test"]["certified"] is True
    assert written["lr_test"]["participants_needed"]["power_80"] > 0


def simulated_rejections(reps: int, seed: int = 5) -> np.ndarray:
    """Per simulated study of PLAN (BIG true at THETA): does the LR test at 5% reject SMALL?"""
    big, small = stopwise.model(BIG), stopwise.model(SMALL)
    design = stopping_design(PLAN.subjects, PLAN.trials, PLAN.p_survive, PLAN.gain, seed)
    critical = W.critical_value(1, 0)
    key = jax.random.PRNGKey(seed)
    rejected = []
    for _ in range(reps):
        key, sub = jax.random.split(key)
        data = to_stopping_data(big.simulate(THETA, design, sub), horizon=120)
        fits = [fit_mle(m, data, se=None, starts=1, progress=False) for m in (big, small)]
        assert all(f.converged for f in fits)
        rejected.append(2 * (fits[0].loglik - fits[1].loglik) > critical)
    return np.array(rejected)


@pytest.mark.slow
def test_power_matches_rejection_rate_over_300_simulated_studies() -> None:
    """Issue 18: the predicted power of the LR test (non-central chi-square, lambda = 2 N mu)
    lies inside the 99.9% binomial interval of the rejection rate over 300 simulated studies
    (Clopper-Pearson; common practice, no source)."""
    row = W.lr_test_plan(stopwise.model(BIG), THETA, stopwise.model(SMALL), PLAN)
    predicted = row[f"power_at_{PLAN.subjects}"]
    assert 0.3 < predicted < 0.9  # a case where the power is informative
    rejected = simulated_rejections(300)
    k, n = int(rejected.sum()), len(rejected)
    low = stats.beta.ppf(0.0005, k, n - k + 1)
    high = stats.beta.ppf(0.9995, k + 1, n - k)
    print("predicted power", predicted, "rejection rate", k / n)
    assert low < predicted < high
