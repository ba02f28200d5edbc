"""Hierarchical start values, the centred/non-centred rule and the two parametrisations."""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import numpyro.distributions as dist
import pytest
from scipy import stats

import stopwise  # noqa: F401  (enables float64 before jax is used)
from stopwise.data_schemas.bundle import to_stopping_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes import density as bayes_density
from stopwise.estimation.bayes import fit as bayes
from stopwise.estimation.bayes import initial
from stopwise.estimation.bayes import prepare as preparation
from stopwise.estimation.bayes.subject_start import (
    CENTRED_MIN_ROWS,
    SD_FLOOR,
    SubjectStart,
    choose_parametrisation,
    describe_parametrisation,
    init_near,
    robust_spread,
    start_variances,
    summarise_subject_fits,
)
from stopwise.estimation.ml.point_fits import ML_POINT_FITS
from stopwise.estimation.ml.recovery import stopping_design
from stopwise.models.spec import build_model


def test_robust_spread_is_the_normal_consistent_mad():
    # scipy's median_abs_deviation with scale="normal" divides by Phi^{-1}(3/4) = 0.6745
    # (Rousseeuw & Croux 1993; scipy.stats reference implementation).
    x = np.random.default_rng(3).normal(1.0, 0.4, 501)
    expected = stats.median_abs_deviation(x, scale="normal")
    assert robust_spread(x) == pytest.approx(expected, rel=1e-4)
    assert np.isnan(robust_spread(np.array([])))


def test_subject_starts_are_clipped_and_unidentified_subjects_sit_at_mu():
    rng = np.random.default_rng(0)
    z = np.column_stack([rng.normal(0.2, 0.3, 40), rng.normal(1.0, 0.5, 40)])
    z[0] = [50.0, 1.0]  # a runaway estimate
    z[1] = [np.nan, 0.0]  # a failed fit
    se = np.full_like(z, 0.1)
    identified = np.ones(40, bool)
    identified[2] = False
    start = summarise_subject_fits(z, se, identified)
    good = np.delete(z, [1, 2], axis=0)
    np.testing.assert_allclose(start.mu, np.median(good, axis=0))
    assert start.n_identified == 38
    np.testing.assert_allclose(start.subject_z[1], start.mu)
    np.testing.assert_allclose(start.subject_z[2], start.mu)
    assert start.subject_z[0, 0] == pytest.approx(start.mu[0] + 3 * start.sd[0])
    np.testing.assert_allclose(start.subject_z[5], z[5])
    spread = np.array([stats.median_abs_deviation(good[:, j], scale="normal") for j in (0, 1)])
    between = np.sqrt(spread**2 - 0.1**2)  # estimation noise removed
    np.testing.assert_allclose(start.sd, between, rtol=1e-4)
    np.testing.assert_allclose(start.ratio, 0.1 / between, rtol=1e-4)
    same = summarise_subject_fits(np.zeros((5, 1)), np.ones((5, 1)), np.ones(5, bool))
    assert same.sd[0] == SD_FLOOR


def test_parametrisation_rule():
    def start(ratio):
        k = len(ratio)
        return SubjectStart(np.zeros(k), np.ones(k), np.zeros((3, k)), np.array(ratio), 3, "")

    assert choose_parametrisation("auto", start([0.3, 0.45]), 10) == (True, True)
    assert choose_parametrisation("auto", start([0.3, 0.8]), 10) == (True, False)
    assert choose_parametrisation("auto", start([0.3, 1.5]), 1000) == (True, False)
    assert choose_parametrisation("auto", start([np.inf]), 1000) == (False,)
    assert choose_parametrisation("auto", start([np.nan]), CENTRED_MIN_ROWS) == (True,)
    assert choose_parametrisation("auto", start([np.nan]), CENTRED_MIN_ROWS - 1) == (False,)
    assert choose_parametrisation("noncentred", start([0.1, 0.1]), 10) == (False, False)
    assert describe_parametrisation(("r", "precision"), (True, False)) == (
        "centred: r; non-centred: precision"
    )
    with pytest.raises(ValueError):
        choose_parametrisation("sideways", start([0.1]), 10)


def test_init_near_keeps_constrained_sites_valid():
    key = jax.random.PRNGKey(1)
    positive = {
        "type": "sample",
        "is_observed": False,
        "name": "sd",
        "fn": dist.HalfNormal(1.0).expand([3]).to_event(1),
        "kwargs": {"rng_key": key, "sample_shape": ()},
    }
    value = np.asarray(init_near(positive, values={"sd": np.array([0.05, 0.5, 2.0])}, jitter=0.1))
    ratio = value / np.array([0.05, 0.5, 2.0])
    assert np.all((ratio > np.exp(-0.1)) & (ratio < np.exp(0.1)))
    chol = {**positive, "name": "L", "fn": dist.LKJCholesky(3, 2.0)}
    value = np.asarray(init_near(chol, values={"L": np.eye(3)}, jitter=0.1))
    np.testing.assert_allclose(np.sum(value**2, axis=1), 1.0, rtol=1e-12)  # unit rows
    assert np.allclose(np.triu(value, 1), 0.0)


@pytest.fixture(scope="module")
def small_stopping():
    model = build_model("crra+myopic+logit")
    design = stopping_design(6, 10, (0.7, 0.9), 1.0, 5)
    frames = []
    for i, (_, sub) in enumerate(design.groupby("subject")):
        theta = {"r": 0.2 + 0.05 * i, "precision": 1.5}
        frames.append(model.simulate(theta, sub, jax.random.PRNGKey(i)))
    import pandas as pd

    return model, to_stopping_data(pd.concat(frames, ignore_index=True))


@pytest.mark.slow
def test_centred_and_noncentred_sites_give_the_same_offsets_and_density(small_stopping):
    # Every per-parameter choice describes the same u_s = diag(sd) L eta_s ~ MVN(0, Sigma):
    # equal offsets, equal likelihood, and a density that differs from the non-centred one
    # only by the Jacobian -n sum_{k centred} log c_k (change of variables; common practice).
    model, data = small_stopping
    kw = dict(hierarchical=True, formulas=None, priors=None, pointwise="trial")
    rng = np.random.default_rng(1)
    n = data.n_subjects
    sd = jnp.array([0.3, 0.6])
    angle = 0.4
    chol = jnp.array([[1.0, 0.0], [np.sin(angle), np.cos(angle)]])
    eta = jnp.asarray(rng.normal(size=(n, 2)))
    mu = jnp.array([0.1, 0.4])
    common = {"z_r": mu[0], "z_precision": mu[1], "sd_z": sd, "L_corr": chol}
    u = eta @ (sd[:, None] * chol).T
    # reference density: MVN(u_s; 0, Sigma) (numpyro's MultivariateNormal) + hyperpriors
    reference = float(
        jnp.sum(dist.MultivariateNormal(jnp.zeros(2), scale_tril=sd[:, None] * chol).log_prob(u))
        + jnp.sum(dist.HalfNormal(1.0).log_prob(sd))
        + dist.LKJCholesky(2, 2.0).log_prob(chol)
    )
    values = []
    for centred in ((False, False), (True, True), (True, False), (False, True)):
        setup, args, *_ = preparation.prepare(model, data, centred=centred, **kw)
        sites = dict(common)
        for k, name in enumerate(("r", "precision")):
            if centred[k]:
                sites[f"z_subject_{name}"] = mu[k] + u[:, k]
            else:
                sites[f"eta_{name}"] = eta[:, k]
        np.testing.assert_allclose(bayes_density.subject_offsets(setup, sites), u, atol=1e-12)
        values.append(float(bayes_density.total_loglik(setup, sites, args)))
        density = float(bayes_density.hierarchical_log_density(setup, sites))
        # MVN(u) = prod_k N(eta_k) / c_k: the all-centred form equals the MVN density
        c = np.diag(np.asarray(sd[:, None] * chol))
        log_c = float(np.sum(np.log(c)[~np.asarray(centred)]))
        assert density == pytest.approx(reference + n * log_c, rel=1e-10)
    assert max(values) - min(values) < 1e-9 * abs(values[0])


@pytest.mark.slow
def test_forced_parametrisations_are_recorded_and_checked(small_stopping):
    model, data = small_stopping
    for form in ("centred", "noncentred"):
        post = bayes.fit_bayes(
            model,
            data,
            hierarchical=True,
            parametrisation=form,
            chains=1,
            draws=30,
            warmup=30,
            progress=False,
            point_fits=ML_POINT_FITS,
        )
        expected = "centred" if form == "centred" else "non-centred"
        assert post.run["parametrisation"] == expected and post.run["dense_mass"] is True
        assert any("per-subject ML fits" in note for note in post.notes)
        assert np.all(np.isfinite(post.draws("r: population median")))
        assert expected in post.summary()
        assert any("R-hat cannot be computed" in w for w in post.warnings)  # one chain
        assert post.converged is False
    with pytest.raises(StopwiseInputError, match="parametrisation"):
        bayes.fit_bayes(
            model,
            data,
            hierarchical=True,
            parametrisation="both",
            progress=False,
            point_fits=ML_POINT_FITS,
        )


def test_start_variances_are_normal_approximations():
    # Subject: the posterior variance of a normal mean with a normal prior,
    # 1 / (1/se^2 + 1/sd^2) (conjugate normal model; Gelman et al. 2013, BDA3 sec. 2.5,
    # from memory); the prior variance sd^2 where the subject has no standard error.
    # Population mean: Var of a mean of n values with variance sd^2 + se^2 (common practice,
    # no source); log sd: delta method, Var(log s) = (1 + ratio^2)^2 / (2n) (common practice).
    se = np.array([[0.1, np.nan], [0.2, 0.5], [0.1, 0.5], [0.3, 0.4]])
    start = SubjectStart(
        mu=np.zeros(2),
        sd=np.array([0.2, 1.0]),
        subject_z=np.zeros((4, 2)),
        ratio=np.array([0.5, np.nan]),
        n_identified=4,
        note="",
        subject_se=se,
    )
    v = start_variances(start)
    assert v.subject[0, 0] == pytest.approx(1.0 / (1.0 / 0.01 + 1.0 / 0.04))
    assert v.subject[0, 1] == pytest.approx(1.0)  # no se: the prior variance sd^2
    assert v.subject[1, 1] == pytest.approx(1.0 / (1.0 / 0.25 + 1.0))
    assert np.all(v.subject <= start.sd**2)
    assert v.intercept == pytest.approx([(0.04 + 0.15**2) / 4, (1.0 + 0.5**2) / 4])
    assert v.log_sd == pytest.approx([(1.25**2) / 8, 4.0 / 8])
    assert v.correlation == pytest.approx(0.25)


@pytest.mark.parametrize("dense", [True, False])
@pytest.mark.slow
def test_initial_inverse_mass_covers_every_sampled_coordinate(small_stopping, dense):
    from functools import partial

    from numpyro.infer.util import initialize_model

    model, data = small_stopping
    notes: list[str] = []
    start = initial.hierarchical_start(model, data, None, notes, ML_POINT_FITS)
    for centred in ((True, False), (False, True)):
        setup, args, *_ = preparation.prepare(
            model,
            data,
            hierarchical=True,
            formulas=None,
            priors=None,
            pointwise="trial",
            centred=centred,
        )
        blocks = initial.initial_inverse_mass(setup, start, args, dense)
        info = initialize_model(
            jax.random.PRNGKey(0), partial(bayes_density.numpyro_model, setup), model_args=(args,)
        )
        unconstrained = info.param_info.z
        covered = sorted(site for key in blocks for site in key)
        assert covered == sorted(unconstrained)
        for key, block in blocks.items():
            size = sum(np.size(unconstrained[site]) for site in key)
            block = np.asarray(block)
            assert block.shape == ((size, size) if block.ndim == 2 else (size,))
            diagonal = np.diag(block) if block.ndim == 2 else block
            assert np.all(np.isfinite(diagonal)) and np.all(diagonal > 0)
        assert (bayes_density.population_sites(setup) in blocks) is dense
        subject_site = "z_subject_r" if centred[0] else "eta_r"
        expected = start_variances(start).subject[:, 0]
        if not centred[0]:
            expected = expected / start.sd[0] ** 2
        np.testing.assert_allclose(blocks[(subject_site,)], expected)


@pytest.mark.slow
def test_contest_models_start_every_subject_at_the_pooled_estimate(monkeypatch):
    # One equilibrium per subject inside per-subject Newton fits is far too slow for a start
    # (16 demo subjects: not done in 10 minutes), so contest models skip those fits.
    import pandas as pd

    from stopwise.estimation.ml.mle import fit_mle
    from stopwise.models.contest.build import build_contest_model

    n, trials = 8, 10
    design = pd.DataFrame(
        {
            "subject": np.repeat(np.arange(n), trials),
            "trial": np.tile(np.arange(trials), n),
            "p_survive": 0.8,
            "gain": 1.0,
            "n_players": 2,
            "prize": 10.0,
            "keep_bank": 0,
        }
    )
    model = build_contest_model(["linear", "qre"], max_target=6)
    data = to_stopping_data(model.simulate({"precision": 1.5}, design, jax.random.PRNGKey(2)))

    def refuse(*_args, **_kw):
        raise AssertionError("per-subject fits were run for a contest model")

    monkeypatch.setattr(initial, "per_subject_fits", refuse)
    notes: list[str] = []
    start = initial.hierarchical_start(model, data, None, notes, ML_POINT_FITS)
    pooled = fit_mle(model, data, se=None, progress=False)
    expected = float(model.spec("precision").to_unconstrained(pooled.estimates()["precision"]))
    assert start.mu[0] == pytest.approx(expected, rel=1e-6)
    np.testing.assert_allclose(start.subject_z, expected, rtol=1e-6)
    assert any("contest model" in note for note in notes)
    post = bayes.fit_bayes(
        model,
        data,
        hierarchical=True,
        chains=1,
        draws=10,
        warmup=10,
        progress=False,
        point_fits=ML_POINT_FITS,
    )
    assert np.all(np.isfinite(post.draws("precision: population median")))
    assert any("contest model" in note for note in post.notes)
