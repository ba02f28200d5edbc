"""The count reduction (estimation/ml/counts.py) against the row-level computation.

The reference is the ordinary row-level likelihood and fit of the same rows (a separate code
path: every row evaluated, no grouping). Identity checked: sum_i ll_i = sum_u n_u ll_u
(common practice, no source: the multinomial likelihood depends on the data only through the
cell counts when each row's probability is a function of its cell)."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd
import pytest

import stopwise
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml import counts as K
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.base import Model, ParamSpec


def _simulated(spec: str, theta: dict[str, float], seed: int = 5) -> pd.DataFrame:
    design = stopping_design(30, 12, (0.6, 0.75, 0.9), 1.0, seed=seed)
    return stopwise.model(spec).simulate(theta, design, jax.random.PRNGKey(seed))


@pytest.mark.parametrize(
    "spec, theta",
    [
        ("crra+myopic+logit", {"r": 0.4, "precision": 3.0}),
        ("crra+planner+logit", {"r": 0.3, "precision": 2.0}),
        pytest.param("pt+tk+target+logit", {}, marks=pytest.mark.slow),
    ],
)
def test_count_loglik_equals_row_loglik(spec: str, theta: dict[str, float]) -> None:
    model = stopwise.model(spec)
    frame = _simulated(spec, {**model.start_theta(), **theta})
    counts = K.count_rows(frame)
    assert counts[K.COUNT_COLUMN].sum() == len(frame)
    assert len(counts) < len(frame)  # the reduction changes the problem size
    assert K.reduction_gap(model, frame, n_points=4) < K.EXACT_TOLERANCE
    rows = K.row_problem(model, frame)
    reduced, _, _ = K.counts_problem(model, counts)
    z = rows.z0 + 0.2
    assert abs(rows.value(z) - reduced.value(z)) < 1e-9
    # the certificate's cheap sum of row log-likelihoods equals the optimiser's objective
    assert abs(K.total_loglik(rows, z) + rows.value(z)) < 1e-9 * max(1.0, abs(rows.value(z)))
    assert abs(K.total_loglik(reduced, z) + reduced.value(z)) < 1e-9 * abs(rows.value(z))
    np.testing.assert_allclose(reduced.grad(z), rows.grad(z), rtol=1e-10, atol=1e-9)


def test_count_fit_equals_row_fit_with_clustered_errors() -> None:
    model = stopwise.model("crra+myopic+logit")
    frame = _simulated("crra+myopic+logit", {"r": 0.4, "precision": 3.0})
    by_rows = fit_mle(model, to_stopping_data(frame), se="robust", starts=1, progress=False)
    by_counts = K.fit_counts(model, K.count_rows(frame), se="robust", starts=1)
    assert by_counts.n_obs == by_rows.n_obs == len(frame)
    assert by_counts.converged and by_rows.converged
    assert abs(by_counts.loglik - by_rows.loglik) < 1e-8
    np.testing.assert_allclose(by_counts.table.estimate, by_rows.table.estimate, rtol=1e-6)
    np.testing.assert_allclose(by_counts.table.se, by_rows.table.se, rtol=1e-5)
    assert by_counts.clusters == by_rows.clusters == 30


def test_counts_of_partitions_add_up() -> None:
    frame = _simulated("crra+myopic+logit", {"r": 0.4, "precision": 3.0})
    half = len(frame) // 2
    merged = K.merge_counts([K.count_rows(frame.iloc[:half]), K.count_rows(frame.iloc[half:])])
    whole = K.merge_counts([K.count_rows(frame)])
    pd.testing.assert_frame_equal(merged, whole)


def _trial_drift_loglik(theta: dict, data: object) -> jnp.ndarray:
    """P(draw) = sigmoid(b0 + b1 * trial index): depends on more than the count key."""
    z = theta["b0"] + theta["b1"] * data.trial / 100.0 - 0.1 * data.step
    return jnp.where(data.draw > 0, -jnp.logaddexp(0.0, -z), -jnp.logaddexp(0.0, z))


def test_check_fails_for_a_model_that_reads_more_than_the_key() -> None:
    drifting = Model(
        name="trial-drift",
        data_kind="stopping",
        params=(ParamSpec("b0", start=0.5), ParamSpec("b1", start=1.0)),
        loglik_obs=_trial_drift_loglik,
        simulate=None,
    )
    frame = _simulated("crra+myopic+logit", {"r": 0.4, "precision": 3.0})
    assert K.reduction_gap(drifting, frame) > 1e-3


def test_refusals_name_the_reason() -> None:
    stopping = stopwise.model("crra+myopic+logit")
    assert K.counts_refusal(stopping, ["subject", "step"]) is None
    assert "formulas" in K.counts_refusal(stopping, ["subject"], formulas=["r ~ treatment"])
    assert "group" in K.counts_refusal(stopping, ["subject", "group"])
    assert "not a solo stopping model" in K.counts_refusal(stopwise.model("crra+logit"), [])
