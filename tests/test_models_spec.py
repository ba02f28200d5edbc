"""Model specs: parsing, canonical names, parameters, options and refusals."""

from __future__ import annotations

import sys
import types

import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.base import Model
from stopwise.models.spec import KNOWN_PARTS, build_model


@pytest.mark.parametrize(
    ("spec", "name", "kind", "params"),
    [
        ("crra+planner+logit", "crra+planner+logit", "stopping", ("r", "precision")),
        (
            "PT + Prelec + target + logit",
            "pt+prelec+target+logit",
            "stopping",
            ("alpha", "beta", "loss_aversion", "gamma", "precision"),
        ),
        ("crra+logit", "crra+logit", "lottery", ("r", "precision")),
        ("linear+myopic+probit", "linear+myopic+probit", "stopping", ("sigma",)),
        (
            "crra+planner+tremble",
            "crra+planner+logit+tremble",
            "stopping",
            ("r", "precision", "tremble"),
        ),
        (
            "tremble+probit+expo+target",
            "expo+target+probit+tremble",
            "stopping",
            ("r", "a", "sigma", "tremble"),
        ),
        (
            "pt+tk+probit",
            "pt+tk+probit",
            "lottery",
            ("alpha", "beta", "loss_aversion", "gamma", "delta", "sigma"),
        ),
        (
            "cara+ge+myopic+logit",
            "cara+ge+myopic+logit",
            "stopping",
            ("a", "gamma", "delta", "precision"),
        ),
    ],
)
def test_specs_parse_to_canonical_models(spec, name, kind, params):
    model = build_model(spec)
    assert isinstance(model, Model)
    assert model.name == name and model.data_kind == kind and model.param_names == params
    assert stopwise.model(spec).name == name  # the public alias
    for p in model.params:
        assert p.lower < p.start < p.upper


@pytest.mark.parametrize(
    ("spec", "message"),
    [
        ("crra+wobble+logit", "unknown part 'wobble'.*utility: linear, crra"),
        ("crra+cara+planner+logit", "more than one utility"),
        ("crra+planner", "no noise rule"),
        ("planner+logit", "names no utility"),
        ("crra+logit+probit", "use one of logit or probit"),
        ("crra++logit", "empty part"),
        ("", "non-empty string"),
        ("crra+target+myopic+logit", "more than one policy"),
    ],
)
def test_bad_specs_are_refused_with_the_known_parts(spec, message):
    with pytest.raises(StopwiseInputError, match=message):
        build_model(spec)


def test_options_are_checked_and_recorded():
    model = build_model("pt+planner+logit", wealth=2.0, reference=1.0, contextual=True)
    assert model.options["wealth"] == 2.0 and model.options["reference"] == 1.0
    assert model.options["policy"] == "planner"
    assert model.spec("precision").start == 5.0  # contextual scale
    with pytest.raises(StopwiseInputError, match=r"unknown model option.*wealth"):
        build_model("crra+planner+logit", welth=1.0)
    with pytest.raises(StopwiseInputError, match="max_p_survive"):
        build_model("crra+planner+logit", max_p_survive=1.0)
    with pytest.raises(StopwiseInputError, match="wealth"):
        build_model("crra+planner+logit", wealth=-1.0)


def test_contest_parts_are_delegated(monkeypatch):
    seen = {}

    def fake_build(parts, **options):
        seen["parts"], seen["options"] = parts, options
        return "contest model"

    fake = types.ModuleType("stopwise.models.contest.build")
    fake.build_contest_model = fake_build
    monkeypatch.setitem(sys.modules, "stopwise.models.contest.build", fake)
    assert build_model("CRRA+qre", max_target=12) == "contest model"
    assert seen == {"parts": ["crra", "qre"], "options": {"max_target": 12}}
    assert set(KNOWN_PARTS["contest"]) >= {"nash", "qre", "levelk", "ch"}


def test_wealth_shifts_the_utility_argument():
    # With wealth w, CRRA utility is over w + payoff: at r = 2 and zero start, wealth 1 makes
    # the first stop valued at u(1) instead of the floor.
    frame = stopwise.simulate(
        "linear+myopic+logit",
        {"precision": 1.0},
        pd.DataFrame({"subject": 1, "trial": range(20), "p_survive": 0.7, "gain": 1.0}),
        seed=0,
    )
    data = stopwise.load(frame).arrays()
    plain = build_model("crra+myopic+logit")
    rich = build_model("crra+myopic+logit", wealth=1.0)
    theta = {"r": 2.0, "precision": 1.0}
    p_plain = np.asarray(plain.predict(theta, data))
    p_rich = np.asarray(rich.predict(theta, data))
    first = np.asarray(data.step) == 0
    assert np.all(p_plain[first] == 1.0)  # a sure zero is worse than any gamble
    # u(w + b) = -(1 + b)^-1 (up to a constant): one more draw at b = 0 is worth
    # .7 (-1/2) + .3 (-1) - (-1) = .35, so P(draw) = 1 / (1 + exp(-.35)).
    assert p_rich[first][0] == pytest.approx(1 / (1 + np.exp(-0.35)), rel=1e-12)
    assert bool(jnp.all(jnp.isfinite(rich.loglik_obs(theta, data))))


def test_negative_outcomes_under_power_utility_are_reported():
    from stopwise.data_schemas.arrays import LotteryData

    x = np.array([[-5.0, 10.0]])
    p = np.array([[0.5, 0.5]])
    data = LotteryData(np.zeros(1, np.int32), np.ones(1), x, p, x + 6.0, p)
    with pytest.raises(StopwiseInputError, match="wealth of at least 5"):
        build_model("crra+logit").options["prepare"](data)  # before any fit traces it
    rich = build_model("crra+logit", wealth=5.0)
    assert np.isfinite(float(rich.loglik_obs({"r": 0.5, "precision": 1.0}, data)[0]))
