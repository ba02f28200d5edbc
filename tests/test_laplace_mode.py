"""The pooled sampler's start: the mode and covariance of the Laplace posterior
N(z_hat, C) x p(z) (estimation/bayes/laplace_mode.py), checked against closed forms and
scipy's optimiser, on the cases where it moves the start away from the ML point."""

from __future__ import annotations

import jax.numpy as jnp
import numpy as np
import pytest
from scipy import optimize

from stopwise.estimation.bayes.laplace_mode import (
    laplace_mode,
    laplace_mode_from_precision,
    prior_terms,
)
from stopwise.estimation.bayes.pooled_start import lazy_start


def logistic_prior(centre: np.ndarray, scale: np.ndarray):
    """log p(z) = sum_j log of the logistic density at (z_j - centre_j) / scale_j, as
    (log p, grad, -hessian) through prior_terms, and the same log p in plain numpy."""

    def log_prior(at):
        u = (at["z"] - centre) / scale
        return jnp.sum(-u - 2.0 * jnp.log1p(jnp.exp(-u)) - jnp.log(scale))

    def numpy_log_prior(z):
        u = (z - centre) / scale
        return float(np.sum(-u - 2.0 * np.log1p(np.exp(-u)) - np.log(scale)))

    return prior_terms(log_prior, ("z",), (len(centre),)), numpy_log_prior


def test_gaussian_prior_gives_the_conjugate_posterior():
    # conjugate normal (common practice, no source): precision H + S^-1, mean
    # (H + S^-1)^-1 (H z_hat + S^-1 m), computed here with plain numpy
    z_hat, ml_cov = np.array([2.0, -1.0]), np.array([[4.0, 1.0], [1.0, 2.0]])
    m, prior_cov = np.array([0.5, 0.0]), np.array([[1.0, 0.3], [0.3, 0.5]])
    s_inv = np.linalg.inv(prior_cov)

    def gaussian(z):
        d = z - m
        return -0.5 * d @ s_inv @ d, -s_inv @ d, s_inv

    found = laplace_mode(z_hat, ml_cov, gaussian)
    h = np.linalg.inv(ml_cov)
    expected_cov = np.linalg.inv(h + s_inv)
    np.testing.assert_allclose(found.cov, expected_cov, rtol=1e-10)
    np.testing.assert_allclose(found.mode, expected_cov @ (h @ z_hat + s_inv @ m), rtol=1e-10)
    assert found.converged and found.steps <= 3


def test_flat_likelihood_direction_starts_inside_the_prior():
    # the case of the calibration study (issue 16): the ML point lies far out in the prior's
    # tail (z = 4.5) with an ML sd of about 2,000 in that direction; the other coordinate is
    # well measured. The logistic prior curves less and less in its tails, so Newton must
    # cross a region where the prior alone barely pulls.
    z_hat = np.array([4.5, 0.3])
    ml_cov = np.array([[2000.0**2, 0.0], [0.0, 0.01]])
    prior, numpy_log_prior = logistic_prior(np.array([0.0, 0.0]), np.array([0.5, 1.0]))
    found = laplace_mode(z_hat, ml_cov, prior)
    h = np.linalg.inv(ml_cov)

    def f(z):
        d = z - z_hat
        return 0.5 * d @ h @ d - numpy_log_prior(z)

    # independent: scipy's Nelder-Mead on the same objective written in numpy
    reference = optimize.minimize(
        f, np.zeros(2), method="Nelder-Mead", options={"xatol": 1e-9, "fatol": 1e-14}
    )
    np.testing.assert_allclose(found.mode, reference.x, atol=1e-5)
    assert abs(found.mode[0]) < 0.01 and found.mode[0] != pytest.approx(z_hat[0], abs=1.0)
    # covariance: inverse of H plus the numeric curvature of -log p at the mode
    eps = 1e-4
    curvature = np.zeros((2, 2))
    for i in range(2):
        for j in range(2):
            e_i, e_j = np.eye(2)[i] * eps, np.eye(2)[j] * eps
            curvature[i, j] = -(
                numpy_log_prior(found.mode + e_i + e_j)
                - numpy_log_prior(found.mode + e_i - e_j)
                - numpy_log_prior(found.mode - e_i + e_j)
                + numpy_log_prior(found.mode - e_i - e_j)
            ) / (4 * eps * eps)
    np.testing.assert_allclose(found.cov, np.linalg.inv(h + curvature), rtol=1e-5)
    # the start's sd in the flat direction is the prior's (logistic variance s^2 pi^2 / 3
    # has curvature 1 / (2 s^2) at its mode), not the ML sd of 2,000
    assert np.sqrt(found.cov[0, 0]) == pytest.approx(np.sqrt(2.0) * 0.5, rel=1e-3)


def test_informative_data_keep_the_ml_point():
    z_hat, ml_cov = np.array([0.8, -0.4]), np.diag([1e-6, 4e-6])
    prior, _ = logistic_prior(np.array([0.0, 0.0]), np.array([1.0, 1.0]))
    found = laplace_mode(z_hat, ml_cov, prior)
    np.testing.assert_allclose(found.mode, z_hat, atol=1e-6)
    np.testing.assert_allclose(found.cov, ml_cov, rtol=1e-5)


def test_prior_terms_match_finite_differences():
    sites = ("z_a", "b_a")
    sizes = (1, 2)

    def log_prior(at):
        return (
            jnp.log(jnp.cosh(at["z_a"])) * -2.0  # a smooth non-Gaussian density of z
            + jnp.sum(-0.5 * at["b_a"] ** 2 / 4.0)
        )

    log_p, grad, precision = prior_terms(log_prior, sites, sizes)(np.array([0.3, 0.1, -0.2]))

    # central differences of the same density written with numpy (independent code path)
    def f(x):
        return -2.0 * np.log(np.cosh(x[0])) - np.sum(0.5 * x[1:] ** 2 / 4.0)

    x0, h = np.array([0.3, 0.1, -0.2]), 1e-4
    assert log_p == pytest.approx(f(x0), rel=1e-12)
    numeric_grad = [
        (f(x0 + np.eye(3)[i] * h) - f(x0 - np.eye(3)[i] * h)) / (2 * h) for i in range(3)
    ]
    np.testing.assert_allclose(grad, numeric_grad, atol=1e-7)
    numeric = np.zeros((3, 3))
    for i in range(3):
        for j in range(3):
            e_i, e_j = np.eye(3)[i] * h, np.eye(3)[j] * h
            numeric[i, j] = -(
                f(x0 + e_i + e_j) - f(x0 + e_i - e_j) - f(x0 - e_i + e_j) + f(x0 - e_i - e_j)
            ) / (4 * h * h)
    np.testing.assert_allclose(precision, numeric, atol=1e-6)


def test_an_overshooting_step_beyond_the_prior_range_is_halved_back():
    # a heavy-tailed prior (log p = -log(1 + z^2) + log sqrt(1 - (z/50)^2) per coordinate,
    # curving upwards for 1 < |z| << 50) that is undefined (NaN) beyond |z| = 50, three coordinates as in the crra+ch
    # calibration study, and a likelihood that says almost nothing about the first (ML sd
    # 636): from z_hat the full Newton step lands where the prior is NaN, and LAPACK's
    # eigensolver fails on a NaN 3 x 3 matrix ("Eigenvalues did not converge", which ended
    # a replication of that study). The search must halve back and find the mode.
    z_hat = np.array([3.0, 0.5, -0.2])
    ml_cov = np.diag([636.0**2, 0.04, 0.09])

    def log_prior(at):
        z = at["z"]
        return jnp.sum(-jnp.log1p(z**2) + jnp.log(jnp.sqrt(1.0 - (z / 50.0) ** 2)))  # NaN, with its
        # derivatives, beyond |z| = 50

    prior = prior_terms(log_prior, ("z",), (3,))
    h = np.linalg.inv(ml_cov)
    _, grad, _ = prior(z_hat)
    full_step = -np.linalg.solve(h, -grad)  # P+ is 0 along the first axis at z = 3
    assert abs(z_hat[0] + full_step[0]) > 50.0  # the case is the one it claims to be
    found = laplace_mode(z_hat, ml_cov, prior)

    def f(z):  # the same objective in numpy, minimised by scipy (independent)
        d = z - z_hat
        return 0.5 * d @ h @ d + np.sum(np.log1p(z**2) - np.log(np.sqrt(1.0 - (z / 50.0) ** 2)))

    reference = optimize.minimize(
        f, np.zeros(3), method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-14}
    )
    assert np.all(np.isfinite(found.cov)) and np.all(np.linalg.eigvalsh(found.cov) > 0)
    np.testing.assert_allclose(found.mode, reference.x, atol=1e-5)


def test_a_prior_undefined_at_the_ml_point_keeps_the_ml_start():
    z_hat, ml_cov = np.array([60.0, 0.0]), np.diag([4.0, 1.0])

    def log_prior(at):
        z = at["z"]
        return jnp.sum(jnp.log(jnp.sqrt(1.0 - (z / 50.0) ** 2)))

    found = laplace_mode(z_hat, ml_cov, prior_terms(log_prior, ("z",), (2,)))
    assert not found.converged and found.steps == 0
    np.testing.assert_array_equal(found.mode, z_hat)
    np.testing.assert_array_equal(found.cov, ml_cov)


def test_a_singular_likelihood_curvature_is_filled_by_the_prior():
    # an ML Hessian of rank 1 (the data measure z_0 + 2 z_1 only; no ML covariance exists)
    # with a Gaussian prior: the conjugate closed form still holds with H singular
    # (common practice, no source): precision H + S^-1, mode (H + S^-1)^-1 (H z_hat + S^-1 m),
    # computed with plain numpy. The former start kept z_hat and the identity here.
    v = np.array([1.0, 2.0])
    h = 40.0 * np.outer(v, v)
    z_hat = np.array([1.5, -0.5])
    m, s_inv = np.array([0.2, 0.1]), np.diag([1.0 / 6.25, 1.0 / 6.25])

    def gaussian(z):
        d = z - m
        return -0.5 * d @ s_inv @ d, -s_inv @ d, s_inv

    found = laplace_mode_from_precision(z_hat, h, gaussian)
    expected_cov = np.linalg.inv(h + s_inv)
    np.testing.assert_allclose(found.cov, expected_cov, rtol=1e-10)
    np.testing.assert_allclose(found.mode, expected_cov @ (h @ z_hat + s_inv @ m), rtol=1e-9)
    assert found.converged
    flat = np.array([2.0, -1.0]) / np.sqrt(5.0)  # the direction the data leave flat
    assert flat @ found.cov @ flat == pytest.approx(6.25, rel=1e-9)  # the prior's variance
    assert abs(flat @ (found.mode - z_hat)) > 0.5  # the start moved along it


def test_a_direction_flat_in_likelihood_and_prior_gives_no_laplace_start():
    # rank-1 H and a prior that does not curve along the other direction: no covariance
    h = 40.0 * np.outer([1.0, 2.0], [1.0, 2.0])

    def flat_prior(z):
        return 0.0, np.zeros(2), np.zeros((2, 2))

    assert laplace_mode_from_precision(np.array([1.0, 0.0]), h, flat_prior) is None


def test_an_ml_point_run_off_along_the_flat_direction_starts_the_search_at_the_prior_centre():
    # the crra+logit calibration study's case: the data leave z_0 flat, the ML optimiser
    # stopped at z_0 = -25, where the logistic prior's log density is linear to 1e-11 (its
    # curvature 2 s(1 - s) is 3e-11), so H + P+ is singular there and Newton cannot step.
    # Started at the prior's centre instead, the search must reach the same mode as scipy's
    # optimiser on the same objective written in numpy (independent).
    z_hat = np.array([-25.0, 0.3])
    h = np.diag([0.0, 50.0])
    prior, numpy_log_prior = logistic_prior(np.array([0.0, 0.0]), np.array([1.0, 1.0]))
    assert laplace_mode_from_precision(z_hat, h, prior) is None
    found = laplace_mode_from_precision(z_hat, h, prior, (np.zeros(2),))

    def f(z):
        d = z - z_hat
        return 0.5 * d @ h @ d - numpy_log_prior(z)

    reference = optimize.minimize(
        f, np.zeros(2), method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-14}
    )
    assert found.converged
    np.testing.assert_allclose(found.mode, reference.x, atol=1e-6)
    assert abs(found.mode[0]) < 1e-6  # the prior's mode, 25 units from the ML point
    # sd along the flat direction: the logistic prior's curvature 1/2 at its mode
    assert found.cov[0, 0] == pytest.approx(2.0, rel=1e-6)


def test_the_other_starts_are_computed_only_when_the_ml_point_cannot_start_the_search():
    # the prior's centre costs seconds of compilation on a first call: the pooled start hands
    # it over lazily (estimation/bayes/pooled_start.py, ``lazy_start``)
    h = np.diag([0.0, 50.0])
    prior, _ = logistic_prior(np.array([0.0, 0.0]), np.array([1.0, 1.0]))
    asked: list[str] = []

    def centre() -> np.ndarray:
        asked.append("centre")
        return np.zeros(2)

    near = laplace_mode_from_precision(np.array([0.5, 0.3]), h, prior, lazy_start(centre, [0, 1]))
    assert near is not None and near.converged and asked == []
    far = laplace_mode_from_precision(np.array([-25.0, 0.3]), h, prior, lazy_start(centre, [0, 1]))
    assert far is not None and far.converged and asked == ["centre"]
    assert abs(far.mode[0]) < 1e-6  # the case of the test above, reached through the lazy start
