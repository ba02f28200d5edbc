"""The planner-cap check of Bayesian fits (estimation/bayes/truncation.py)."""

from __future__ import annotations

import jax
import numpy as np
import pandas as pd
import pytest

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes import fit as bayes
from stopwise.estimation.bayes import prepare as preparation
from stopwise.estimation.bayes import truncation
from stopwise.estimation.bayes.truncation import (
    AUTO_EXTRA_STEPS,
    auto_capped,
    default_cap_reference,
    thinned_draws,
    truncation_check,
    truncation_warnings,
)
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model


@pytest.fixture(scope="module")
def planner_data():
    model = build_model("crra+planner+logit")
    design = stopping_design(4, 12, (0.8, 0.9), 1.0, 11)
    frames = [
        model.simulate({"r": 0.4, "precision": 2.0}, sub, jax.random.PRNGKey(i))
        for i, (_, sub) in enumerate(design.groupby("subject"))
    ]
    return to_stopping_data(pd.concat(frames, ignore_index=True))


def test_reference_model_only_for_a_truncated_planner():
    assert default_cap_reference(build_model("crra+planner+logit")) is None
    assert default_cap_reference(build_model("crra+myopic+logit", max_target=20)) is None
    # for the target policy max_target is the choice set, not a numerical truncation
    assert default_cap_reference(build_model("crra+target+logit", max_target=20)) is None
    truncated = build_model("crra+planner+logit", max_target=20, wealth=5.0)
    reference = default_cap_reference(truncated)
    assert reference is not None and reference.name == truncated.name
    assert reference.options["max_target"] is None
    assert reference.options["wealth"] == 5.0


def test_thinned_draws_span_all_chains():
    samples = {"a": np.arange(2 * 50).reshape(2, 50).astype(float), "b": np.zeros((2, 50, 3))}
    draws = thinned_draws(samples, 10)
    assert draws["a"][0] == 0 and draws["a"][-1] == 99 and len(draws["a"]) == 10
    assert draws["b"].shape == (10, 3)
    assert len(thinned_draws(samples, 1000)["a"]) == 100


def pooled_samples(r_values, precision=2.0):
    """Pooled site draws (1 chain) at natural r values and a fixed precision."""
    model = build_model("crra+planner+logit")
    spec_r, spec_p = model.spec("r"), model.spec("precision")
    z_r = np.array([[float(spec_r.to_unconstrained(r)) for r in r_values]])
    z_p = np.full_like(z_r, float(spec_p.to_unconstrained(precision)))
    return {"z_r": z_r, "z_precision": z_p}


def check_for(data, cap, r_values):
    model = build_model("crra+planner+logit", max_target=cap)
    setup, args, *_ = preparation.prepare(
        model, data, hierarchical=False, formulas=None, priors=None, pointwise="trial"
    )
    return truncation_check(setup, args, data, pooled_samples(r_values))


def test_a_generous_cap_passes_and_a_cap_at_the_horizon_is_flagged(planner_data):
    # Risk averse (r = 0.4, precision 2): with p_survive <= 0.9 the planner's draw
    # probability falls fast beyond the observed steps, so a cap 60 steps beyond them
    # changes nothing measurable.
    generous = check_for(planner_data, planner_data.horizon + 60, [0.3, 0.4, 0.5])
    assert generous["draws_checked"] == 3
    assert generous["max_abs_loglik_difference"] < 1e-9
    assert truncation_warnings(generous) == []
    # Risk seeking (r = -0.5): u(b) = b^1.5/1.5 makes another draw attractive up to
    # b ~ 1/((1/p)^(1/1.5) - 1), about 13 banks at p = 0.9 (derived from the CRRA one-step
    # comparison p u(b+1) > u(b); common practice, no source): forcing a stop at the data's
    # horizon is a real truncation and must be flagged.
    harsh = check_for(planner_data, 1, [-0.5, 0.4])
    assert harsh["max_abs_loglik_difference"] > 1e-3
    (warning,) = truncation_warnings(harsh)
    assert "max_target=1" in warning and "raise max_target" in warning


@pytest.mark.slow
def test_fit_bayes_reports_the_check(planner_data):
    cap = planner_data.horizon + 40
    post = bayes.fit_bayes(
        build_model("crra+planner+logit", max_target=cap),
        planner_data,
        chains=1,
        draws=20,
        warmup=20,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    check = post.run["truncation_check"]
    assert check["max_target"] == cap and check["draws_checked"] == 20
    assert check["max_abs_loglik_difference"] < check["tolerance"]
    assert f"planner cap max_target={cap}" in post.summary()
    assert post.to_dict()["sampler"]["truncation_check"] == check
    untruncated = bayes.fit_bayes(
        "crra+myopic+logit",
        planner_data,
        chains=1,
        draws=10,
        warmup=10,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    assert untruncated.run["truncation_check"] is None


def test_automatic_cap_is_only_for_planners_without_a_cap(planner_data):
    capped = auto_capped(build_model("crra+planner+logit", wealth=2.0), planner_data)
    assert capped.options["max_target"] == planner_data.horizon + AUTO_EXTRA_STEPS
    assert capped.options["wealth"] == 2.0
    assert auto_capped(build_model("crra+planner+logit", max_target=70), planner_data) is None
    assert auto_capped(build_model("crra+target+logit"), planner_data) is None
    assert auto_capped(build_model("crra+myopic+logit"), planner_data) is None


@pytest.mark.slow
def test_fit_bayes_uses_the_checked_automatic_cap(planner_data):
    post = bayes.fit_bayes(
        "crra+planner+logit",
        planner_data,
        chains=1,
        draws=20,
        warmup=20,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    assert post.run["planner_cap"] == "auto"
    check = post.run["truncation_check"]
    assert check["max_target"] == planner_data.horizon + AUTO_EXTRA_STEPS
    assert check["max_abs_loglik_difference"] < check["tolerance"]
    assert any("planner cap: max_target=" in note for note in post.notes)
    with pytest.raises(StopwiseInputError, match="planner_cap"):
        bayes.fit_bayes(
            "crra+planner+logit", planner_data, planner_cap="short", point_fits=ML_POINT_FITS
        )


@pytest.mark.slow
def test_a_failed_automatic_cap_refits_at_the_default_cap(monkeypatch):
    # Risk seekers (r = -0.5) at p_survive 0.9 would draw up to a bank of about 13 (see
    # above), beyond most observed trials: a cap at the data horizon itself (0 extra steps)
    # must fail the check and the fit must be redone at the default cap.
    model = build_model("crra+planner+logit")
    design = stopping_design(3, 8, (0.9,), 1.0, 5)
    frames = [
        model.simulate({"r": -0.5, "precision": 0.5}, sub, jax.random.PRNGKey(10 + i))
        for i, (_, sub) in enumerate(design.groupby("subject"))
    ]
    data = to_stopping_data(pd.concat(frames, ignore_index=True))
    monkeypatch.setattr(truncation, "AUTO_EXTRA_STEPS", 0)
    post = bayes.fit_bayes(
        model, data, chains=1, draws=15, warmup=15, progress=False, point_fits=ML_POINT_FITS
    )
    assert post.run["planner_cap"] == "exact" and post.run["truncation_check"] is None
    assert "refitted at the default cap" in post.notes[0]
    assert post.model.options["max_target"] is None


@pytest.mark.parametrize(
    "spec", ["pt+tk+planner+probit", "crra+prelec+planner+tremble", "expo+planner+probit+tremble"]
)
def test_recapped_models_keep_spec_and_options(spec):
    model = build_model(spec, contextual=True, wealth=3.0)
    recapped = truncation.with_planner_cap(model, 40)
    assert recapped.name == model.name and recapped.param_names == model.param_names
    assert recapped.options["max_target"] == 40

    def settings(m):
        capped = ("max_target", "horizon_invariant")  # a planner with a cap plans to it
        return {k: v for k, v in m.options.items() if k not in capped and not callable(v)}

    assert settings(recapped) == settings(model)
    assert model.options["horizon_invariant"] and not recapped.options["horizon_invariant"]
    # the stored-program key names the cap, so the two models never share a compiled program
    assert recapped.options["program_key"]() != model.options["program_key"]()
    assert (
        recapped.options["program_key"]()
        == truncation.with_planner_cap(model, 40).options["program_key"]()
    )
