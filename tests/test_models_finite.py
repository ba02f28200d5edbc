"""Issue 22, item 7: every log-likelihood and gradient is finite on the documented parameter
box (models/box.py, README "Limits"), checked at the box's corners named in the issue and at
random points of the box drawn by hypothesis, with stakes up to 1e6.

Finiteness of log P and of its gradient is a property of any probability model evaluated in
floating point (common practice, no source); no value of this project serves as reference.
"""

from __future__ import annotations

import itertools
from dataclasses import replace
from functools import cache

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import stopwise
from stopwise.models.box import P_SURVIVE_BOX, STAKE_LIMIT, parameter_box
from stopwise.models.spec import build_model
from stopwise.models.utility import UTILITIES, UTILITY_CEILING, UTILITY_FLOOR

LOTTERY_SPECS = (
    "crra+logit",
    "cara+probit+tremble",
    "expo+logit+tremble",
    "expo+probit",
    "pt+tk+probit",
    "crra+prelec+logit",
)
STOPPING_SPECS = (
    "cara+myopic+probit+tremble",
    "expo+planner+logit",
    "crra+planner+probit",
    "cara+target+logit",
    "expo+target+probit+tremble",
    "pt+prelec+target+logit",
)
POWER = ("crra", "expo")


def _lottery_bundle() -> object:
    frame = pd.DataFrame(
        {
            "subject": ["s1", "s1", "s2"],
            "item": [1, 2, 1],
            "choice": ["A", "B", "B"],
            "a_x1": [1.0, 2.0, 3.0],
            "a_p1": [0.5, 0.1, 1.0],
            "a_x2": [0.0, 1.0, 0.0],
            "a_p2": [0.5, 0.9, 0.0],
            "b_x1": [4.0, 2.0, 0.5],
            "b_p1": [0.3, 0.5, 0.2],
            "b_x2": [0.0, 0.0, 2.0],
            "b_p2": [0.7, 0.5, 0.8],
        }
    )
    return stopwise.load(frame).arrays()


def _stopping_bundle() -> object:
    """Three conditions, trials of up to 4 decisions. The static caps are sized for the
    largest p_survive here, 0.9 (89 targets, a planner cap of 332 steps), to keep the probit
    target table small (89^2 values a condition instead of 918^2 at 0.99); the tests still
    evaluate survival chances up to 0.99 on those caps."""
    rows = []
    for trial, p in enumerate((0.9, 0.5, 0.8), start=1):
        rows += [("s1", trial, 0, p, 1.0, "draw", "success"), ("s1", trial, 1, p, 1.0, "draw")]
        rows[-1] += ("success",)
        rows += [("s1", trial, 2, p, 1.0, "draw", "success"), ("s1", trial, 3, p, 1.0, "stop")]
        rows[-1] += (None,)
    rows += [("s2", 1, 0, 0.8, 1.0, "draw", "bust")]
    frame = pd.DataFrame(
        rows, columns=["subject", "trial", "step", "p_survive", "gain", "action", "outcome"]
    )
    return stopwise.load(frame).arrays()


LOTTERY = _lottery_bundle()
STOPPING = _stopping_bundle()


@cache
def _value_and_grad(spec: str):
    """jit(value_and_grad) of the summed log-likelihood in (theta vector, amounts...)."""
    model = build_model(spec)
    names = model.param_names
    if model.data_kind == "lottery":

        def total(vector, a_x, b_x):
            data = replace(LOTTERY, a_x=a_x, b_x=b_x)
            return jnp.sum(model.loglik_obs(dict(zip(names, vector)), data))
    else:
        model.options["prepare"](STOPPING)  # static caps sized for p_survive 0.9

        def total(vector, p_survive, gain, start):
            data = replace(STOPPING, cond_p_survive=p_survive, cond_gain=gain, cond_start=start)
            return jnp.sum(model.loglik_obs(dict(zip(names, vector)), data))

    return model, jax.jit(jax.value_and_grad(total))


def _box_value(draw, spec) -> float:
    """A point of the parameter's box; its two corners are drawn as often as the interior
    (the failures of issue 22 sat on corners: a near -5 with precision 1e8 or sigma 1e-8)."""
    lo, hi = parameter_box(spec)
    if draw(st.booleans()):
        return draw(st.sampled_from([lo, hi]))
    if lo > 0 and hi / lo > 1e3:  # noise scales: log-uniform
        return float(np.exp(draw(st.floats(np.log(lo), np.log(hi)))))
    return draw(st.floats(lo, hi))


def _amounts(draw, shape, signed: bool) -> np.ndarray:
    scale = draw(st.sampled_from([1e-3, 1.0, 1e3, STAKE_LIMIT]))
    low = -1.0 if signed else 0.0
    values = draw(
        st.lists(st.floats(low, 1.0), min_size=int(np.prod(shape)), max_size=int(np.prod(shape)))
    )
    return np.asarray(values, dtype=np.float64).reshape(shape) * scale


def _evaluate(spec: str, theta: dict[str, float], amounts: tuple) -> tuple[float, np.ndarray]:
    model, fn = _value_and_grad(spec)
    vector = jnp.asarray([theta[n] for n in model.param_names])
    value, grad = fn(vector, *amounts)
    return float(value), np.asarray(grad)


def _assert_finite(spec: str, theta: dict, value: float, grad: np.ndarray) -> None:
    assert np.isfinite(value) and value <= 1e-12, (spec, theta, value)
    assert np.all(np.isfinite(grad)), (spec, theta, grad)


@pytest.mark.parametrize(
    ("spec", "theta", "stake"),
    [
        # the failures reported in issue 22 (edge grid), now finite
        ("cara+logit", {"a": -4.999999, "precision": 1e8}, STAKE_LIMIT),
        ("expo+logit", {"r": 0.0, "a": -4.999999, "precision": 1e8}, STAKE_LIMIT),
        ("cara+probit+tremble", {"a": -4.999999, "sigma": 1e-8, "tremble": 1e-8}, STAKE_LIMIT),
        ("cara+myopic+probit+tremble", {"a": -4.999999, "sigma": 1e-8, "tremble": 0.5}, 1e6),
        ("expo+planner+logit", {"r": -2.999999, "a": -4.999999, "precision": 1e8}, 1.0),
        ("cara+target+logit", {"a": -4.999999, "precision": 1e8}, STAKE_LIMIT),
    ],
)
def test_issue_edge_points_are_finite(spec: str, theta: dict, stake: float) -> None:
    value, grad = _evaluate(spec, theta, _scaled_amounts(build_model(spec), stake))
    _assert_finite(spec, theta, value, grad)


def _scaled_amounts(model, stake: float) -> tuple:
    if model.data_kind == "lottery":
        return (np.asarray(LOTTERY.a_x) * stake, np.asarray(LOTTERY.b_x) * stake)
    n = len(STOPPING.cond_p_survive)
    return (np.asarray(STOPPING.cond_p_survive), np.full(n, stake), np.zeros(n))


@pytest.mark.parametrize("spec", LOTTERY_SPECS + STOPPING_SPECS)
def test_every_corner_of_the_box_is_finite(spec: str) -> None:
    """All 2^k corners of the k-parameter box, at stakes 1 and 1e6 (random points can miss a
    corner; before the fix 41 corners of these specs gave -inf, NaN values or NaN
    gradients)."""
    model = build_model(spec)
    boxes = [parameter_box(p) for p in model.params]
    for stake in (1.0, STAKE_LIMIT):
        amounts = _scaled_amounts(model, stake)
        for corner in itertools.product(*boxes):
            theta = dict(zip(model.param_names, corner))
            value, grad = _evaluate(spec, theta, amounts)
            _assert_finite(spec, theta, value, grad)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_lottery_loglik_and_gradient_finite_on_the_box(data) -> None:
    spec = data.draw(st.sampled_from(LOTTERY_SPECS))
    model = build_model(spec)
    theta = {p.name: _box_value(data.draw, p) for p in model.params}
    signed = spec.split("+")[0] not in POWER
    shape = np.shape(LOTTERY.a_x)
    amounts = (_amounts(data.draw, shape, signed), _amounts(data.draw, shape, signed))
    value, grad = _evaluate(spec, theta, amounts)
    _assert_finite(spec, theta, value, grad)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_stopping_loglik_and_gradient_finite_on_the_box(data) -> None:
    spec = data.draw(st.sampled_from(STOPPING_SPECS))
    model = build_model(spec)
    theta = {p.name: _box_value(data.draw, p) for p in model.params}
    n = len(STOPPING.cond_p_survive)
    p_survive = np.asarray(data.draw(st.lists(st.floats(*P_SURVIVE_BOX), min_size=n, max_size=n)))
    gain = np.maximum(_amounts(data.draw, (n,), signed=False), 1e-3)
    start = _amounts(data.draw, (n,), signed=spec.split("+")[0] not in POWER)
    value, grad = _evaluate(spec, theta, (p_survive, gain, start))
    _assert_finite(spec, theta, value, grad)


@settings(max_examples=200, deadline=None)
@given(
    name=st.sampled_from(sorted(UTILITIES)),
    x=st.floats(-STAKE_LIMIT, STAKE_LIMIT),
    data=st.data(),
)
def test_utilities_stay_within_the_documented_bounds(name: str, x: float, data) -> None:
    family = UTILITIES[name]
    theta = {p.name: _box_value(data.draw, p) for p in family.params}
    u = float(family.fn(x, theta, 0.0))
    assert UTILITY_FLOOR <= u <= UTILITY_CEILING
