"""Noise rules and the lottery-choice model against scipy and statsmodels."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest
import statsmodels.api as sm
from scipy import integrate, special, stats

import stopwise  # noqa: F401  (enables float64 in JAX)
from stopwise.data_schemas.arrays import LotteryData
from stopwise.models.noise import NOISE, log_choice_probs, log_p_choose
from stopwise.models.spec import build_model


def test_binary_rules_match_scipy():
    d = np.array([-40.0, -3.0, -0.2, 0.0, 0.5, 7.0, 40.0])
    lp, lq = log_p_choose(d, {"precision": 1.7}, "logit")
    np.testing.assert_allclose(lp, special.log_expit(1.7 * d), rtol=1e-12)  # scipy.special
    np.testing.assert_allclose(lq, special.log_expit(-1.7 * d), rtol=1e-12)
    lp, lq = log_p_choose(d, {"sigma": 0.8}, "probit")
    np.testing.assert_allclose(lp, stats.norm.logcdf(d / 0.8), rtol=1e-10)  # scipy.stats
    np.testing.assert_allclose(lq, stats.norm.logcdf(-d / 0.8), rtol=1e-10)
    lp, lq = log_p_choose(d, {"sigma": 0.8, "tremble": 0.1}, "probit+tremble")
    mixed = 0.9 * stats.norm.cdf(d / 0.8) + 0.05
    np.testing.assert_allclose(np.exp(lp), mixed, rtol=1e-12)
    np.testing.assert_allclose(np.exp(lp) + np.exp(lq), 1.0, rtol=1e-12)


def test_logit_derivatives_match_the_logistic_identities_also_at_zero():
    # d/dz log expit(z) = expit(-z) and d2/dz2 log expit(z) = -expit(z) expit(-z): identities
    # of the logistic function (common practice, no source); expit from scipy.special.
    z = np.array([-40.0, -3.0, -1e-9, 0.0, 1e-9, 0.5, 7.0, 40.0])
    for side, sign in ((0, 1.0), (1, -1.0)):

        def log_p(x, side=side):
            return log_p_choose(x, {"precision": 1.0}, "logit")[side]

        first = jax.vmap(jax.grad(log_p))(jnp.asarray(z))
        second = jax.vmap(jax.hessian(log_p))(jnp.asarray(z))
        np.testing.assert_allclose(first, sign * special.expit(-sign * z), rtol=1e-12, atol=1e-300)
        np.testing.assert_allclose(
            second, -special.expit(z) * special.expit(-z), rtol=1e-12, atol=1e-300
        )


def test_extreme_precision_and_differences_stay_finite():
    d = jnp.array([-1e100, -1e6, -1.0, 0.0, 1.0, 1e6, 1e100])
    for rule, theta in (
        ("logit", {"precision": 1e4}),
        ("probit", {"sigma": 1e-4}),
        ("tremble", {"precision": 1e4, "tremble": 1e-3}),
    ):
        lp, lq = log_p_choose(d, theta, rule)
        assert np.all(np.isfinite(lp)) and np.all(np.isfinite(lq))
        grads = jax.grad(lambda t, rule=rule: jnp.sum(log_p_choose(d * 0 + 0.3, t, rule)[0]))(theta)
        assert all(np.isfinite(float(g)) for g in grads.values())


def test_multi_option_logit_matches_scipy_log_softmax():
    v = np.array([[0.3, -1.2, 2.0, 0.0], [5.0, 5.0, -3.0, 1.0]])
    out = log_choice_probs(v, {"precision": 2.5}, "logit")
    np.testing.assert_allclose(out, special.log_softmax(2.5 * v, axis=-1), rtol=1e-12)
    out0 = log_choice_probs(v.T, {"precision": 2.5}, "logit", axis=0)
    np.testing.assert_allclose(out0, special.log_softmax(2.5 * v.T, axis=0), rtol=1e-12)


def _probit_by_quadrature(v: np.ndarray, sigma: float, j: int) -> float:
    """P(j) = int phi(e) prod_{k != j} Phi((v_j - v_k)/s + e) de, s = sigma / sqrt(2)."""
    s = sigma / np.sqrt(2.0)

    def integrand(e: float) -> float:
        others = [stats.norm.cdf((v[j] - v[k]) / s + e) for k in range(len(v)) if k != j]
        return stats.norm.pdf(e) * np.prod(others)

    return integrate.quad(integrand, -12, 12, epsabs=1e-13, epsrel=1e-11)[0]  # scipy.integrate


def test_multi_option_probit_matches_scipy_quadrature():
    v = np.array([0.4, -0.3, 1.1, 0.0, -2.0])
    sigma = 0.9
    out = np.exp(np.asarray(log_choice_probs(v, {"sigma": sigma}, "probit")))
    reference = [_probit_by_quadrature(v, sigma, j) for j in range(len(v))]
    np.testing.assert_allclose(out, reference, rtol=1e-6, atol=1e-12)  # 32 nodes
    assert out.sum() == pytest.approx(1.0, abs=1e-9)
    two = np.exp(np.asarray(log_choice_probs(np.array([0.7, 0.0]), {"sigma": 0.5}, "probit")))
    assert two[0] == pytest.approx(stats.norm.cdf(0.7 / 0.5), rel=1e-9)  # reduces to Fechner
    for gap in (5.0, 12.0, 25.0, 40.0):  # far-below options: log P against scipy's logcdf
        far = np.asarray(log_choice_probs(np.array([0.0, -gap]), {"sigma": 1.0}, "probit"))
        assert far[1] == pytest.approx(stats.norm.logcdf(-gap), rel=1e-7)
        assert far[0] <= 0.0


def test_mask_removes_options_and_tremble_spreads_over_the_rest():
    v = jnp.array([1.0, 0.2, -0.5, 3.0])
    mask = jnp.array([True, True, True, False])
    theta = {"precision": 1.3, "sigma": 0.7, "tremble": 0.2}
    for name in ("logit", "probit", "logit+tremble", "probit+tremble"):
        masked = np.exp(np.asarray(log_choice_probs(v, theta, name, mask=mask)))
        kept = np.exp(np.asarray(log_choice_probs(v[:3], theta, name)))
        np.testing.assert_allclose(masked[:3], kept, rtol=1e-8, atol=1e-14)
        assert masked[3] < 1e-300
        assert np.all(np.isfinite(np.asarray(log_choice_probs(v, theta, name, mask=mask))))
    tremble_only = np.exp(np.asarray(log_choice_probs(v[:3], theta, "logit+tremble")))
    base = special.softmax(1.3 * np.asarray(v[:3]))
    np.testing.assert_allclose(tremble_only, 0.8 * base + 0.2 / 3, rtol=1e-12)
    assert NOISE["tremble"].name == "logit+tremble"  # "tremble" alone is logit with a tremble


def _ev_lottery_data(rng: np.random.Generator, n: int) -> LotteryData:
    a_x = rng.uniform(0, 10, (n, 2))
    b_x = rng.uniform(0, 10, (n, 3))
    b_x = np.concatenate([b_x, np.zeros((n, 0))], axis=1)
    a_p = np.column_stack([q := rng.uniform(0.1, 0.9, n), 1 - q])
    raw = rng.uniform(0.1, 1, (n, 3))
    b_p = raw / raw.sum(axis=1, keepdims=True)
    a_x = np.column_stack([a_x, a_x[:, 0]])  # pad A to 3 outcomes with probability 0
    a_p = np.column_stack([a_p, np.zeros(n)])
    return LotteryData(np.zeros(n, np.int32), np.zeros(n), a_x, a_p, b_x, b_p)


def test_linear_logit_lottery_equals_statsmodels_logit():
    # statsmodels Logit on the expected-value difference (no constant) is the same model as
    # linear+logit: P(B) = 1 / (1 + exp(-beta (EV_B - EV_A))). Same log-likelihood at the same
    # coefficient within 1e-8 (statsmodels as the reference library).
    rng = np.random.default_rng(7)
    data = _ev_lottery_data(rng, 400)
    ev_diff = (data.b_x * data.b_p).sum(1) - (data.a_x * data.a_p).sum(1)
    choice = (rng.uniform(size=400) < special.expit(0.6 * ev_diff)).astype(float)
    data = LotteryData(data.subject, choice, data.a_x, data.a_p, data.b_x, data.b_p)
    result = sm.Logit(choice, ev_diff[:, None]).fit(disp=0, tol=1e-12)
    beta = float(result.params[0])
    model = build_model("linear+logit")
    ours = float(jnp.sum(model.loglik_obs({"precision": beta}, data)))
    assert ours == pytest.approx(result.llf, abs=1e-8)
    at_fixed = float(jnp.sum(model.loglik_obs({"precision": 0.37}, data)))
    assert at_fixed == pytest.approx(sm.Logit(choice, ev_diff[:, None]).loglike([0.37]), abs=1e-8)
    score = jax.grad(lambda t: jnp.sum(model.loglik_obs(t, data)))({"precision": beta})
    assert abs(float(score["precision"])) < 1e-5  # the statsmodels optimum is ours too


def test_contextual_lottery_divides_by_the_outcome_range():
    rng = np.random.default_rng(3)
    data = _ev_lottery_data(rng, 50)
    plain = build_model("linear+probit")
    context = build_model("linear+probit", contextual=True)
    span = np.maximum(data.a_x.max(1), data.b_x.max(1)) - np.minimum(
        data.a_x.min(1), data.b_x.min(1)
    )
    ev_diff = (data.b_x * data.b_p).sum(1) - (data.a_x * data.a_p).sum(1)
    # Wilcox (2011): P(B) = F((V_B - V_A) / (u_max - u_min) / sigma) with the context range.
    expected = stats.norm.cdf(ev_diff / span / 0.3)
    np.testing.assert_allclose(context.predict({"sigma": 0.3}, data), expected, rtol=1e-10)
    assert not np.allclose(plain.predict({"sigma": 0.3}, data), expected)
    assert context.spec("sigma").start == 0.2 and plain.spec("sigma").start == 1.0


@pytest.mark.parametrize("spec", ["pt+tk+logit", "crra+ge+probit+tremble", "expo+prelec2+logit"])
def test_lottery_gradients_match_central_differences(spec):
    rng = np.random.default_rng(11)
    data = _ev_lottery_data(rng, 60)
    choice = (rng.uniform(size=60) < 0.5).astype(float)
    data = LotteryData(data.subject, choice, data.a_x - 4.0, data.a_p, data.b_x - 4.0, data.b_p)
    model = build_model(spec, wealth=5.0)
    theta = {k: v * 1.1 if k != "tremble" else v for k, v in model.start_theta().items()}
    objective = jax.jit(jax.value_and_grad(lambda t: jnp.sum(model.loglik_obs(t, data))))
    total, grads = objective(theta)
    assert np.isfinite(float(total))
    for name, value in theta.items():
        h = 1e-5 * max(1.0, abs(value))
        up, down = dict(theta), dict(theta)
        up[name], down[name] = value + h, value - h
        central = (float(objective(up)[0]) - float(objective(down)[0])) / (2 * h)  # common practice
        assert float(grads[name]) == pytest.approx(central, rel=1e-5, abs=1e-6), (spec, name)
