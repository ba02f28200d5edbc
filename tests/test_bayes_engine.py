"""Bayesian engine: conjugate posterior, exact leave-one-out, result contract, warnings, errors."""

from __future__ import annotations

import json
import os

import jax.numpy as jnp
import numpy as np
import pytest
from contract import DESIGN_KEYS
from scipy import special, stats

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.arrays import StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.fit import compare_bayes, fit_bayes
from stopwise.estimation.bayes.priors import parse_prior, resolve_priors
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.models.base import Model, ParamSpec

PRIOR_A, PRIOR_B = 2.0, 3.0


def bernoulli_bundle(draw: np.ndarray, subject: np.ndarray) -> StoppingData:
    """One decision per trial (step 0), so each row is its own trial."""
    n = len(draw)
    one = np.ones(1)
    return StoppingData(
        subject=np.asarray(subject, np.int32),
        trial=np.arange(n, dtype=np.int32),
        step=np.zeros(n, np.int32),
        draw=np.asarray(draw, float),
        bust=np.zeros(n),
        cond=np.zeros(n, np.int32),
        group=np.full(n, -1, np.int32),
        cond_p_survive=0.9 * one,
        cond_gain=one,
        cond_start=0 * one,
        cond_bust_keep=0 * one,
        cond_contest=0 * one,
        cond_n_players=one,
        cond_prize=0 * one,
        cond_keep_bank=one,
        horizon=1,
    )


def constant_draw_loglik(theta, data):
    """log P(action) with a constant draw probability p: y log p + (1 - y) log(1 - p)."""
    p = theta["p"]
    return data.draw * jnp.log(p) + (1.0 - data.draw) * jnp.log1p(-p)


def constant_draw_predict(theta, data):
    return jnp.full(data.draw.shape, theta["p"])


CONSTANT = Model(
    "constant-draw",
    (ParamSpec("p", 0.0, 1.0, 0.5),),
    constant_draw_loglik,
    lambda *a: None,
    "stopping",
    predict=constant_draw_predict,
)
NEAR_HALF = Model(
    "near-fair-coin",
    (ParamSpec("p", 0.45, 0.55, 0.5),),
    constant_draw_loglik,
    lambda *a: None,
    "stopping",
)


@pytest.fixture(scope="module")
def bernoulli_data():
    rng = np.random.default_rng(11)
    draw = (rng.random(60) < 0.3).astype(float)
    return bernoulli_bundle(draw, rng.integers(0, 6, 60))


@pytest.fixture(scope="module")
def conjugate_fit(bernoulli_data):
    return fit_bayes(
        CONSTANT,
        bernoulli_data,
        priors={"p": f"beta({PRIOR_A}, {PRIOR_B})"},
        chains=4,
        draws=1000,
        warmup=500,
        seed=3,
        progress=False,
        loo="trial",  # one row per trial: the exact leave-one-row-out check below
        point_fits=ML_POINT_FITS,
    )


def test_conjugate_beta_bernoulli_posterior(conjugate_fit, bernoulli_data):
    # Beta-Bernoulli conjugacy: p | y ~ Beta(a + k, b + n - k) (Gelman et al. 2013, BDA3,
    # ch. 2.4; common practice).
    y = np.asarray(bernoulli_data.draw)
    a, b = PRIOR_A + y.sum(), PRIOR_B + len(y) - y.sum()
    mean = a / (a + b)
    var = a * b / ((a + b) ** 2 * (a + b + 1))
    draws = conjugate_fit.draws("p")
    ess = float(conjugate_fit.params.loc["p", "ess_bulk"])
    assert ess > 400
    # Monte-Carlo error of a mean: sd / sqrt(ESS); of a variance: ~ var * sqrt(2 / ESS)
    assert abs(draws.mean() - mean) < 4 * np.sqrt(var / ess)
    assert abs(draws.var() - var) < 4 * var * np.sqrt(2.0 / ess)
    assert conjugate_fit.params.loc["p", "estimate"] == pytest.approx(draws.mean())
    # the 95% HDI holds about 95% of the exact posterior mass
    lo, hi = conjugate_fit.params.loc["p", ["ci_low", "ci_high"]]
    assert stats.beta(a, b).cdf(hi) - stats.beta(a, b).cdf(lo) == pytest.approx(0.95, abs=0.02)


def test_loo_matches_exact_leave_one_out(conjugate_fit, bernoulli_data):
    # Exact leave-one-out predictive of the Beta-Bernoulli model (Gelman et al. 2013, BDA3,
    # ch. 2.4 posterior predictive): P(y_i = 1 | y_-i) = (a + k_-i) / (a + b + n - 1).
    y = np.asarray(bernoulli_data.draw)
    k, n = y.sum(), len(y)
    p_one = (PRIOR_A + k - y) / (PRIOR_A + PRIOR_B + n - 1)
    exact = float(np.sum(np.where(y == 1, np.log(p_one), np.log1p(-p_one))))
    loo = conjugate_fit.loo()
    assert float(loo.elpd_loo) == pytest.approx(exact, abs=0.1)
    assert np.all(np.asarray(loo.pareto_k) < 0.7)


def test_pointwise_loglik_agrees_with_direct_sum(conjugate_fit, bernoulli_data):
    ll = np.asarray(conjugate_fit.idata.log_likelihood["obs"].values)  # chains, draws, units
    p = np.asarray(conjugate_fit.idata.posterior["p"].values)
    y = np.asarray(bernoulli_data.draw)
    direct = y.sum() * np.log(p) + (len(y) - y.sum()) * np.log1p(-p)
    np.testing.assert_allclose(ll.sum(axis=-1), direct, rtol=1e-10)
    # log pointwise predictive density and p_loo from the same draws, computed directly
    # (Vehtari, Gelman & Gabry 2017, eq. 3): lppd = sum_i log mean_s p(y_i | theta_s)
    flat = ll.reshape(-1, ll.shape[-1])
    lppd = float(np.sum(special.logsumexp(flat, axis=0) - np.log(flat.shape[0])))
    loo = conjugate_fit.loo()
    assert float(loo.p_loo) == pytest.approx(lppd - float(loo.elpd_loo), rel=1e-6)
    assert 0.5 < float(loo.p_loo) < 2.0  # one free parameter


def test_result_contract_json_and_summary(conjugate_fit):
    d = json.loads(conjugate_fit.to_json())
    assert DESIGN_KEYS <= set(d)
    assert d["method"] == "bayes" and d["se_method"] == "posterior" and d["aic"] is None
    row = d["params"][0]
    assert set(row) == {"name", "estimate", "se", "ci_low", "ci_high"}
    assert row["ci_low"] < row["estimate"] < row["ci_high"]
    assert {"divergences", "max_rhat", "min_ess_bulk", "ebfmi", "loo"} <= set(d["diagnostics"])
    assert d["priors"]["p"].startswith("beta(2.0, 3.0)")
    text = conjugate_fit.summary()
    assert "beta(2.0, 3.0)" in text and "r_hat" in text and "divergences" in text
    assert d["converged"] is (not d["warnings"] or not any("R-hat" in w for w in d["warnings"]))


def test_predict_rows(conjugate_fit, bernoulli_data):
    pred = conjugate_fit.predict(n_draws=100)
    assert len(pred) == bernoulli_data.n_obs
    np.testing.assert_allclose(
        pred["p_draw"],
        conjugate_fit.draws("p")[np.unique(np.linspace(0, 3999, 100).round().astype(int))].mean(),
        rtol=1e-12,
    )


@pytest.mark.slow
def test_same_seed_same_draws(bernoulli_data):
    a = fit_bayes(
        CONSTANT,
        bernoulli_data,
        chains=2,
        draws=50,
        warmup=50,
        seed=5,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    b = fit_bayes(
        CONSTANT,
        bernoulli_data,
        chains=2,
        draws=50,
        warmup=50,
        seed=5,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    np.testing.assert_array_equal(a.draws("p"), b.draws("p"))


@pytest.mark.slow
def test_hierarchical_short_run_warns_and_reports_subjects(bernoulli_data):
    post = fit_bayes(
        CONSTANT,
        bernoulli_data,
        hierarchical=True,
        chains=2,
        draws=60,
        warmup=60,
        seed=1,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    # every hierarchical row says what it is; the bare name belongs to pooled fits only
    assert set(post.params.index) == {
        "p: population median",
        "p: population mean",
        "p: between-subject sd",
        "p: between-subject sd (unconstrained scale)",
    }
    assert post.params.loc["p: between-subject sd (unconstrained scale)", "scale"] == (
        "unconstrained"
    )
    assert post.params.loc["p: population mean", "scale"] == "natural"
    json_names = {row["name"] for row in json.loads(post.to_json())["params"]}
    assert json_names == set(post.params.index)
    assert "p: population median" in post.summary()
    assert len(post.subject_params) == bernoulli_data.n_subjects
    # 120 draws cannot give a bulk ESS of 400: the warning names a quantity and a remedy
    ess_warnings = [w for w in post.warnings if "ESS below 400" in w]
    assert ess_warnings and "increase draws" in ess_warnings[0]
    assert post.converged is False
    assert "between-subject sd (unconstrained scale)" in post.summary()


@pytest.mark.slow
def test_compare_ranks_by_elpd(conjugate_fit, bernoulli_data):
    # 30% draws: a free p fits better than p near 1/2
    coin = fit_bayes(
        NEAR_HALF,
        bernoulli_data,
        chains=2,
        draws=200,
        warmup=100,
        progress=False,
        loo="trial",
        point_fits=ML_POINT_FITS,
    )
    result = compare_bayes([coin, conjugate_fit])
    assert result.table.index[0] == "constant-draw"
    assert result.table["elpd_diff"].iloc[1] > 0
    assert "PSIS-LOO" in str(result)
    assert result.to_dict()["models"][0]["model"] == "constant-draw"


def test_prior_parsing_and_errors():
    d = parse_prior("normal(0.5, 2)", "r")
    assert float(d.loc) == 0.5 and float(d.scale) == 2.0
    for bad in ("normal(0)", "exec(1,2)", "normal(a, b)", "beta(-1, 2)", "__import__('os')"):
        with pytest.raises(StopwiseInputError):
            parse_prior(bad, "r")
    with pytest.raises(StopwiseInputError, match="does not have"):
        resolve_priors(CONSTANT, {"r": "normal(0, 1)"})
    with pytest.raises(StopwiseInputError, match="zero density"):
        resolve_priors(CONSTANT, {"p": "uniform(0.6, 0.9)"})


def test_default_priors_documented_and_inside_bounds():
    from stopwise.models.spec import build_model

    priors = resolve_priors(build_model("crra+planner+logit"))
    assert priors["r"].text.startswith("Normal(0, 1)")
    assert priors["precision"].text.startswith("LogNormal")
    spec = build_model("crra+planner+logit").spec("r")
    import jax

    x = priors["r"].sample(spec, jax.random.PRNGKey(0), 500)
    assert len(x) == 500 and np.all((x > spec.lower) & (x < spec.upper))


def test_bad_options_are_input_errors(bernoulli_data):
    with pytest.raises(StopwiseInputError):
        fit_bayes(CONSTANT, bernoulli_data, chains=0, progress=False, point_fits=ML_POINT_FITS)
    with pytest.raises(StopwiseInputError, match="se"):
        fit_bayes(CONSTANT, bernoulli_data, se="robust", progress=False, point_fits=ML_POINT_FITS)
    with pytest.raises(StopwiseInputError, match="unknown option"):
        fit_bayes(CONSTANT, bernoulli_data, thin=3, progress=False, point_fits=ML_POINT_FITS)
    with pytest.raises(StopwiseInputError, match="outside"):
        fit_bayes(
            CONSTANT, bernoulli_data, init={"p": 1.5}, progress=False, point_fits=ML_POINT_FITS
        )
    with pytest.raises(StopwiseInputError, match="not a parameter"):
        fit_bayes(
            CONSTANT, bernoulli_data, formulas=["r ~ 1"], progress=False, point_fits=ML_POINT_FITS
        )


def test_every_sampler_problem_gives_a_named_warning():
    import pandas as pd

    from stopwise.estimation.bayes.diagnostics import sampler_warnings

    diag = pd.DataFrame(
        {"r_hat": [1.002, 1.05], "ess_bulk": [900.0, 150.0], "ess_tail": [800.0, 120.0]},
        index=["precision", "sd_z(r)"],
    )
    stats = {
        "diverging": np.array([[False, True, True]]),
        "reached_max_treedepth": np.array([[True, False, False]]),
    }
    out = sampler_warnings(diag, stats, np.array([0.9, 0.2]), max_tree_depth=10)
    text = "\n".join(out)
    assert len(out) == 6  # R-hat, bulk ESS, tail ESS, divergences, E-BFMI, tree depth
    assert "R-hat above 1.01 for sd_z(r) (1.05)" in text and "precision (" not in text
    assert "2 divergent transitions" in text and "target_accept" in text
    assert "E-BFMI 0.20 below 0.3 in chain 1" in text
    assert "maximum tree depth 10" in text
    assert (
        sampler_warnings(
            diag.iloc[:1],
            {"diverging": np.zeros((1, 3), bool), "reached_max_treedepth": np.zeros((1, 3), bool)},
            np.array([0.9]),
            10,
        )
        == []
    )


@pytest.mark.skipif(not os.path.exists("/proc/self/maps"), reason="needs Linux /proc")
@pytest.mark.slow
def test_repeated_fits_do_not_accumulate_compiled_programs(bernoulli_data):
    # Every MCMC run compiles a new sampler loop that JAX would keep for good; a fit releases
    # them when it ends, so the process's memory mappings stop growing (without the release:
    # about 840 more per small pooled fit, and a study died at Linux's default limit of
    # 65,530 mappings, vm.max_map_count; common practice, no source).
    def mappings() -> int:
        with open("/proc/self/maps") as f:
            return sum(1 for _ in f)

    counts = []
    for seed in range(3):
        fit_bayes(
            CONSTANT,
            bernoulli_data,
            chains=1,
            draws=20,
            warmup=20,
            seed=seed,
            progress=False,
            point_fits=ML_POINT_FITS,
        )
        counts.append(mappings())
    assert counts[2] - counts[0] < 200, counts
