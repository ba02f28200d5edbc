"""Unknown odds: the Beta-prior learner (spec part ``learn``), its bookkeeping of what each
participant has seen, its derivatives, and the bias of ignoring learning."""

from __future__ import annotations

from types import SimpleNamespace

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest
from scipy.stats import betabinom

import stopwise
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.load import load
from stopwise.data_schemas.validate import validate
from stopwise.estimation.ml.learning_check import learning_warnings
from stopwise.models.learning import check_learning_data, learner_conditions, predictive_chance
from stopwise.models.spec import build_model
from stopwise.models.stopping import Conditions, log_reach_probabilities, step_chances

LEARNER = {"r": 0.5, "precision": 3.0, "prior_mean": 0.6, "prior_strength": 10.0}


def _learner_urn(prior_mean, prior_strength, seen_s, seen_f):
    n = len(seen_s)
    cond = Conditions(np.full(n, 0.9), np.ones(n), np.zeros(n), np.zeros(n))
    seen = SimpleNamespace(
        cond_odds_known=np.zeros(n),
        cond_seen_success=np.asarray(seen_s, float),
        cond_seen_fail=np.asarray(seen_f, float),
    )
    theta = {"prior_mean": prior_mean, "prior_strength": prior_strength}
    return learner_conditions(cond, seen, theta)


@pytest.mark.parametrize(("m", "k"), [(0.6, 10.0), (0.9, 2.0), (0.3, 0.5)])
def test_predictive_chances_are_beta_binomial(m, k):
    # scipy.stats.betabinom (SciPy reference library): after S successes and F busts the
    # chance that the next j draws all succeed is BetaBinomial(j; j, m k + S, (1-m) k + F),
    # and the one-draw predictive is BetaBinomial(1; 1, ...).
    seen_s, seen_f = [0, 7, 30], [0, 2, 5]
    urn = _learner_urn(m, k, seen_s, seen_f)
    log_reach = np.asarray(log_reach_probabilities(urn, 12))
    first = np.asarray(step_chances(urn, 1))[:, 0]
    for i, (s, f) in enumerate(zip(seen_s, seen_f)):
        a, b = m * k + s, (1 - m) * k + f
        j = np.arange(12)
        np.testing.assert_allclose(np.exp(log_reach[i]), betabinom.pmf(j, j, a, b), rtol=1e-12)
        assert first[i] == pytest.approx(betabinom.pmf(1, 1, a, b), rel=1e-14)
        assert first[i] == pytest.approx(float(predictive_chance(m, k, s, f)), rel=1e-14)


def _untold_frame() -> tuple[pd.DataFrame, list[tuple]]:
    """Two subjects; subject 1 has two learning streams (p 0.9 and 0.8) and one told trial."""
    spec = [  # subject, trial, p, odds_known, successes, busted
        (1, 1, 0.9, 0, 2, False),
        (1, 2, 0.8, 0, 0, True),
        (1, 3, 0.9, 1, 4, False),
        (1, 4, 0.9, 0, 1, True),
        (1, 5, 0.9, 0, 3, False),
        (2, 1, 0.9, 0, 5, True),
        (2, 2, 0.9, 0, 0, False),
    ]
    rows = []
    for subject, trial, p, known, successes, busted in spec:
        for s in range(successes + 1):
            last = s == successes
            rows.append(
                {
                    "subject": subject,
                    "trial": trial,
                    "step": s,
                    "p_survive": p,
                    "gain": 1.0,
                    "action": "draw" if not last or busted else "stop",
                    "outcome": ("bust" if busted else None) if last else "success",
                    "odds_known": known,
                }
            )
    return pd.DataFrame(rows), spec


def test_bundle_counts_the_draws_seen_before_each_untold_trial():
    frame, spec = _untold_frame()
    assert validate(frame).ok
    data = to_stopping_data(frame)
    first_rows = frame.groupby(["subject", "trial"]).head(1).index.to_numpy()
    cond = np.asarray(data.cond)[first_rows]
    got = np.stack(
        [np.asarray(data.cond_seen_success)[cond], np.asarray(data.cond_seen_fail)[cond]], 1
    )
    # the same counts by a plain loop over the trial list (stream = subject and p_survive)
    expected = []
    for i, (subject, trial, p, known, _, _) in enumerate(spec):
        earlier = [
            t for t in spec[:i] if t[0] == subject and t[2] == p and t[3] == 0 and t[1] < trial
        ]
        told = known == 1
        expected.append(
            [0 if told else sum(t[4] for t in earlier), 0 if told else sum(t[5] for t in earlier)]
        )
    np.testing.assert_array_equal(got, np.asarray(expected, float))
    assert np.asarray(data.cond_odds_known)[cond].tolist() == [0, 0, 1, 0, 0, 0, 0]


def test_learning_likelihood_has_exact_derivatives():
    frame, _ = _untold_frame()
    data = jax.tree_util.tree_map(jnp.asarray, to_stopping_data(frame))
    for policy in ("myopic", "planner", "target"):
        model = build_model(f"crra+learn+{policy}+logit", max_target=40)
        names = model.param_names

        def total(x, model=model, names=names):
            return jnp.sum(model.loglik_obs(dict(zip(names, x)), data))

        x = jnp.array([LEARNER[n] for n in names])
        grad = np.asarray(jax.grad(total)(x))
        for i in range(len(x)):  # central differences, step 1e-6 (common practice, no source)
            h = jnp.zeros_like(x).at[i].set(1e-6)
            numeric = float(total(x + h) - total(x - h)) / 2e-6
            assert grad[i] == pytest.approx(numeric, rel=1e-5, abs=1e-7), (policy, names[i])


def test_told_trials_are_unchanged_by_the_learning_part():
    frame, _ = _untold_frame()
    told = frame.assign(odds_known=1)
    data = to_stopping_data(told)
    theta = dict(LEARNER)
    with_learning = build_model("crra+learn+planner+logit").loglik_obs(theta, data)
    plain = build_model("crra+planner+logit").loglik_obs(
        {k: theta[k] for k in ("r", "precision")}, data
    )
    np.testing.assert_allclose(np.asarray(with_learning), np.asarray(plain), rtol=1e-13)


def _simulated_learners(n_subjects: int, n_trials: int, seed: int) -> pd.DataFrame:
    design = pd.DataFrame(
        {
            "subject": np.repeat(np.arange(n_subjects), n_trials),
            "trial": np.tile(np.arange(n_trials), n_subjects),
            "p_survive": 0.9,
            "gain": 1.0,
            "odds_known": 0,
        }
    )
    model = build_model("crra+learn+myopic+logit")
    return model.simulate(LEARNER, design, jax.random.PRNGKey(seed))


def test_simulated_learners_validate_and_draw_more_as_they_learn():
    frame = _simulated_learners(30, 20, 0)
    assert validate(frame).ok
    draws = frame.groupby("trial")["step"].max()
    # prior mean 0.6 below the true 0.9: beliefs rise with experience, so do the draws
    assert draws.iloc[10:].mean() > draws.iloc[:5].mean()


@pytest.mark.slow
def test_ignoring_learning_biases_risk_aversion_and_the_learning_model_removes_it():
    """Worked example of the bias (issue 20). Learners with a pessimistic prior (mean 0.6,
    strength 10) face a true survival chance of 0.9 with untold odds, r = 0.5; 30 subjects x
    20 trials, seed 0. The constant-odds model reads the early caution as risk aversion:
    r = 0.72 (se 0.02), its 95% interval excludes 0.5; the learning model gives r = 0.56
    (se 0.03), its interval covering 0.5. The truth is the simulation's parameter, not an
    outside value; the check is that the two models disagree in the stated direction."""
    frame = _simulated_learners(30, 20, 0)
    data = load(frame)
    constant = stopwise.fit("crra+myopic+logit", data).params.loc["r"]
    learning_fit = stopwise.fit("crra+learn+myopic+logit", data)
    learning = learning_fit.params.loc["r"]
    assert constant.ci_low > LEARNER["r"]  # biased upwards
    assert learning.ci_low < LEARNER["r"] < learning.ci_high
    assert abs(learning.estimate - LEARNER["r"]) < abs(constant.estimate - LEARNER["r"]) / 2
    assert learning_fit.converged
    assert not any("cannot be told apart" in w for w in learning_fit.warnings)


def test_two_untold_trials_per_subject_cannot_separate_prior_and_risk_attitude():
    # with 2 trials per subject the early caution is hardly followed by learning: the fit
    # says so (seed 0 gives a correlation of +0.94 between prior_mean and r)
    fit = stopwise.fit("crra+learn+myopic+logit", load(_simulated_learners(30, 2, 0)))
    warned = [w for w in fit.warnings if "cannot be told apart" in w]
    assert warned and warned[0].startswith("prior_mean and r cannot be told apart")


def test_no_untold_trial_warns_that_the_prior_is_not_identified():
    frame, _ = _untold_frame()
    model = build_model("crra+learn+myopic+logit")
    with pytest.warns(UserWarning, match="not identified"):
        model.options["prepare"](to_stopping_data(frame.assign(odds_known=1)))


def test_confounded_prior_and_risk_attitude_are_reported():
    names = ["r", "precision", "prior_mean", "prior_strength"]
    cov = np.eye(4)
    cov[0, 3] = cov[3, 0] = 0.95
    fit = SimpleNamespace(table=SimpleNamespace(names=names), cov_z=cov)
    warned = learning_warnings(fit)
    assert len(warned) == 1 and warned[0].startswith("prior_strength and r cannot be told apart")
    cov[0, 3] = cov[3, 0] = 0.5
    assert learning_warnings(fit) == []


def test_learning_about_a_pool_is_refused_by_name():
    data = SimpleNamespace(
        cond_odds_known=np.array([0.0, 1.0]), cond_pool_size=np.array([20.0, 0.0])
    )
    with pytest.raises(StopwiseInputError, match="learning about a pool's composition"):
        check_learning_data("crra+learn+myopic+logit", data)
    told_pool = SimpleNamespace(
        cond_odds_known=np.array([1.0, 0.0]), cond_pool_size=np.array([20.0, 0.0])
    )
    assert check_learning_data("crra+learn+myopic+logit", told_pool) == []
