"""Per-subject whitening of hierarchical fits (estimation/bayes/whiten.py) and hierarchical
fits of gains-only data, whose loss-side parameters never enter the likelihood (issue 16)."""

from __future__ import annotations

import jax
import numpy as np
import pandas as pd
import pytest

from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.estimation.bayes import initial
from stopwise.estimation.bayes.fit import fit_bayes
from stopwise.estimation.bayes.fit_steps import subject_start
from stopwise.estimation.bayes.whiten import (
    WHITE_SITE,
    build_whitening,
    likelihood_precision,
    sites_from_white,
    unwhiten_samples,
    white_from_sites,
)
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model


def test_whitening_factor_is_the_normal_posterior_covariance():
    # Centred parameters: the posterior of x_s under a normal likelihood N(z_hat, C) and a
    # normal population prior N(mu, diag(sd^2)) has covariance (C^-1 + diag(sd^-2))^-1
    # (product of two normal densities; Bishop 2006, PRML eq. 2.116, from memory).
    # Non-centred k (x = eta, z = mu + sd eta): precision sd C^-1 sd + 1 on that coordinate.
    cov = np.array([[[0.04, 0.03], [0.03, 0.09]], [[0.25, -0.1], [-0.1, 0.16]]])
    sd = np.array([0.3, 0.5])
    start = np.array([[0.1, -0.2], [0.4, 0.3]])
    for centred in ((True, True), (True, False)):
        w = build_whitening(start, cov, sd, centred)
        d = np.where(centred, 1.0, sd)
        q = np.where(centred, 1.0 / sd**2, 1.0)
        for s in range(2):
            expected = np.linalg.inv(np.diag(d) @ np.linalg.inv(cov[s]) @ np.diag(d) + np.diag(q))
            got = w.tril[s] @ w.tril[s].T
            np.testing.assert_allclose(got, expected, rtol=1e-12)
            assert np.allclose(np.triu(w.tril[s], 1), 0.0)


def test_unknown_or_fixed_variances_carry_no_information():
    # a parameter held fixed in the ML fit (NaN row and column) gets no likelihood
    # precision; the others keep the inverse of their finite block
    cov = np.array([[0.04, np.nan, 0.01], [np.nan, np.nan, np.nan], [0.01, np.nan, 0.09]])
    h = likelihood_precision(cov)
    block = np.linalg.inv(np.array([[0.04, 0.01], [0.01, 0.09]]))
    np.testing.assert_allclose(h[np.ix_([0, 2], [0, 2])], block, rtol=1e-12)
    assert np.all(h[1] == 0.0) and np.all(h[:, 1] == 0.0)
    assert np.all(likelihood_precision(np.array([[1.0, 2.0], [2.0, 1.0]])) == 0.0)  # indefinite
    w = build_whitening(np.zeros((1, 2)), None, np.array([0.5, 2.0]), (True, True))
    np.testing.assert_allclose(w.tril[0], np.diag([0.5, 2.0]), rtol=1e-12)  # prior only


def test_white_coordinates_map_back_to_the_sites():
    rng = np.random.default_rng(3)
    cov = np.stack([np.eye(2) * 0.1 + 0.05 for _ in range(4)])
    w = build_whitening(rng.normal(size=(4, 2)), cov, np.array([0.4, 0.7]), (True, False))
    x = rng.normal(size=(4, 2))
    white = white_from_sites(x, w)
    np.testing.assert_allclose(np.asarray(sites_from_white(white, w)), x, atol=1e-12)
    draws = rng.normal(size=(2, 3, 4, 2))  # chains, draws, subjects, parameters
    out = unwhiten_samples({WHITE_SITE: draws, "sd_z": np.ones((2, 3, 2))}, w, ("a", "b"))
    assert WHITE_SITE not in out and out["sd_z"].shape == (2, 3, 2)
    expected = np.asarray(sites_from_white(draws[1, 2], w))
    np.testing.assert_allclose(out["b"][1, 2], expected[:, 1], atol=1e-12)


def invented_subjects(spec: str, thetas: list[dict[str, float]], trials: int, seed: int):
    """Invented stopping data: one subject per entry of ``thetas`` (gains only: bank 0 at
    the start, nothing kept on a bust)."""
    design = stopping_design(len(thetas), trials, (0.7, 0.9), 1.0, seed)
    model = build_model(spec)
    frames = [
        model.simulate(theta, sub, jax.random.PRNGKey(i))
        for i, ((_, sub), theta) in enumerate(zip(design.groupby("subject"), thetas))
    ]
    return model, to_stopping_data(pd.concat(frames, ignore_index=True))


def test_gains_only_hierarchical_start_puts_the_loss_side_at_its_prior():
    # beta, loss_aversion and delta never enter the likelihood of gains-only data; the
    # per-subject fits hold them fixed, the start takes them from their priors and samples
    # them non-centred, and a note says so (as the pooled fit does)
    theta = {"alpha": 0.7, "beta": 0.8, "loss_aversion": 1.5, "gamma": 0.7, "delta": 0.7}
    thetas = [theta | {"precision": 2.0 + 0.2 * i} for i in range(5)]
    model, data = invented_subjects("pt+tk+target+logit", thetas, 12, seed=4)
    notes: list[str] = []
    start, form = subject_start(
        model, data, True, None, model.start_theta(), "auto", notes, ML_POINT_FITS
    )
    names = list(model.param_names)
    absent = [names.index(n) for n in ("beta", "loss_aversion", "delta")]
    assert start.absent == tuple(absent)
    assert not any(form[j] for j in absent)
    assert any("not identified by these data: beta, loss_aversion, delta" in n for n in notes)
    assert start.n_identified >= 3  # the per-subject fits are not spoilt by the loss side
    for j in absent:
        median, width = initial.prior_median_and_sd(
            initial.resolve_priors(model)[names[j]], model.spec(names[j])
        )
        assert start.mu[j] == pytest.approx(median) and np.all(start.subject_z[:, j] == median)
        assert start.prior_var[j] == pytest.approx(width**2)
        # median of HalfNormal(1): Phi^-1(0.75) = 0.6745 (fact of the trade)
        assert start.sd[j] == pytest.approx(0.6745)


@pytest.mark.slow
def test_gains_only_hierarchical_fit_samples_the_loss_side_from_its_prior():
    theta = {"alpha": 0.7, "beta": 0.8, "loss_aversion": 1.5, "gamma": 0.7, "delta": 0.7}
    thetas = [theta | {"precision": 2.0 + 0.2 * i} for i in range(5)]
    model, data = invented_subjects("pt+tk+target+logit", thetas, 12, seed=4)
    post = fit_bayes(
        model,
        data,
        hierarchical=True,
        chains=2,
        draws=200,
        warmup=200,
        seed=1,
        progress=False,
        loo="trial",
        point_fits=ML_POINT_FITS,
    )
    assert any("not identified by these data" in n for n in post.notes)
    form = post.run["parametrisation"]  # e.g. "centred: alpha; non-centred: beta, ..."
    centred = "" if form == "non-centred" else form.split(";")[0]
    assert form != "centred" and not any(n in centred for n in ("beta", "loss_aversion"))
    assert "delta" not in centred
    assert post.diagnostics["divergences"] <= 4


@pytest.mark.slow
def test_whitened_and_plain_subject_sites_give_the_same_posterior():
    # the whitening is a fixed affine map with a constant Jacobian, so both runs sample one
    # posterior: population means agree within 4 combined Monte Carlo standard errors
    # (ArviZ's MCSE; the bound is common practice, no source)
    import arviz as az

    thetas = [{"r": 0.1 + 0.08 * i, "precision": 1.0 + 0.3 * i} for i in range(8)]
    model, data = invented_subjects("crra+myopic+logit", thetas, 15, seed=7)
    runs = []
    for whiten in (True, False):
        post = fit_bayes(
            model,
            data,
            hierarchical=True,
            chains=2,
            draws=400,
            warmup=300,
            seed=3,
            progress=False,
            loo="trial",
            whiten_subjects=whiten,
            point_fits=ML_POINT_FITS,
        )
        assert post.run["subject_whitening"] is whiten
        runs.append(post)
    for name in ("r: population median", "precision: population median", "r: between-subject sd"):
        means, errors = [], []
        for post in runs:
            draws = np.asarray(post.draws(name)).reshape(2, -1)
            means.append(draws.mean())
            errors.append(float(az.mcse(az.convert_to_dataset(draws[..., None]))["x"].values[0]))
        assert abs(means[0] - means[1]) < 4 * np.hypot(*errors), (name, means, errors)
