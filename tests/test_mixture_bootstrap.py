"""Bootstrap standard errors and intervals of mixture type shares, and the relabelling rule."""

from __future__ import annotations

import itertools

import jax
import numpy as np
import pandas as pd
import pytest

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.mixture import (
    MixtureRows,
    coinciding_types,
    fit_mixture,
    match_types,
    relabel,
    shares_of,
)
from stopwise.estimation.ml.problem import make_layout
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model

LOGIT = "linear+myopic+logit"


def two_type_data(precisions: tuple[float, float], subjects: tuple[int, int], trials: int):
    frames = []
    for t, (precision, n) in enumerate(zip(precisions, subjects)):
        design = stopping_design(n, trials, (0.6, 0.75, 0.9), 1.0, t + 1)
        design["subject"] = f"t{t}" + design["subject"]
        frames.append(
            build_model(LOGIT).simulate({"precision": precision}, design, jax.random.PRNGKey(t + 1))
        )
    return to_stopping_data(pd.concat(frames, ignore_index=True))


def test_bootstrap_gives_shares_se_and_intervals_around_the_estimate() -> None:
    data = two_type_data((0.3, 3.0), (30, 30), 30)
    fit = fit_mixture(build_model(LOGIT), data, k=2, starts=4, se="bootstrap", bootstrap_reps=24)
    frame = fit.params
    assert list(frame.index) == [
        "type1:precision",
        "type2:precision",
        "share:type1",
        "share:type2",
    ]
    assert fit.se_method == "bootstrap" and fit.clusters == 60
    assert (frame["se"] > 0).all() and np.isfinite(frame["se"]).all()
    assert (frame["ci_low"] <= frame["estimate"]).all()
    assert (frame["estimate"] <= frame["ci_high"]).all()
    assert frame.loc["share:type1", "ci_low"] >= 0 and frame.loc["share:type2", "ci_high"] <= 1
    # shares sum to one in every replication, so their spreads are equal (K = 2)
    assert frame.loc["share:type1", "se"] == pytest.approx(frame.loc["share:type2", "se"])
    boot = fit.extras["bootstrap"]
    assert boot["replications"] == 24 and boot["z"].shape == (boot["converged"], 3)
    # the percentile interval is read off the relabelled replications themselves
    shares = np.array([shares_of(z, 2)[0] for z in boot["z"]])
    assert frame.loc["share:type1", "ci_low"] == pytest.approx(np.percentile(shares, 2.5))
    assert frame.loc["share:type1", "se"] == pytest.approx(shares.std(ddof=1))
    out = fit.to_dict()
    assert out["se_method"] == "bootstrap"
    assert all(p["se"] is not None for p in out["params"])


def test_relabelling_undoes_any_permutation_of_types() -> None:
    model = build_model(LOGIT)
    rows = MixtureRows(tuple(make_layout(model) for _ in range(3)), 10)
    z_ref = np.array([-1.0, 0.2, 1.5, 0.4, -0.7])  # three log precisions, two share logits
    for perm in itertools.permutations(range(3)):
        z_switched = relabel(z_ref, np.array(perm), rows)
        assert not np.allclose(z_switched, z_ref) or perm == (0, 1, 2)
        np.testing.assert_allclose(shares_of(z_switched, 3), shares_of(z_ref, 3)[list(perm)])
        back = relabel(z_switched, match_types(z_switched, z_ref, rows), rows)
        np.testing.assert_allclose(back, z_ref, atol=1e-12)
    # types of different models are never swapped, however close their coefficients are
    mixed = MixtureRows((make_layout(model), make_layout(build_model("linear+myopic+probit"))), 4)
    np.testing.assert_array_equal(
        match_types(np.array([2.0, -2.0, 0.0]), np.array([-2.0, 2.0, 0.0]), mixed), [0, 1]
    )


@pytest.mark.slow
def test_bootstrap_share_se_close_to_the_sandwich_on_a_large_mixture() -> None:
    # Subject-level bootstrap and clustered-sandwich (delta-method) standard errors estimate
    # the same sampling spread in large samples, so they agree up to simulation noise
    # (Efron & Tibshirani 1993, ch. 6 and 21; Cameron & Miller 2015, section VI; from
    # memory). Tolerance 15%, the bound issue 4 sets for bootstrap against sandwich SEs.
    data = two_type_data((0.5, 2.0), (200, 100), 20)
    model = build_model(LOGIT)
    robust = fit_mixture(model, data, k=2, starts=4, se="robust")
    boot = fit_mixture(model, data, k=2, starts=4, se="bootstrap", bootstrap_reps=300)
    assert robust.converged and boot.converged
    ratio = boot.params["se"] / robust.params["se"]
    assert ratio.between(0.85, 1.15).all(), ratio.to_dict()
    est = boot.params["estimate"]
    # the types are overlapping (not perfectly classified) yet recovered
    assert 0.55 < est["share:type1"] < 0.75 and est["type1:precision"] < est["type2:precision"]


def test_coinciding_types_are_flagged() -> None:
    model = build_model(LOGIT)
    rows = MixtureRows(tuple(make_layout(model) for _ in range(3)), 10)
    flagged = coinciding_types(np.array([-0.65, -0.65 + 1e-6, 1.8, -0.5, 0.5]), rows)
    assert len(flagged) == 1 and flagged[0].startswith("types 1 and 2 coincide")
    assert coinciding_types(np.array([-0.65, 0.1, 1.8, -0.5, 0.5]), rows) == []
    probit = build_model("linear+myopic+probit")
    mixed = MixtureRows((make_layout(model), make_layout(probit)), 4)
    assert coinciding_types(np.array([0.3, 0.3, 0.0]), mixed) == []
