"""Slow statistical checks of the Bayesian engine (run with `make test-slow`)."""

from __future__ import annotations

import jax
import numpy as np
import pandas as pd
import pytest

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.bayes.fit import fit_bayes
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model


@pytest.mark.slow
def test_flat_prior_posterior_matches_maximum_likelihood():
    # Bernstein-von Mises: with a flat prior and much data the posterior is close to
    # Normal(MLE, inverse observed information) (van der Vaart 1998, ch. 10; common practice).
    model = build_model("crra+planner+logit", max_target=60)
    design = stopping_design(80, 50, (0.6, 0.75, 0.9), 1.0, 7)
    frame = model.simulate({"r": 0.4, "precision": 2.0}, design, jax.random.PRNGKey(7))
    data = to_stopping_data(frame)
    ml = fit_mle(model, data, se="hessian", progress=False)
    post = fit_bayes(
        model,
        data,
        priors={"r": "uniform(-3, 5)", "precision": "uniform(0, 1000)"},
        chains=4,
        draws=1000,
        warmup=500,
        seed=1,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    assert post.converged, post.warnings
    for name in ("r", "precision"):
        mean, sd = post.params.loc[name, ["estimate", "se"]]
        est, se = ml.params.loc[name, ["estimate", "se"]]
        assert abs(mean - est) < 0.1 * sd, (name, mean, est, sd)
        assert sd == pytest.approx(se, rel=0.15), (name, sd, se)


@pytest.mark.slow
def test_hierarchical_recovers_population_mean_and_sd_of_r():
    model = build_model("crra+myopic+logit")
    spec_r = model.spec("r")
    rng = np.random.default_rng(20)
    n = 120
    mu_z, sd_z = float(spec_r.to_unconstrained(0.3)), 0.12  # sd(r) about 0.24 on r's scale
    z_r = rng.normal(mu_z, sd_z, n)
    r = np.asarray(spec_r.to_natural(z_r))
    precision = np.exp(rng.normal(np.log(1.5), 0.2, n))
    design = stopping_design(n, 40, (0.6, 0.8, 0.9), 1.0, 21)
    frames = []
    for i, (_, sub) in enumerate(design.groupby("subject", sort=True)):
        frames.append(
            model.simulate(
                {"r": float(r[i]), "precision": float(precision[i])},
                sub,
                jax.random.PRNGKey(100 + i),
            )
        )
    data = to_stopping_data(pd.concat(frames, ignore_index=True))
    post = fit_bayes(
        model,
        data,
        hierarchical=True,
        chains=4,
        draws=1000,
        warmup=1000,
        seed=3,
        init="mle",
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    # population mean and sd of r on its natural scale, from the generating distribution
    draws = np.asarray(spec_r.to_natural(mu_z + sd_z * np.random.default_rng(0).normal(size=10**6)))
    truth = {"r: population mean": draws.mean(), "r: between-subject sd": draws.std()}
    for name, value in truth.items():
        lo, hi = np.quantile(post.draws(name), [0.05, 0.95])
        assert lo < value < hi, (name, lo, value, hi)
    assert post.diagnostics["max_rhat"] < 1.05
