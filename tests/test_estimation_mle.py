"""Maximum likelihood engine: outside checks against statsmodels, standard errors, failures."""

from __future__ import annotations

import json

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import statsmodels.api as sm
from contract import DESIGN_KEYS
from scipy import stats

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.base import Model, ParamSpec
from stopwise.models.spec import build_model


def simulated(
    spec: str, theta: dict[str, float], subjects: int = 60, trials: int = 40, seed: int = 1
):
    model = build_model(spec)
    design = stopping_design(subjects, trials, (0.6, 0.75, 0.9), 1.0, seed)
    frame = model.simulate(theta, design, jax.random.PRNGKey(seed))
    return model, frame, to_stopping_data(frame)


def ev_difference(data) -> np.ndarray:
    """Expected bank after one more draw minus the bank now (linear utility, nothing kept on
    a bust): p (b + g) - b."""
    p, g, b = np.asarray(data.p_survive), np.asarray(data.gain), np.asarray(data.bank)
    return p * (b + g) - b


@pytest.fixture(scope="module")
def logit_case():
    return simulated("linear+myopic+logit", {"precision": 0.7})


@pytest.fixture(scope="module")
def probit_case():
    return simulated("linear+myopic+probit", {"sigma": 1.3}, seed=2)


def test_logit_matches_statsmodels(logit_case) -> None:
    # statsmodels Logit/Probit, reference library: Logit of the action on the EV difference
    # without a constant is the same likelihood as linear+myopic+logit (precision = slope).
    model, _, data = logit_case
    x = ev_difference(data)[:, None]
    y = np.asarray(data.draw)
    ref = sm.Logit(y, x).fit(disp=0, tol=1e-12)
    ref_cl = sm.Logit(y, x).fit(
        disp=0, tol=1e-12, cov_type="cluster", cov_kwds={"groups": np.asarray(data.subject)}
    )
    fit_h = fit_mle(model, data, se="hessian")
    fit_r = fit_mle(model, data, se="robust")
    assert fit_h.converged and fit_r.converged
    rel = dict(rtol=1e-5)
    np.testing.assert_allclose(fit_h.params.loc["precision", "estimate"], ref.params[0], **rel)
    np.testing.assert_allclose(fit_h.params.loc["precision", "se"], ref.bse[0], **rel)
    np.testing.assert_allclose(fit_r.params.loc["precision", "se"], ref_cl.bse[0], **rel)
    np.testing.assert_allclose(fit_h.loglik, ref.llf, **rel)
    assert fit_r.clusters == data.n_subjects


def test_probit_matches_statsmodels(probit_case) -> None:
    # statsmodels Logit/Probit, reference library: P(draw) = Phi(diff / sigma), so the Probit
    # slope is b = 1/sigma; sigma's SE follows by the delta method, se(b) / b^2.
    model, _, data = probit_case
    x = ev_difference(data)[:, None]
    y = np.asarray(data.draw)
    ref = sm.Probit(y, x).fit(disp=0, tol=1e-12)
    ref_cl = sm.Probit(y, x).fit(
        disp=0, tol=1e-12, cov_type="cluster", cov_kwds={"groups": np.asarray(data.subject)}
    )
    b = ref.params[0]
    fit_h = fit_mle(model, data, se="hessian")
    fit_r = fit_mle(model, data, se="robust")
    np.testing.assert_allclose(fit_h.params.loc["sigma", "estimate"], 1.0 / b, rtol=1e-5)
    np.testing.assert_allclose(fit_h.params.loc["sigma", "se"], ref.bse[0] / b**2, rtol=1e-5)
    np.testing.assert_allclose(fit_r.params.loc["sigma", "se"], ref_cl.bse[0] / b**2, rtol=1e-5)
    np.testing.assert_allclose(fit_h.loglik, ref.llf, rtol=1e-5)


def test_intervals_and_information_criteria(logit_case) -> None:
    model, _, data = logit_case
    fit = fit_mle(model, data, se="hessian")
    row = fit.params.loc["precision"]
    z = stats.norm.ppf(0.975)
    # A log-scale Wald interval: exp(log est +- z se/est) (delta method), common practice,
    # no source.
    np.testing.assert_allclose(row.ci_low, row.estimate * np.exp(-z * row.se / row.estimate))
    np.testing.assert_allclose(row.ci_high, row.estimate * np.exp(z * row.se / row.estimate))
    # AIC = 2k - 2 lnL (Akaike 1974), BIC = k ln n - 2 lnL (Schwarz 1978); from memory.
    assert fit.aic == pytest.approx(2 - 2 * fit.loglik)
    assert fit.bic == pytest.approx(np.log(data.n_obs) - 2 * fit.loglik)


def test_json_has_exactly_the_design_keys(logit_case) -> None:
    model, _, data = logit_case
    out = json.loads(fit_mle(model, data).to_json())
    assert DESIGN_KEYS <= set(out)
    assert out["model"] == "linear+myopic+logit" and out["method"] == "mle"
    assert out["se_method"] == "robust" and out["n_subjects"] == 60
    assert set(out["params"][0]) == {"name", "estimate", "se", "ci_low", "ci_high"}
    assert {"numpy", "jax", "scipy"} <= set(out["versions"])
    summary = fit_mle(model, data).summary()
    assert "precision" in summary and "Clusters: 60" in summary and "AIC" in summary


def test_same_seed_same_bootstrap(logit_case) -> None:
    model, _, data = logit_case
    a = fit_mle(model, data, se="bootstrap", bootstrap_reps=24, seed=5, progress=False)
    b = fit_mle(model, data, se="bootstrap", bootstrap_reps=24, seed=5, progress=False)
    c = fit_mle(model, data, se="bootstrap", bootstrap_reps=24, seed=6, progress=False)
    assert a.to_dict()["params"] == b.to_dict()["params"]
    assert a.params.loc["precision", "se"] != c.params.loc["precision", "se"]
    assert a.se_method == "bootstrap"


def test_bootstrap_se_close_to_sandwich() -> None:
    # Large simulated data: the subject bootstrap and the clustered sandwich estimate the same
    # sampling variance (Cameron & Miller 2015; from memory), so they agree within 15%.
    model, _, data = simulated(
        "linear+myopic+logit", {"precision": 0.7}, subjects=200, trials=40, seed=3
    )
    robust = fit_mle(model, data, se="robust")
    boot = fit_mle(model, data, se="bootstrap", bootstrap_reps=300, seed=1, progress=False)
    ratio = boot.params.loc["precision", "se"] / robust.params.loc["precision", "se"]
    assert 0.85 < ratio < 1.15


def test_non_convergence_is_reported(logit_case) -> None:
    model, _, data = logit_case
    fit = fit_mle(model, data, max_iter=1, starts=[{"precision": 20.0}])
    assert not fit.converged
    assert any("did not converge" in w for w in fit.warnings)
    assert "Converged: NO" in fit.summary()


def _loglik_with_idle(theta, data):
    """P(draw) = sigmoid(precision * (p (b + g) - b)); ``idle`` does not enter (unidentified)."""
    x = theta["precision"] * (data.p_survive * (data.bank + data.gain) - data.bank)
    x = x + 0.0 * theta["idle"]
    return jnp.where(data.draw > 0, jax.nn.log_sigmoid(x), jax.nn.log_sigmoid(-x))


def test_unidentified_parameter_gives_nan_se_and_warning(logit_case) -> None:
    _, _, data = logit_case
    model = Model(
        name="idle-logit",
        data_kind="stopping",
        loglik_obs=_loglik_with_idle,
        simulate=lambda t, d, k: None,
        params=(ParamSpec("precision", 0.0, np.inf, 1.0), ParamSpec("idle", start=0.0)),
    )
    fit = fit_mle(model, data, se="robust")
    assert np.isnan(fit.params["se"]).all()
    assert any("not positive definite" in w for w in fit.warnings)
    assert all(p["se"] is None for p in json.loads(fit.to_json())["params"])


def test_estimate_at_bound_is_flagged(logit_case) -> None:
    model, frame, _ = logit_case
    # Everyone stops at once although drawing has a positive expected value: precision -> 0.
    first = frame[frame["step"] == 0].copy()
    first["action"] = "stop"
    first["outcome"] = None
    fit = fit_mle(model, to_stopping_data(first), se="hessian")
    assert "precision" in fit.at_bound
    assert fit.params.loc["precision", "at_bound"]
    assert any("bound" in w for w in fit.warnings)


def test_unknown_formula_column_lists_known_ones(logit_case) -> None:
    model, frame, data = logit_case
    with pytest.raises(StopwiseInputError, match=r"known covariate columns: .*gain"):
        fit_mle(model, data, formulas=["precision ~ 1 + nonexistent"], covariate_frame=frame)
    with pytest.raises(StopwiseInputError, match="not a parameter"):
        fit_mle(model, data, formulas=["r ~ 1 + gain"], covariate_frame=frame)


def test_covariate_effect_matches_statsmodels(logit_case) -> None:
    # statsmodels Logit/Probit, reference library: with precision = exp(b0 + b1 * hi) the
    # model is a Logit of the action on x and x * hi (no constant): slopes exp(b0), exp(b0+b1).
    model, frame, data = logit_case
    frame = frame.copy()
    frame["hi"] = (frame["subject"].str[1:].astype(int) % 2).astype(float)
    fit = fit_mle(model, data, formulas=["precision ~ 1 + hi"], covariate_frame=frame, se="hessian")
    x = ev_difference(data)
    hi = frame["hi"].to_numpy()
    ref = sm.Logit(np.asarray(data.draw), np.column_stack([x * (1 - hi), x * hi])).fit(
        disp=0, tol=1e-12
    )
    est = fit.params["estimate"]
    np.testing.assert_allclose(est["precision"], ref.params[0], rtol=1e-5)
    np.testing.assert_allclose(
        np.exp(np.log(est["precision"]) + est["precision:hi"]), ref.params[1], rtol=1e-5
    )
    np.testing.assert_allclose(fit.loglik, ref.llf, rtol=1e-8)
    assert fit.params.loc["precision:hi", "scale"].startswith("unconstrained")


def test_predict_probabilities_and_stop_steps(logit_case) -> None:
    model, _, data = logit_case
    fit = fit_mle(model, data, se=None)
    out = fit.predict()
    prec = fit.params.loc["precision", "estimate"]
    # logistic choice rule (common practice, no source): P(draw) = 1 / (1 + exp(-prec x)).
    np.testing.assert_allclose(
        out["rows"]["p_draw"], 1 / (1 + np.exp(-prec * ev_difference(data))), rtol=1e-10
    )
    steps = out["stop_steps"]
    total = steps.groupby("cond")[["p_stop_here", "p_bust_here"]].sum().sum(axis=1)
    assert (total <= 1 + 1e-12).all() and (total > 0.99).all()
