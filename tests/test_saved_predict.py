"""Saved formula and per-subject fits predict what the live fits predict, certify
themselves on the fitted data, and refuse rows they hold no parameters for."""

from __future__ import annotations

import json

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model
from stopwise.saved import SavedFit, load_result

SPEC = "crra+myopic+logit"


@pytest.fixture(scope="module")
def solo_file(tmp_path_factory):
    design = stopping_design(10, 18, (0.6, 0.8), 1.0, 11)
    frame = build_model(SPEC).simulate({"r": 0.3, "precision": 1.5}, design, jax.random.PRNGKey(11))
    labels = sorted(frame["subject"].astype(str).unique())
    frame["treatment"] = frame["subject"].astype(str).map({s: i % 2 for i, s in enumerate(labels)})
    path = tmp_path_factory.mktemp("saved") / "solo.csv"
    frame.to_csv(path, index=False)
    return path


def saved_copy(result, path):
    path.write_text(json.dumps(result.to_dict()), encoding="utf-8")
    return load_result(path)


@pytest.fixture(scope="module")
def formula_fit(solo_file):
    return stopwise.fit(SPEC, solo_file, formulas=["r ~ 1 + treatment"])


@pytest.fixture(scope="module")
def subject_fit(solo_file):
    return stopwise.fit(SPEC, solo_file, by="subject")


def test_saved_formula_fit_predicts_what_the_live_fit_predicts(formula_fit, solo_file, tmp_path):
    live = formula_fit.predict(solo_file)
    loaded = saved_copy(formula_fit, tmp_path / "fit.json").predict(solo_file)
    np.testing.assert_allclose(loaded["rows"]["p_draw"], live["rows"]["p_draw"], rtol=1e-12)
    assert list(loaded["rows"]["profile"]) == list(live["rows"]["profile"])
    columns = ["profile", "cond", "p_draw", "p_reach", "p_stop_here", "p_bust_here"]
    np.testing.assert_allclose(
        loaded["stop_steps"][columns].to_numpy(float),
        live["stop_steps"][columns].to_numpy(float),
        rtol=1e-12,
        atol=1e-15,
    )
    # two treatment arms, two different r: the profiles really differ
    assert loaded["rows"].groupby("profile")["p_draw"].mean().nunique() == 2


def test_saved_formula_fit_refuses_an_unseen_covariate_value(formula_fit, solo_file, tmp_path):
    saved = saved_copy(formula_fit, tmp_path / "fit.json")
    frame = pd.read_csv(solo_file)
    frame.loc[frame.index[3], "treatment"] = 2
    with pytest.raises(StopwiseInputError, match=r"data row 4: treatment = 2"):
        saved.predict(frame)


def test_saved_formula_fit_refuses_a_profile_that_does_not_reproduce_the_fit(
    formula_fit, solo_file, tmp_path
):
    record = formula_fit.to_dict()
    record["profiles"][0]["estimate"] += 0.05
    path = tmp_path / "tampered.json"
    path.write_text(json.dumps(record), encoding="utf-8")
    with pytest.raises(StopwiseInputError, match="refusing to predict"):
        load_result(path).predict(solo_file)


def test_saved_per_subject_fit_predicts_each_subject_with_its_own_estimates(
    subject_fit, solo_file, tmp_path
):
    saved = saved_copy(subject_fit, tmp_path / "by_subject.json")
    assert saved.record["spec"]["model"] == SPEC and saved.record["data_sha256"]
    rows = saved.predict(solo_file)["rows"]
    # independent computation: each decision's likelihood is P(draw) for a draw and
    # 1 - P(draw) for a stop (DEVELOPERS.md, the factorisation of a trial into decisions),
    # evaluated at the live per-subject estimates
    model = build_model(SPEC)
    data = stopwise.load(solo_file).arrays()
    labels = np.asarray(data.subject_labels)[np.asarray(data.subject)].astype(str)
    drew = np.asarray(data.draw) > 0
    checked = 0
    for subject, fit in subject_fit.fits:
        theta = {k: jnp.asarray(v) for k, v in fit.estimates().items()}
        p_action = np.exp(np.asarray(model.loglik_obs(theta, data)))
        mine = labels == str(subject)
        expected = np.where(drew, p_action, 1.0 - p_action)[mine]
        np.testing.assert_allclose(rows["p_draw"].to_numpy()[mine], expected, rtol=1e-10)
        checked += int(mine.sum())
    assert checked == len(rows) == data.n_obs
    # subjects differ: their predicted draw chances at step 0 are not all equal
    assert rows[rows["step"] == 0].groupby("subject")["p_draw"].max().nunique() > 1


def test_saved_per_subject_fit_refuses_unknown_subjects_and_tampered_estimates(
    subject_fit, solo_file, tmp_path
):
    saved = saved_copy(subject_fit, tmp_path / "by_subject.json")
    frame = pd.read_csv(solo_file)
    frame["subject"] = frame["subject"].astype(str) + "_new"
    with pytest.raises(StopwiseInputError, match="no per-subject estimates"):
        saved.predict(frame)
    record = subject_fit.to_dict()
    record["fits"][2]["params"][0]["estimate"] += 0.1
    path = tmp_path / "tampered.json"
    path.write_text(json.dumps(record), encoding="utf-8")
    with pytest.raises(StopwiseInputError, match="refusing to predict"):
        load_result(path).predict(solo_file)


def test_parameters_held_fixed_by_identification_complete_a_saved_fit() -> None:
    # a prospect-theory fit to gains-only data holds the loss parameters fixed
    # (estimation/ml/identification.py) and reports them under "identification", not "params"
    record = {
        "model": "pt+tk+target+logit",
        "params": [
            {"name": n, "estimate": v}
            for n, v in (("alpha", 0.8), ("gamma", 0.7), ("precision", 2.0))
        ],
        "spec": {"model": "pt+tk+target+logit", "options": {}, "formulas": [], "fixed": {}},
        "identification": {"fixed": {"beta": 0.8, "loss_aversion": 1.5, "delta": 0.7}},
    }
    saved = SavedFit(record, "pt.json")
    theta = saved.theta(saved.build_model())
    assert theta["loss_aversion"] == 1.5 and theta["delta"] == 0.7 and theta["alpha"] == 0.8
    assert set(theta) == set(saved.build_model().param_names)
