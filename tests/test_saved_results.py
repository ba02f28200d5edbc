"""Saved fits (stopwise.load_result): a result JSON predicts, simulates and feeds the
contest counterfactual exactly as the fit object it was written from, and certifies itself
by recomputing its log-likelihood on the fitted data."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise.contest import counterfactual
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.saved import SavedCollection, SavedFit, load_result

SCHEMES = [
    {"name": "winner takes 10", "p_survive": 0.85, "players": 2, "prize": 10},
    {"name": "5 plus own bank", "p_survive": 0.85, "players": 2, "prize": 5, "keep_bank": True},
]


@pytest.fixture(scope="module")
def solo_fit(small_demo):
    frame = small_demo["stopping"]
    model = stopwise.model("crra+myopic+logit", wealth=2.0)  # an option that must survive
    return frame, stopwise.fit(model, frame, progress=False)


def _saved(fit, tmp_path, name="fit.json"):
    path = tmp_path / name
    path.write_text(fit.to_json())
    return path, load_result(path)


def test_saved_fit_predicts_as_the_fit_and_keeps_its_options(solo_fit, tmp_path):
    frame, fit = solo_fit
    _, saved = _saved(fit, tmp_path)
    assert isinstance(saved, SavedFit)
    assert saved.options == {"wealth": 2.0}
    original, loaded = fit.predict(), saved.predict(frame)
    np.testing.assert_allclose(
        loaded["rows"]["p_draw"].to_numpy(), original["rows"]["p_draw"].to_numpy(), atol=1e-12
    )
    for column in ("p_draw", "p_stop_here", "p_bust_here"):
        np.testing.assert_allclose(
            loaded["stop_steps"][column].to_numpy(),
            original["stop_steps"][column].to_numpy(),
            atol=1e-12,
        )


def test_certificate_refuses_a_tampered_or_misbuilt_fit(solo_fit, tmp_path):
    """On the fitted data the recomputed log-likelihood must equal the saved one: an edited
    estimate, or a dropped option (wealth), is refused instead of predicting."""
    frame, fit = solo_fit
    record = json.loads(fit.to_json())
    saved = SavedFit(record)
    model = saved.build_model()
    assert saved.certify(model, saved.theta(model), _bundle(saved, frame)) <= 1e-6
    edited = json.loads(fit.to_json())
    edited["params"][0]["estimate"] += 0.05
    with pytest.raises(StopwiseInputError, match="log-likelihood"):
        SavedFit(edited, "edited.json").predict(frame)
    no_option = json.loads(fit.to_json())
    no_option["spec"]["options"] = {}
    with pytest.raises(StopwiseInputError, match="refusing"):
        SavedFit(no_option, "no_option.json").predict(frame)


def _bundle(saved, frame):
    from stopwise.api import prepare_model, resolve_data, select_data

    model = saved.build_model()
    bundle, rows = resolve_data(frame)
    bundle, _, _ = select_data(model, bundle, rows)
    prepare_model(model, bundle)
    return bundle


def test_saved_fit_simulates_like_the_simulator_at_the_estimates(solo_fit, tmp_path):
    _, fit = solo_fit
    _, saved = _saved(fit, tmp_path)
    design = pd.DataFrame(
        {
            "subject": np.repeat([1, 2], 5),
            "trial": np.tile(range(5), 2),
            "p_survive": 0.8,
            "gain": 1.0,
        }
    )
    direct = stopwise.simulate(
        stopwise.model("crra+myopic+logit", wealth=2.0), fit.estimates(), design, seed=3
    )
    pd.testing.assert_frame_equal(saved.simulate(design, seed=3), direct)


@pytest.mark.slow
def test_saved_contest_fit_gives_the_same_counterfactual(small_demo, tmp_path):
    fit = stopwise.fit("crra+qre", small_demo["stopping"], max_target=25, progress=False)
    _, saved = _saved(fit, tmp_path, "contest.json")
    assert saved.options == {"max_target": 25}
    direct = counterfactual(
        {
            "model": stopwise.model("crra+qre", max_target=25),
            "params": fit.estimates(),
            "max_target": 25,
        },
        SCHEMES,
    )
    loaded = counterfactual(saved.contest_input(), SCHEMES)
    pd.testing.assert_frame_equal(loaded.table, direct.table)


def test_comparison_json_loads_as_a_collection(small_demo, tmp_path):
    table = stopwise.compare(
        ["crra+myopic+logit", "crra+target+logit"], small_demo["stopping"], progress=False
    )
    path = tmp_path / "cmp.json"
    path.write_text(json.dumps(table.to_dict(), default=float))
    saved = load_result(path)
    assert isinstance(saved, SavedCollection) and saved.kind == "comparison"
    assert [f.model for f in saved.fits] == ["crra+myopic+logit", "crra+target+logit"]
    assert list(saved.table.index) == list(table.table.index)
    assert all(f.record["spec"]["model"] == f.model for f in saved.fits)


def test_formula_fits_are_refused_clearly_not_predicted_wrongly():
    record = {
        "model": "crra+myopic+logit",
        "params": [{"name": "r", "estimate": 0.3}],
        "spec": {"model": "crra+myopic+logit", "options": {}, "formulas": ["r ~ 1 + treatment"]},
    }
    saved = SavedFit(record, "formula.json")
    with pytest.raises(StopwiseInputError, match="covariate formulas"):
        saved.theta(saved.build_model())


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("{not json", "line 1, column 2"),
        ("[1, 2]", "expected a JSON object"),
        ('{"model": "x"}', "missing key"),
    ],
)
def test_bad_result_files_name_the_file_and_the_problem(tmp_path, text, expected):
    path = tmp_path / "bad.json"
    path.write_text(text)
    with pytest.raises(StopwiseInputError, match=expected) as info:
        load_result(path)
    assert "bad.json" in str(info.value)


def test_a_result_without_a_recorded_spec_is_refused():
    saved = SavedFit(
        {"model": "crra+myopic+logit", "params": [{"name": "r", "estimate": 0.3}]}, "old.json"
    )
    with pytest.raises(StopwiseInputError, match="no model spec"):
        saved.predict(pd.DataFrame())
