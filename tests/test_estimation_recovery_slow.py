"""Slow statistical check of the engine (issue 4): interval coverage and AIC selection at a
demo-like design. Run with ``make test-slow``; the same study writes its figures into
benchmarks/RESULTS.md through ``python -m benchmarks.study_recovery``."""

from __future__ import annotations

import pytest

import stopwise  # noqa: F401  (float64)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.ml.recovery import recover, stopping_design
from stopwise.models.spec import build_model

P_SURVIVE = (0.6, 0.75, 0.9)


@pytest.mark.slow
def test_coverage_and_aic_selection_at_a_demo_like_design() -> None:
    options = {"max_p_survive": max(P_SURVIVE)}
    model = build_model("crra+planner+logit", **options)
    rival = build_model("pt+tk+target+logit", **options)
    design = stopping_design(120, 60, P_SURVIVE, 1.0, 2026)
    result = recover(
        model,
        {"r": 0.4, "precision": 2.0},
        design,
        lambda frame, horizon=None: to_stopping_data(frame, horizon=horizon),
        n_reps=200,
        seed=2026,
        se="robust",
        rivals=[rival],
        progress=False,
    )
    coverage = result.table["coverage_95"]
    # A 95% interval covers the truth in about 95% of replications; [0.90, 0.98] allows for
    # Monte Carlo error with 200 replications (sd about 0.015) -- common practice, no source.
    assert 0.90 <= coverage["r"] <= 0.98
    assert 0.90 <= coverage["precision"] <= 0.98
    assert result.selection["rate"] >= 0.90
