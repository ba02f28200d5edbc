"""Expected SEs of a design (stopwise.estimation.design_study) against the empirical spread
of maximum-likelihood estimates over simulated replications of the same design. Derived
analytically: the expected SEs; checked by simulation: their agreement with the SD."""

from __future__ import annotations

import jax
import numpy as np
import pandas as pd
import pytest
from scipy import stats

import stopwise
from stopwise.data_schemas.bundle import to_lottery_data, to_stopping_data
from stopwise.estimation import design_study as S
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.recovery import stopping_design
from tests.designs import holt_laury_columns

FAST_REPS = 60
SLOW_REPS = 200


def price_list(subjects: int) -> pd.DataFrame:
    """Each subject answers the ten rows of the Holt & Laury (2002, Table 1; from memory)
    list once (a design, not a check value)."""
    chance = np.tile(np.arange(1, 11) / 10, subjects)
    frame = pd.DataFrame(holt_laury_columns(chance))
    frame.insert(0, "item", np.tile(np.arange(1, 11), subjects))
    frame.insert(0, "subject", np.repeat(np.arange(1, subjects + 1), 10))
    return frame


CASES = {
    "stopping": (
        "crra+myopic+logit",
        {"r": 0.4, "precision": 2.0},
        S.Plan(p_survive=(0.6, 0.8), trials=20, subjects=30),
    ),
    "lottery": (
        "crra+logit",
        {"r": 0.4, "precision": 3.0},
        S.Plan(trials=10, subjects=40, items=price_list(1).drop(columns="subject")),
    ),
}


def simulated_estimates(case: str, reps: int, seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """(expected pooled SEs, estimates of every replication (reps, k))."""
    spec, theta, plan = CASES[case]
    model = stopwise.model(spec)
    expected = S.expected_precision(model, theta, plan)
    assert expected.certified
    if plan.items is None:
        design = stopping_design(plan.subjects, plan.trials, plan.p_survive, plan.gain, seed)
    else:
        design = price_list(plan.subjects)
    key = jax.random.PRNGKey(seed)
    estimates = []
    for _ in range(reps):
        key, sub = jax.random.split(key)
        frame = model.simulate(theta, design, sub)
        data = to_stopping_data(frame, horizon=60) if "step" in frame else to_lottery_data(frame)
        fit = fit_mle(model, data, se=None, starts=1, progress=False)
        assert fit.converged
        estimates.append(np.asarray(fit.table.estimate, dtype=float))
    return expected.precisions[0].se_pooled(plan.subjects), np.array(estimates)


def sd_ratio_bounds(reps: int, level: float = 0.999) -> tuple[float, float]:
    """If the expected SE is right (and estimates near normal), (R-1) SD^2 / SE^2 follows
    chi-square with R-1 degrees of freedom (common practice, no source): the two-sided
    ``level`` interval of SD / SE."""
    df = reps - 1
    tail = (1 - level) / 2
    return (
        float(np.sqrt(stats.chi2.ppf(tail, df) / df)),
        float(np.sqrt(stats.chi2.ppf(1 - tail, df) / df)),
    )


@pytest.mark.parametrize("case", sorted(CASES))
def test_expected_se_matches_spread_of_estimates(case: str) -> None:
    """Guards the expected information (and its use for SEs) on a solo policy and a lottery
    model: the SD of 60 simulated estimates lies in the 99.9% chi-square band around the
    expected SE (about +-30% at 60 replications; the slow test holds it to 10%)."""
    expected_se, estimates = simulated_estimates(case, FAST_REPS)
    ratio = estimates.std(axis=0, ddof=1) / expected_se
    low, high = sd_ratio_bounds(FAST_REPS)
    assert np.all((ratio > low) & (ratio < high)), ratio


@pytest.mark.slow
@pytest.mark.parametrize("case", sorted(CASES))
def test_expected_se_within_ten_percent_over_200_replications(case: str) -> None:
    """Issue 18's validation: expected SEs within 10% of the SD of 200 simulated estimates."""
    expected_se, estimates = simulated_estimates(case, SLOW_REPS)
    ratio = estimates.std(axis=0, ddof=1) / expected_se
    assert np.all(np.abs(ratio - 1) < 0.10), ratio


def recovery_sd(model, theta: dict[str, float], plan: S.Plan, reps: int, seed: int) -> np.ndarray:
    """SD of the ML estimates over ``reps`` simulated studies of ``plan``."""
    design = stopping_design(plan.subjects, plan.trials, plan.p_survive, plan.gain, seed)
    key = jax.random.PRNGKey(seed)
    estimates = []
    for _ in range(reps):
        key, sub = jax.random.split(key)
        data = to_stopping_data(model.simulate(theta, design, sub), horizon=120)
        estimates.append(
            np.asarray(
                fit_mle(model, data, se=None, starts=1, progress=False).table.estimate, dtype=float
            )
        )
    return np.array(estimates).std(axis=0, ddof=1)


@pytest.mark.slow
def test_optimised_pick_beats_the_baseline_in_simulation() -> None:
    """The set the search picks for se:r gives a smaller SD of r over 100 simulated studies
    than the baseline, by more than the 99.9% F band of two SDs allows by chance (common
    practice, no source)."""
    from stopwise.estimation.design_search import search_designs

    model = stopwise.model("crra+myopic+logit")
    theta = {"r": 0.4, "precision": 2.0}
    baseline = S.Plan(p_survive=(0.5, 0.55), trials=20, subjects=30)
    found = search_designs(model, theta, baseline, [0.5, 0.6, 0.7, 0.8, 0.9], 2, "se:r")
    best = found.table.iloc[0]
    assert best["se_gain"] > 1.3
    picked = S.Plan(tuple(float(p) for p in best["p_survive"].split()), 20, 30)
    reps = 100
    sd_base = recovery_sd(model, theta, baseline, reps, 1)[0]
    sd_best = recovery_sd(model, theta, picked, reps, 2)[0]
    f_high = stats.f.ppf(0.9995, reps - 1, reps - 1)
    assert (sd_base / sd_best) ** 2 > f_high
