"""Per-subject fits, mixtures, joint estimation, comparison, profile intervals, recovery."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats
from scipy.special import logsumexp

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.by_subject import fit_by_subject
from stopwise.estimation.ml.compare import compare_fits
from stopwise.estimation.ml.joint import fit_joint
from stopwise.estimation.ml.mixture import fit_mixture
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.recovery import recover, stopping_design
from stopwise.models.base import Model, ParamSpec
from stopwise.models.spec import build_model

LOGIT = "linear+myopic+logit"


def ev_difference(data) -> np.ndarray:
    """p (b + g) - b: expected gain of one more draw with linear utility, nothing kept."""
    p, g, b = np.asarray(data.p_survive), np.asarray(data.gain), np.asarray(data.bank)
    return p * (b + g) - b


def simulate_frame(
    precision: float, subjects: int, trials: int, seed: int, prefix: str = "s"
) -> pd.DataFrame:
    design = stopping_design(subjects, trials, (0.6, 0.75, 0.9), 1.0, seed)
    design["subject"] = prefix + design["subject"]
    return build_model(LOGIT).simulate({"precision": precision}, design, jax.random.PRNGKey(seed))


@pytest.fixture(scope="module")
def two_types() -> pd.DataFrame:
    return pd.concat(
        [simulate_frame(0.3, 30, 40, 1, "lo"), simulate_frame(3.0, 30, 40, 2, "hi")],
        ignore_index=True,
    )


def test_per_subject_fits_match_statsmodels_and_flag_idle_subjects(two_types) -> None:
    frame = two_types.copy()
    idle = frame[(frame["subject"] == "los001") & (frame["step"] == 0)].copy()
    idle["subject"], idle["action"], idle["outcome"] = "idle", "stop", None
    data = to_stopping_data(pd.concat([frame, idle], ignore_index=True))
    result = fit_by_subject(build_model(LOGIT), data)
    params = result.params.set_index("subject")
    x, y = ev_difference(data), np.asarray(data.draw)
    labels = np.asarray(data.subject_labels)[np.asarray(data.subject)]
    for subject in ("los003", "his007"):
        # statsmodels Logit/Probit, reference library: one subject's Logit without constant.
        rows = labels == subject
        ref = sm.Logit(y[rows], x[rows][:, None]).fit(disp=0, tol=1e-12)
        np.testing.assert_allclose(params.loc[subject, "estimate"], ref.params[0], rtol=1e-5)
        np.testing.assert_allclose(params.loc[subject, "se"], ref.bse[0], rtol=1e-4)
    assert "never draws" in result.flags["idle"]
    assert any("bound" in f for f in result.flags["idle"])
    out = result.to_dict()
    assert out["by"] == "subject" and len(out["fits"]) == 61
    assert {"subject", "model", "params", "loglik", "converged"} <= set(out["fits"][0])


def test_mixture_loglik_and_types(two_types) -> None:
    data = to_stopping_data(two_types)
    model = build_model(LOGIT)
    fit = fit_mixture(model, data, k=2, starts=4)
    est = fit.params["estimate"]
    assert est["type1:precision"] < 0.6 < 2.0 < est["type2:precision"]
    post = fit.extras["posterior"]
    assert (post.loc[post.index.str.startswith("lo"), "type1"] > 0.9).all()
    assert (post.loc[post.index.str.startswith("hi"), "type2"] > 0.9).all()
    # statsmodels Logit/Probit, reference library: the mixture log-likelihood recomputed from
    # statsmodels' per-row Logit log-likelihoods, ln L = sum_g logsumexp_k(ln pi_k + L_gk).
    x, y = ev_difference(data)[:, None], np.asarray(data.draw)
    rows = np.stack(
        [sm.Logit(y, x).loglikeobs(np.array([est[f"type{k}:precision"]])) for k in (1, 2)], axis=1
    )
    per_subject = np.stack(
        [np.bincount(np.asarray(data.subject), weights=rows[:, k]) for k in (0, 1)], axis=1
    )
    log_pi = np.log([est["share:type1"], est["share:type2"]])
    np.testing.assert_allclose(
        fit.loglik, logsumexp(per_subject + log_pi, axis=1).sum(), rtol=1e-10
    )
    assert est["share:type1"] + est["share:type2"] == pytest.approx(1.0)


def test_joint_fit_equals_statsmodels_on_stacked_data() -> None:
    a = to_stopping_data(simulate_frame(0.8, 20, 30, 3))
    b = to_stopping_data(simulate_frame(0.8, 20, 30, 4))
    model = build_model(LOGIT)
    fit = fit_joint([(model, a), (model, b)], se="robust")
    # statsmodels Logit/Probit, reference library: one Logit on the stacked rows, clustered
    # by subject label (the same labels in both data sets are the same people).
    x = np.concatenate([ev_difference(a), ev_difference(b)])[:, None]
    y = np.concatenate([np.asarray(a.draw), np.asarray(b.draw)])
    groups = pd.factorize(
        np.concatenate(
            [
                np.asarray(a.subject_labels)[np.asarray(a.subject)],
                np.asarray(b.subject_labels)[np.asarray(b.subject)],
            ]
        )
    )[0]
    ref = sm.Logit(y, x).fit(disp=0, tol=1e-12, cov_type="cluster", cov_kwds={"groups": groups})
    np.testing.assert_allclose(fit.params.loc["precision", "estimate"], ref.params[0], rtol=1e-5)
    np.testing.assert_allclose(fit.params.loc["precision", "se"], ref.bse[0], rtol=1e-5)
    assert fit.clusters == 20 and any("below about 30" in w for w in fit.warnings)


def _biased_loglik(theta, data):
    """P(draw) = sigmoid(bias + precision * (p (b + g) - b))."""
    x = theta["bias"] + theta["precision"] * (data.p_survive * (data.bank + data.gain) - data.bank)
    return jnp.where(data.draw > 0, jax.nn.log_sigmoid(x), jax.nn.log_sigmoid(-x))


def test_comparison_lr_test_and_aic_match_statsmodels() -> None:
    frame = simulate_frame(0.8, 30, 30, 5)
    data = to_stopping_data(frame)
    small = build_model(LOGIT)
    big = Model(
        name="bias+myopic+logit",
        data_kind="stopping",
        loglik_obs=_biased_loglik,
        simulate=lambda t, d, k: None,
        options={"policy": "myopic", "restrictions": {LOGIT: {"bias": 0.0}}},
        params=(ParamSpec("bias", start=0.0), ParamSpec("precision", 0.0, np.inf, 1.0)),
    )
    result = compare_fits([small, big], data, cv_folds=3)
    x, y = ev_difference(data), np.asarray(data.draw)
    ref_small = sm.Logit(y, x[:, None]).fit(disp=0, tol=1e-12)
    ref_big = sm.Logit(y, np.column_stack([np.ones_like(x), x])).fit(disp=0, tol=1e-12)
    # statsmodels Logit/Probit, reference library: AIC and the likelihood-ratio test.
    np.testing.assert_allclose(result.table.loc[LOGIT, "aic"], ref_small.aic, rtol=1e-6)
    np.testing.assert_allclose(result.table.loc["bias+myopic+logit", "aic"], ref_big.aic, rtol=1e-6)
    # LR = 2 (lnL_big - lnL_small) ~ chi2(1) (Wilks 1938; from memory) with statsmodels llf.
    lr, df = 2 * (ref_big.llf - ref_small.llf), 1
    p = stats.chi2.sf(lr, df)
    test = result.tests.iloc[0]
    assert test["test"] == "likelihood ratio" and test["df"] == df
    assert test["relation"] == "nested" and test["restriction"] == "bias = 0"
    np.testing.assert_allclose(test["statistic"], lr, rtol=1e-5)
    np.testing.assert_allclose(test["p_value"], p, rtol=1e-4)
    cv = result.table["cv_log_score_3fold"]
    assert (cv < 0).all() and (cv < result.table["loglik"]).all()
    assert "Pairwise tests" in result.summary()


def test_vuong_and_clarke_favour_the_generating_model() -> None:
    data = to_stopping_data(
        build_model("crra+planner+logit").simulate(
            {"r": 0.5, "precision": 3.0},
            stopping_design(40, 30, (0.6, 0.75, 0.9), 1.0, 6),
            jax.random.PRNGKey(6),
        )
    )
    result = compare_fits([build_model("crra+planner+logit"), build_model(LOGIT)], data, cv_folds=0)
    assert result.table.index[0] == "crra+planner+logit"
    tests = result.tests.set_index("test")
    assert tests.loc["Vuong (Schwarz-corrected)", "statistic"] > 1.96
    assert tests.loc["Vuong (Schwarz-corrected)", "favours"] == "crra+planner+logit"


def test_profile_interval_crosses_the_chi2_cutoff() -> None:
    data = to_stopping_data(simulate_frame(0.8, 30, 30, 7))
    fit = fit_mle(build_model(LOGIT), data, se="hessian")
    low, high = fit.profile("precision")
    x, y = ev_difference(data)[:, None], np.asarray(data.draw)
    logit = sm.Logit(y, x)
    # statsmodels Logit/Probit, reference library: the log-likelihood at each end is the
    # maximum minus chi2_1(0.95)/2 = 1.9207 (Venzon & Moolgavkar 1988; from memory).
    drop = stats.chi2.ppf(0.95, 1) / 2
    for end in (low, high):
        np.testing.assert_allclose(logit.loglike(np.array([end])), fit.loglik - drop, atol=1e-6)
    row = fit.params.loc["precision"]
    assert low < row.estimate < high


def test_recovery_reports_bias_coverage_and_selection() -> None:
    model = build_model(LOGIT)
    design = stopping_design(15, 20, (0.6, 0.75, 0.9), 1.0, 8)
    result = recover(
        model,
        {"precision": 0.8},
        design,
        lambda f, h=None: to_stopping_data(f, horizon=h),
        n_reps=6,
        seed=1,
        rivals=[build_model("linear+myopic+probit")],
        progress=False,
    )
    row = result.table.loc["precision"]
    assert row["replications"] == 6 and 0.0 <= row["coverage_95"] <= 1.0
    assert abs(row["bias"]) < 0.3 and row["rmse"] > 0
    assert 0.0 <= result.selection["rate"] <= 1.0
    assert "Parameter recovery" in result.summary()


def test_joint_lottery_and_stopping_share_parameters_by_name() -> None:
    from stopwise.data_schemas.bundle import to_lottery_data

    subjects = [f"s{s + 1:03d}" for s in range(25)]
    items = [
        {
            "item": i + 1,
            "a_x1": 2.0,
            "a_p1": 0.5,
            "a_x2": 1.6,
            "a_p2": 0.5,
            "b_x1": 3.85,
            "b_p1": 0.1 * (i + 1),
            "b_x2": 0.1,
            "b_p2": 1 - 0.1 * (i + 1),
        }
        for i in range(9)
    ]
    lottery_model = build_model("crra+logit")
    stopping_model = build_model("crra+myopic+logit")
    lottery = to_lottery_data(
        lottery_model.simulate(
            {"r": 0.4, "precision": 3.0},
            pd.DataFrame([{"subject": s, **it} for s in subjects for it in items]),
            jax.random.PRNGKey(9),
        )
    )
    design = stopping_design(25, 30, (0.6, 0.75, 0.9), 1.0, 9)
    stopping = to_stopping_data(
        stopping_model.simulate({"r": 0.4, "precision": 3.0}, design, jax.random.PRNGKey(10))
    )
    joint = fit_joint([(lottery_model, lottery), (stopping_model, stopping)], se="robust")
    assert joint.n_subjects == 25 and joint.clusters == 25  # the same people in both tasks
    assert joint.n_obs == lottery.n_obs + stopping.n_obs and joint.k == 2
    for name, truth in (("r", 0.4), ("precision", 3.0)):
        row = joint.params.loc[name]
        assert abs(row.estimate - truth) < 4 * row.se
    assert "shared across data sets: r, precision" in joint.notes
