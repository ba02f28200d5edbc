"""Posterior predictive checks, figure and shrinkage table of hierarchical fits."""

from __future__ import annotations

import jax
import numpy as np
import pytest

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes.fit import fit_bayes
from stopwise.estimation.bayes.ppc import (
    end_distribution,
    observed_trial_ends,
    ppc_figure,
    shrinkage_table,
    stop_step_frame,
)
from stopwise.estimation.ml.by_subject import fit_by_subject
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model


def test_end_distribution_is_geometric_for_a_constant_hazard():
    # With a constant draw probability h and survival p, the number of successful draws
    # before the trial ends is geometric: P(stop at s) = (h p)^s (1 - h),
    # P(bust at s) = (h p)^s h (1 - p) (geometric distribution; common practice, no source).
    h, p, horizon = 0.7, np.array([0.8, 0.9]), 30
    stop, bust, beyond = end_distribution(np.full((2, horizon), h), p)
    s = np.arange(horizon)
    np.testing.assert_allclose(stop, (h * p[:, None]) ** s * (1 - h), rtol=1e-12)
    np.testing.assert_allclose(bust, (h * p[:, None]) ** s * h * (1 - p[:, None]), rtol=1e-12)
    np.testing.assert_allclose(stop.sum(1) + bust.sum(1) + beyond, 1.0, rtol=1e-12)


@pytest.fixture(scope="module")
def hierarchical_case():
    model = build_model("crra+myopic+logit")
    design = stopping_design(12, 25, (0.7, 0.9), 1.0, 4)
    rng = np.random.default_rng(4)
    frames = []
    for _, sub in design.groupby("subject"):
        theta = {"r": float(rng.normal(0.3, 0.3)), "precision": float(np.exp(rng.normal(0.5, 0.3)))}
        frames.append(model.simulate(theta, sub, jax.random.PRNGKey(int(rng.integers(1e6)))))
    import pandas as pd

    data = to_stopping_data(pd.concat(frames, ignore_index=True))
    post = fit_bayes(
        model,
        data,
        hierarchical=True,
        chains=2,
        draws=200,
        warmup=200,
        seed=2,
        progress=False,
        init="mle",
        point_fits=ML_POINT_FITS,
    )
    return model, data, post


def test_stop_step_frame_shares(hierarchical_case):
    _, data, post = hierarchical_case
    frame = stop_step_frame(post, n_draws=50)
    cond = frame[frame["level"] == "condition"]
    assert set(cond["cond"]) == {0, 1}
    totals = cond.groupby("cond")[["observed", "predicted"]].sum()
    np.testing.assert_allclose(totals["observed"], 1.0, rtol=1e-12)
    np.testing.assert_allclose(totals["predicted"], 1.0, rtol=1e-9)
    assert (cond["pred_low"] <= cond["predicted"] + 1e-12).all()
    assert (cond["predicted"] <= cond["pred_high"] + 1e-12).all()
    subj = frame[frame["level"] == "subject"]
    assert subj["subject"].nunique() == data.n_subjects
    ends = observed_trial_ends(data)
    assert cond.groupby("cond")["n_trials"].first().sum() == len(ends)


def test_ppc_figure_draws_panels(hierarchical_case, tmp_path):
    _, _, post = hierarchical_case
    fig = ppc_figure(stop_step_frame(post, n_draws=30), level="condition")
    assert len([ax for ax in fig.axes if ax.get_visible()]) == 2
    fig.savefig(tmp_path / "ppc.png")
    assert (tmp_path / "ppc.png").stat().st_size > 1000


def test_shrinkage_pulls_subjects_towards_the_population(hierarchical_case):
    _, data, post = hierarchical_case
    table = shrinkage_table(post, fit_by_subject(post.model, post.data, se="hessian"))
    assert len(table) == 2 * data.n_subjects
    r = table[table["param"] == "r"].dropna(subset=["ml_estimate"])
    # partial pooling moves subject estimates towards the population (Gelman et al. 2013,
    # BDA3, ch. 5): on average the posterior means lie closer to it than the ML estimates
    post_dist = np.abs(r["posterior_mean"] - r["population_median"]).mean()
    ml_dist = np.abs(r["ml_estimate"] - r["population_median"]).mean()
    assert post_dist < ml_dist
    assert r["shrinkage"].median() > 0


@pytest.mark.slow
def test_shrinkage_needs_a_hierarchical_fit(hierarchical_case):
    model, data, _ = hierarchical_case
    pooled = fit_bayes(
        model, data, chains=1, draws=20, warmup=20, progress=False, point_fits=ML_POINT_FITS
    )
    with pytest.raises(StopwiseInputError, match="hierarchical"):
        shrinkage_table(pooled, None)
    frame = stop_step_frame(pooled, n_draws=10)
    assert frame[frame["level"] == "subject"]["subject"].nunique() == data.n_subjects
