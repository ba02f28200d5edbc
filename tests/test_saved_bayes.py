"""A saved Bayesian fit keeps thinned draws of its population parameters, and the report
draws rank plots and densities from the JSON file alone."""

from __future__ import annotations

import json

import jax
import numpy as np
import pytest

import stopwise
from stopwise.bayes_draws import KEY, result_record, saved_draws, thinned_record, thinning_step
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model
from stopwise.report.content import build_content

SPEC = "linear+myopic+logit"


def test_thinning_step_keeps_at_most_the_cap() -> None:
    # s = ceil(draws / keep), by hand
    assert thinning_step(600, 250) == 3 and len(range(0, 600, 3)) == 200
    assert thinning_step(250, 250) == 1
    assert thinning_step(251, 250) == 2
    assert thinning_step(10, 250) == 1


@pytest.fixture(scope="module")
def bayes_fit(tmp_path_factory):
    design = stopping_design(6, 15, (0.6, 0.8), 1.0, 3)
    frame = build_model(SPEC).simulate({"precision": 1.5}, design, jax.random.PRNGKey(3))
    path = tmp_path_factory.mktemp("bayes") / "solo.csv"
    frame.to_csv(path, index=False)
    return stopwise.fit(
        SPEC, path, method="bayes", chains=2, draws=120, warmup=100, seed=2, progress=False
    )


def test_saved_draws_are_the_posterior_draws_thinned_chain_by_chain(bayes_fit) -> None:
    live = np.asarray(bayes_fit.idata.posterior["precision"].values)
    record = json.loads(json.dumps(result_record(bayes_fit)))
    kept = saved_draws(record)
    assert list(kept) == ["precision"]
    np.testing.assert_array_equal(kept["precision"], live)  # 120 draws: step 1
    block = thinned_record(bayes_fit, keep=50)
    assert block["step"] == 3 and block["draws_per_chain"] == 120 and block["chains"] == 2
    np.testing.assert_array_equal(np.asarray(block["params"]["precision"]), live[:, ::3])


def test_report_draws_bayes_figures_from_the_json_alone(bayes_fit, tmp_path) -> None:
    path = tmp_path / "bayes.json"
    path.write_text(json.dumps(result_record(bayes_fit)), encoding="utf-8")
    content = build_content(None, [path])
    section = next(s for s in content.sections if s.title == "Bayesian diagnostics")
    figures = [b for b in section.blocks if b.kind == "figure"]
    assert len(figures) == 1 and figures[0].png.startswith(b"\x89PNG")
    assert "120 of 120 per chain" in figures[0].text


def test_a_bayes_json_without_draws_is_named_in_the_warnings(bayes_fit, tmp_path) -> None:
    record = result_record(bayes_fit)
    del record[KEY]
    path = tmp_path / "old.json"
    path.write_text(json.dumps(record), encoding="utf-8")
    content = build_content(None, [path])
    assert "Bayesian diagnostics" not in [s.title for s in content.sections]
    assert any("no posterior draws saved" in w for w in content.warnings)
