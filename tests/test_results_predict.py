"""Fit.predict for fits with covariate formulas, on the fitted rows and on new rows."""

from __future__ import annotations

import jax
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from designs import holt_laury_columns

import stopwise  # enables float64 before jax is used
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.estimation.ml.response import stop_step_table
from stopwise.models.spec import build_model

LOGIT = "linear+myopic+logit"
LEVELS = ("base", "bonus", "fine")


def simulated_frame(subjects: int, trials: int, seed: int, precision: float) -> pd.DataFrame:
    """Invented decisions with a three-level treatment and an age-like number per subject."""
    design = stopping_design(subjects, trials, (0.6, 0.75, 0.9), 1.0, seed)
    frame = build_model(LOGIT).simulate({"precision": precision}, design, jax.random.PRNGKey(seed))
    code = frame["subject"].str[1:].astype(int)
    frame["treatment"] = np.array(LEVELS)[code % 3]
    frame["age"] = 20.0 + (code % 5)
    return frame


def ev_difference(data) -> np.ndarray:
    """p (b + g) - b: expected gain of one more draw with linear utility, nothing kept."""
    p, g, b = np.asarray(data.p_survive), np.asarray(data.gain), np.asarray(data.bank)
    return p * (b + g) - b


def treatment_slopes(frame: pd.DataFrame, x: np.ndarray) -> np.ndarray:
    """Columns x * 1[treatment = level]: a Logit without constant with one slope per level."""
    return np.column_stack([x * (frame["treatment"].to_numpy() == lv) for lv in LEVELS])


@pytest.fixture(scope="module")
def fitted():
    model = build_model(LOGIT)
    frame = simulated_frame(45, 30, 3, 0.7)
    data = to_stopping_data(frame)
    fit = fit_mle(
        model,
        data,
        formulas=["precision ~ 1 + C(treatment) + center(age)"],
        covariate_frame=frame,
        se="hessian",
    )
    assert fit.converged
    return model, frame, data, fit


def test_prediction_on_the_fitted_frame_equals_the_in_sample_one(fitted) -> None:
    _, frame, _, fit = fitted
    inside = fit.predict()
    again = fit.predict(frame)
    assert set(inside) == set(again) == {"rows", "stop_steps", "profiles"}
    for key in inside:
        pd.testing.assert_frame_equal(inside[key], again[key], check_dtype=False, rtol=1e-10)
    profiles = inside["profiles"]
    assert len(profiles) == 15 and profiles["n_rows"].sum() == len(frame)
    assert list(profiles.columns) == ["profile", "treatment", "age", "n_rows", "precision"]
    steps = inside["stop_steps"]
    # Each trial ends exactly once, by a stop or a bust (probability bookkeeping, common
    # practice, no source); the table ends at the horizon, so the sums are just below 1.
    ends = steps.groupby(["profile", "cond"])[["p_stop_here", "p_bust_here"]].sum().sum(axis=1)
    assert (ends <= 1 + 1e-12).all() and (ends > 0.99).all()


def test_new_rows_equal_statsmodels_logit_predict() -> None:
    # statsmodels Logit.predict, reference library: with precision ~ 1 + C(treatment) the
    # model is a Logit of the action on x * 1[treatment = level] without a constant (x the
    # expected-value difference), one slope per level; the fit's slopes are
    # exp(b0 + b_level), and predicted probabilities on new rows are Logit.predict(exog_new).
    model = build_model(LOGIT)
    frame = simulated_frame(45, 30, 5, 0.8)
    data = to_stopping_data(frame)
    fit = fit_mle(
        model, data, formulas=["precision ~ 1 + C(treatment)"], covariate_frame=frame, se=None
    )
    ref = sm.Logit(np.asarray(data.draw), treatment_slopes(frame, ev_difference(data))).fit(
        disp=0, tol=1e-12
    )
    new = simulated_frame(12, 10, 11, 1.5)
    new = new[new["treatment"] != "base"].reset_index(drop=True)  # two of the three levels
    new_data = to_stopping_data(new)
    out = fit.predict(new)
    expected = ref.predict(treatment_slopes(new, ev_difference(new_data)))
    np.testing.assert_allclose(out["rows"]["p_draw"], expected, rtol=1e-5)
    assert sorted(out["profiles"]["treatment"]) == ["bonus", "fine"]
    slopes = dict(zip(LEVELS, ref.params))
    for _, row in out["profiles"].iterrows():
        assert row["precision"] == pytest.approx(slopes[row["treatment"]], rel=1e-5)


def test_one_profile_equals_the_pooled_model_at_its_theta(fitted) -> None:
    model, frame, _, fit = fitted
    new = simulated_frame(6, 8, 21, 0.5)
    new["treatment"], new["age"] = "bonus", 23.0  # one profile; its mean age is not the fit's
    out = fit.predict(new)
    est = fit.params["estimate"]
    # theta from the fit's coefficients with the fit's centring: log precision =
    # b0 + b_bonus + b_age (23 - mean age of the fitted rows).
    theta = {
        "precision": float(
            np.exp(
                np.log(est["precision"])
                + est["precision:C(treatment)[T.bonus]"]
                + est["precision:center(age)"] * (23.0 - frame["age"].mean())
            )
        )
    }
    assert len(out["profiles"]) == 1
    assert out["profiles"]["precision"].iloc[0] == pytest.approx(theta["precision"], rel=1e-12)
    new_data = to_stopping_data(new)
    pooled_rows = np.asarray(model.predict(theta, new_data))
    np.testing.assert_allclose(out["rows"]["p_draw"], pooled_rows, rtol=1e-12)
    pooled_steps = stop_step_table(model, theta, new_data)
    steps = out["stop_steps"].drop(columns="profile")
    pd.testing.assert_frame_equal(steps, pooled_steps, check_dtype=False, rtol=1e-12)
    # logistic choice rule (common practice, no source): P(draw) = 1 / (1 + exp(-prec x)).
    np.testing.assert_allclose(
        pooled_rows, 1 / (1 + np.exp(-theta["precision"] * ev_difference(new_data))), rtol=1e-10
    )


def test_unknown_level_missing_column_and_missing_value_are_clear(fitted) -> None:
    _, _, _, fit = fitted
    new = simulated_frame(6, 5, 22, 0.5)
    unseen = new.assign(treatment="penalty")
    with pytest.raises(StopwiseInputError, match="'treatment' has the level 'penalty'") as err:
        fit.predict(unseen)
    assert "'base', 'bonus', 'fine'" in str(err.value)
    with pytest.raises(StopwiseInputError, match="reads the column 'age', which the new data"):
        fit.predict(new.drop(columns="age"))
    holes = new.copy()
    holes.loc[3, "age"] = np.nan
    with pytest.raises(StopwiseInputError, match="'age' has 1 missing value"):
        fit.predict(to_stopping_data(holes), covariates=holes)
    with pytest.raises(StopwiseInputError, match="covariate table has 2 rows"):
        fit.predict(to_stopping_data(new), covariates=new.head(2))


def test_bundle_with_covariate_frame_and_pooled_fit_on_a_frame(fitted, decision_frame) -> None:
    model, _, _, fit = fitted
    new = simulated_frame(6, 5, 23, 0.5)
    from_bundle = fit.predict(to_stopping_data(new), covariates=new)
    from_frame = fit.predict(new)
    pd.testing.assert_frame_equal(from_bundle["rows"], from_frame["rows"])
    pooled = fit_mle(model, to_stopping_data(new), se=None)
    a, b = pooled.predict(new), pooled.predict(to_stopping_data(new))
    pd.testing.assert_frame_equal(a["stop_steps"], b["stop_steps"])
    assert "profiles" not in a
    # a solo model's fit refuses contest decisions, as the fit itself leaves them out
    for some_fit in (pooled, fit):
        with pytest.raises(StopwiseInputError, match=r"hold 3 contest decisions \(first at row 3"):
            some_fit.predict(decision_frame)


def lottery_frame(subjects: int, seed: int) -> pd.DataFrame:
    """Invented choices on a ten-row list with a two-level group column (the list's payoffs
    are those of Holt & Laury 2002, Table 1, from memory; a design only, not a check)."""
    chance = np.tile(np.arange(1, 11) / 10, subjects)
    design = pd.DataFrame(
        {
            "subject": np.repeat([f"p{i:03d}" for i in range(subjects)], 10),
            "item": np.tile(np.arange(10), subjects),
            **holt_laury_columns(chance),
        }
    )
    frame = stopwise.simulate("crra+logit", {"r": 0.5, "precision": 8.0}, design, seed=seed)
    frame["group"] = np.where(np.arange(len(frame)) // 10 % 2 == 0, "x", "y")
    return frame


def test_lottery_formula_fit_predicts_per_profile() -> None:
    frame = lottery_frame(40, 2)
    model = build_model("crra+logit")
    data = stopwise.load(frame)
    fit = fit_mle(
        model, data.arrays(), formulas=["r ~ 1 + group"], covariate_frame=data.frame, se=None
    )
    inside, again = fit.predict(), fit.predict(frame)
    assert set(inside) == {"rows", "profiles"}
    for key in inside:
        pd.testing.assert_frame_equal(inside[key], again[key], check_dtype=False, rtol=1e-10)
    new = lottery_frame(3, 7).assign(group="y")
    out = fit.predict(new)
    est, spec = fit.params["estimate"], model.spec("r")
    r_y = float(spec.to_natural(spec.to_unconstrained(est["r"]) + est["r:group[T.y]"]))
    theta = {"r": r_y, "precision": float(est["precision"])}
    assert out["profiles"]["r"].tolist() == pytest.approx([r_y], rel=1e-12)
    expected = np.asarray(model.predict(theta, stopwise.load(new).arrays()))
    np.testing.assert_allclose(out["rows"]["p_choose_b"], expected, rtol=1e-12)
