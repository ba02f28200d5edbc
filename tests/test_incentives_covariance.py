"""Uncertainty of a design from the fit's full covariance (issue 21): with strongly
correlated estimates the delta-method standard error moves away from the uncorrelated one
and agrees with a brute-force Monte Carlo over numpy's multivariate normal; a saved fit's
covariance on the unconstrained scale gives the same answer as its natural-scale image.

The parameter values and covariances are invented for the tests (no data).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import stopwise  # noqa: F401  (enables float64 JAX)
from stopwise.contest import design_incentives
from stopwise.incentives_uncertainty import from_saved_record
from stopwise.models.spec import build_model

THETA = {"r": 0.3, "precision": 2.0}
SE = np.array([0.01, 0.0036])  # d goal/d r and d goal/d precision weigh alike; small
# enough that the prediction is linear over the spread (the delta method's premise)
DESIGN = dict(players=(3,), schemes=("winner",), grid_points=2, refine_steps=0)


def covariance(rho: float) -> list[list[float]]:
    return (np.outer(SE, SE) * np.array([[1.0, rho], [rho, 1.0]])).tolist()


def total_bank(theta: dict[str, float]) -> float:
    """N E[bank] at 3 players, winner, prize 5, p = 0.8, computed with numpy here."""
    model = build_model("crra+qre", max_target=8)
    sigma = np.asarray(model.options["target_distribution"](theta, 0.8, 3, 5.0, 0.0, 8))
    t = np.arange(9)
    return float(3 * (sigma / sigma.sum()) @ (t * 0.8**t))


@pytest.mark.slow
def test_correlation_changes_the_delta_method_se_and_monte_carlo_agrees():
    fit = {**FIT_BASE, "covariance": {"names": ["r", "precision"], "matrix": covariance(0.9)}}
    result = design_incentives(fit, "efficiency", (5.0, 5.0), **DESIGN)
    delta = result.choice["delta_method"]
    assert delta["se"] < 0.5 * delta["se_uncorrelated"]  # the correlation matters here
    # brute force: theta ~ N(theta_hat, C) by numpy, the prediction's sd (Monte Carlo)
    rng = np.random.default_rng(5)
    draws = rng.multivariate_normal([0.3, 2.0], covariance(0.9), size=100)
    values = [total_bank({"r": r, "precision": lam}) for r, lam in draws]
    assert np.std(values, ddof=1) == pytest.approx(delta["se"], rel=0.3)  # sd of a 100-draw sd: 7%
    independent = design_incentives(
        {**FIT_BASE, "se": dict(zip(THETA, SE))}, "efficiency", (5.0, 5.0), **DESIGN
    )
    assert independent.choice["delta_method"]["se"] == pytest.approx(
        delta["se_uncorrelated"], rel=1e-9
    )


FIT_BASE = {"model": "crra+qre", "params": THETA, "max_target": 8}


@pytest.mark.slow
def test_a_saved_fits_unconstrained_covariance_equals_its_natural_image():
    # theta = to_natural(z): the natural covariance is D C_z D, D = diag(d theta / d z)
    # (delta method, common practice, no source); D by central differences here
    model = build_model("crra+qre", max_target=8)
    specs = [model.spec(n) for n in ("r", "precision")]
    z = [float(s.to_unconstrained(THETA[s.name])) for s in specs]
    cov_z = np.array([[0.04, -0.05], [-0.05, 0.09]])
    record = {"coefficients": {"z": z, "covariance": cov_z.tolist()}, "spec": {}}
    uncertainty, notes = from_saved_record(record, model, THETA, {})
    assert uncertainty.scale == "unconstrained" and not notes
    h = 1e-6
    d = np.diag(
        [
            (float(s.to_natural(zk + h)) - float(s.to_natural(zk - h))) / (2 * h)
            for s, zk in zip(specs, z)
        ]
    )
    natural = d @ cov_z @ d
    via_z = design_incentives_with(uncertainty_record=record)
    via_natural = design_incentives(
        {**FIT_BASE, "covariance": {"names": ["r", "precision"], "matrix": natural.tolist()}},
        "efficiency",
        (5.0, 5.0),
        **DESIGN,
    )
    assert via_z == pytest.approx(via_natural.choice["delta_method"]["se"], rel=1e-5)


def design_incentives_with(uncertainty_record: dict) -> float:
    """The delta-method se of the goal from a saved-fit-like object carrying the record."""

    class Saved:
        record = uncertainty_record
        params = pd.DataFrame({"se": [np.nan, np.nan]}, index=["r", "precision"])

        def contest_input(self):
            return {**FIT_BASE, "model": build_model("crra+qre", max_target=8)}

    return design_incentives(Saved(), "efficiency", (5.0, 5.0), **DESIGN).choice["delta_method"][
        "se"
    ]


def test_a_covariance_whose_centre_is_not_the_estimate_is_not_used():
    model = build_model("crra+qre", max_target=8)
    record = {"coefficients": {"z": [0.0, 0.0], "covariance": [[1, 0], [0, 1]]}, "spec": {}}
    uncertainty, notes = from_saved_record(record, model, THETA, {"r": 0.05})
    assert uncertainty.scale == "natural" and uncertainty.names == ("r",)
    assert "no usable covariance" in notes[0]
