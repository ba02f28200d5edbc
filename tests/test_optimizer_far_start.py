"""A start far out on the likelihood surface (a gradient near 1e100, as the probit model
gives at r = 2.3 where a bank of 0 has no finite CRRA utility; `stopwise compare` of
crra+myopic+probit met one in every fold and printed scipy's overflow notes): the scipy
fallback neither prints numpy's overflow notes nor raises, and judges the run by its own
gradient."""

from __future__ import annotations

import warnings

import numpy as np

from stopwise.estimation.ml.optimize import minimize_one


def test_far_start_is_reported_without_numpy_warnings() -> None:
    scale = 1e200  # d negll/dz = 2e200 z: scipy's squared norms overflow

    def fun(z: np.ndarray) -> float:
        return float(scale * z @ z)

    def grad(z: np.ndarray) -> np.ndarray:
        return 2.0 * scale * z

    def hess(z: np.ndarray) -> np.ndarray:
        return 2.0 * scale * np.eye(len(z))

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # any warning fails the test
        with np.errstate(all="warn"):
            record = minimize_one(fun, grad, hess, np.array([1e5, -1e5]))
    assert np.all(np.isfinite(record.z)) or not record.converged
    assert record.converged == bool(record.grad_norm < 1e-4)


def test_overflow_warns_without_the_guard() -> None:
    # the same arithmetic outside minimize_one does warn: the test above can fail
    x = np.array([2e200, -2e200])
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        with np.errstate(all="warn"):
            x.dot(x)
    assert any(issubclass(w.category, RuntimeWarning) for w in caught)
