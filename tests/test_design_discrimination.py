"""Model discrimination of a design (stopwise.estimation.design_discrimination): the exact
moments of the log-likelihood ratio and the pseudo-true parameters against simulated
participants, and the AIC pick rate against refits of simulated studies."""

from __future__ import annotations

import jax
import numpy as np
import pytest
from scipy import stats

import stopwise
from stopwise.data_schemas.bundle import to_lottery_data, to_stopping_data
from stopwise.estimation import design_discrimination as X
from stopwise.estimation import design_info as D
from stopwise.estimation import design_study as S
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.recovery import stopping_design
from tests.test_design_simulation import price_list

TRUTH = {"r": 0.4, "precision": 2.0}
PLAN = S.Plan(p_survive=(0.6, 0.8), trials=20, subjects=400)


def per_subject_sums(values: np.ndarray, subject: np.ndarray) -> np.ndarray:
    return np.bincount(subject, weights=values)


def test_log_ratio_moments_and_pseudo_truth_match_simulated_participants() -> None:
    """Guards the backward recursion for the mean and variance of the per-participant
    log-likelihood ratio and the pseudo-true rival values: 400 simulated participants of
    the planner model give a mean log-ratio within 4 standard errors of mu, a variance in the
    99.9% chi-square band (common practice, no source), and a mean rival score (at the
    pseudo-true values) within 4 standard errors of zero."""
    truth, rival = stopwise.model("crra+planner+logit"), stopwise.model("crra+myopic+logit")
    row = X.discrimination(truth, TRUTH, rival, PLAN)
    assert row["pseudo_true_converged"]
    design = stopping_design(PLAN.subjects, PLAN.trials, PLAN.p_survive, PLAN.gain, 3)
    frame = truth.simulate(TRUTH, design, jax.random.PRNGKey(11))
    data = to_stopping_data(frame, horizon=D.cap_steps(PLAN.p_survive))
    subject = np.asarray(data.subject)
    true_values, _ = D.values_and_gradients(truth, D.theta_matrix(truth, [TRUTH]), data)
    rival_theta = D.theta_matrix(rival, [row["rival_pseudo_true"]])
    rival_values, rival_grads = D.values_and_gradients(rival, rival_theta, data)
    ratio = per_subject_sums(true_values[0] - rival_values[0], subject)
    n = len(ratio)
    mu, sd = row["llr_mean_per_subject"], row["llr_sd_per_subject"]
    assert abs(ratio.mean() - mu) < 4 * sd / np.sqrt(n)
    df = n - 1
    band = stats.chi2.ppf([0.0005, 0.9995], df) / df
    assert band[0] < ratio.var(ddof=1) / sd**2 < band[1]
    scores = np.stack([per_subject_sums(g, subject) for g in rival_grads[0].T], axis=1)
    z = scores.mean(axis=0) / (scores.std(axis=0, ddof=1) / np.sqrt(n))
    assert np.all(np.abs(z) < 4), z


def test_a_nesting_rival_is_reported_indistinguishable() -> None:
    """pt+tk+logit contains crra+logit on gains (alpha = 1 - r, no weighting; a fact of the
    models, common practice, no source): its pseudo-true values reproduce the truth, the
    mean log-ratio is zero and no number of participants is promised."""
    truth, rival = stopwise.model("crra+logit"), stopwise.model("pt+tk+logit")
    plan = S.Plan(trials=10, subjects=40, items=price_list(1).drop(columns="subject"))
    row = X.discrimination(truth, {"r": 0.4, "precision": 3.0}, rival, plan)
    assert row["indistinguishable"]
    assert abs(row["rival_pseudo_true"]["alpha"] - 0.6) < 1e-3
    back = X.discrimination(rival, row["rival_pseudo_true"], truth, plan)
    assert back["participants_needed"]["aic_80"] is None


@pytest.mark.slow
def test_aic_pick_rate_matches_simulated_studies() -> None:
    """The predicted probability that AIC picks the true crra+logit over crra+probit with N
    participants against the rate over 100 simulated studies refitted with both models
    (binomial band of 4 standard errors plus 0.05 for the asymptotic approximation)."""
    truth, rival = stopwise.model("crra+logit"), stopwise.model("crra+probit")
    theta = {"r": 0.4, "precision": 3.0}
    items = price_list(1).drop(columns="subject")
    probe = X.discrimination(truth, theta, rival, S.Plan(trials=10, subjects=1, items=items))
    n = probe["participants_needed"]["aic_80"]
    plan = S.Plan(trials=10, subjects=n, items=items)
    predicted = X.discrimination(truth, theta, rival, plan)[f"aic_pick_probability_at_{n}"]
    design = price_list(n)
    key = jax.random.PRNGKey(5)
    picks = []
    for _ in range(100):
        key, sub = jax.random.split(key)
        data = to_lottery_data(truth.simulate(theta, design, sub))
        fits = [fit_mle(m, data, se=None, starts=1, progress=False) for m in (truth, rival)]
        picks.append(fits[0].aic < fits[1].aic)
    rate = float(np.mean(picks))
    assert abs(rate - predicted) < 4 * np.sqrt(predicted * (1 - predicted) / 100) + 0.05
