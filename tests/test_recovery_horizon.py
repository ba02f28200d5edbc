"""Recovery studies bucket the data horizon so that replications share compiled programs
(estimation/ml/recovery.py ``replication_bundle``). That shortcut is exact only for models
whose likelihood a longer horizon leaves unchanged; for the target rule, a planner with
max_target and contest models the horizon sizes the model's own sets (DEVELOPERS.md: target
caps extend to the longest observed trial). Each case is checked against the log-likelihood
of the bundle ``stopwise.fit`` makes of the same frame (the data's own horizon), and the
cases where the bucketed horizon would change the answer are shown to change it."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import stopwise
from stopwise.commands.simulate import contest_design
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.recovery import (
    replication_bundle,
    replication_horizon,
    stopping_design,
)


def _total(model, theta: dict, data) -> float:
    prepare = (model.options or {}).get("prepare")
    if callable(prepare):
        prepare(data)
    values = {k: jnp.asarray(v) for k, v in theta.items()}
    return float(jnp.sum(model.loglik_obs(values, data)))


def _bundle(frame, horizon=None):
    return to_stopping_data(frame, horizon=horizon)


CASES = [
    # spec, build options, truth, design kind, bucketed?
    ("crra+myopic+logit", {}, {"r": 0.3, "precision": 1.5}, "solo", True),
    ("crra+planner+logit", {}, {"r": 0.3, "precision": 1.5}, "solo", True),
    ("crra+planner+logit", {"max_target": 3}, {"r": 0.3, "precision": 1.5}, "solo", False),
    # the p = 0.5 condition's targets stop at ceil(log 1e-4 / log 0.5) = 14 unless the
    # longest trial (at p = 0.95) is longer: then they extend to the horizon
    ("crra+target+logit", {}, {"r": -0.5, "precision": 0.5}, "solo", False),
    (
        "crra+levelk",
        {"max_target": 8},
        {"r": 0.2, "precision": 2.0, "level": 1.5},
        "contest",
        False,
    ),
]
P_SURVIVE = {"crra+target+logit": (0.5, 0.95)}


@pytest.mark.parametrize(("spec", "options", "truth", "kind", "bucketed"), CASES)
def test_replication_bundle_keeps_the_likelihood_of_the_users_fit(
    spec: str, options: dict, truth: dict, kind: str, bucketed: bool
) -> None:
    model = stopwise.model(spec, **options)
    design = stopping_design(4, 12, P_SURVIVE.get(spec, (0.6, 0.8)), 1.0, 7)
    if kind == "contest":
        design = contest_design(stopping_design(2, 10, (0.75,), 1.0, 7), 2, 10.0, True)
    frame = model.simulate(truth, design, jax.random.PRNGKey(3))
    users = _bundle(frame)  # the horizon stopwise.fit uses: the longest trial
    padded = replication_horizon(int(frame["step"].max()))
    assert padded > int(users.horizon)  # the bucket really pads in every case
    data = replication_bundle(model, frame, _bundle)
    assert (int(data.horizon) == padded) is bucketed
    reference = _total(model, truth, users)
    assert abs(_total(model, truth, data) - reference) <= 1e-9 * max(1.0, abs(reference))
    if not bucketed:  # where the shortcut is refused, it would have changed the answer
        longer = _total(model, truth, _bundle(frame, padded))
        assert abs(longer - reference) > 1e-6 * max(1.0, abs(reference))


def test_only_the_myopic_rule_and_the_uncapped_planner_declare_horizon_invariance() -> None:
    flags = {
        spec: bool((stopwise.model(spec).options or {}).get("horizon_invariant"))
        for spec in ("crra+myopic+logit", "crra+planner+logit", "crra+target+logit", "crra+qre")
    }
    assert flags == {
        "crra+myopic+logit": True,
        "crra+planner+logit": True,
        "crra+target+logit": False,
        "crra+qre": False,
    }
    assert not stopwise.model("crra+planner+logit", max_target=20).options["horizon_invariant"]
    assert np.isfinite(replication_horizon(3))
