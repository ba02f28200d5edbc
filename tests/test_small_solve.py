"""models/small_solve.py: the LAPACK-free linear solve the QRE likelihood uses, so that the
compiled multistart cannot deadlock XLA's CPU thread pool in LAPACK's batched LU kernel
(the cause of the contest stall in `stopwise demo`; see the module docstring)."""

from __future__ import annotations

import re

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import stopwise  # noqa: F401  (float64 before jax is used)
from stopwise.models.contest import game as G
from stopwise.models.contest import qre
from stopwise.models.small_solve import solve_small


def test_solve_small_equals_numpy_lapack_solve_with_and_without_pivoting() -> None:
    rng = np.random.default_rng(3)
    for n in (1, 2, 7, 31):  # 31: the demo's QRE system (targets 0..30)
        a = rng.normal(size=(n, n)) + 0.5 * np.eye(n)
        b = rng.normal(size=n)
        # reference: numpy.linalg.solve (LAPACK gesv), a reference library
        expected = np.linalg.solve(a, b)
        got = np.asarray(jax.jit(solve_small)(a, b))
        np.testing.assert_allclose(got, expected, rtol=1e-10, atol=1e-12)
    # a zero on the diagonal needs a row swap (partial pivoting)
    swapped = np.array([[0.0, 2.0, 1.0], [1.0, 0.0, 0.0], [3.0, 1.0, 4.0]])
    rhs = np.array([1.0, 2.0, 3.0])
    np.testing.assert_allclose(solve_small(swapped, rhs), np.linalg.solve(swapped, rhs), rtol=1e-13)
    # batched with vmap, as inside the compiled multistart
    many = rng.normal(size=(5, 4, 4)) + 3 * np.eye(4)
    rhss = rng.normal(size=(5, 4))
    np.testing.assert_allclose(
        jax.vmap(solve_small)(many, rhss),
        np.linalg.solve(many, rhss[..., None])[..., 0],
        rtol=1e-11,
    )


def test_a_singular_system_gives_non_finite_entries_as_lapack_does() -> None:
    assert not np.all(np.isfinite(np.asarray(solve_small(np.zeros((2, 2)), np.ones(2)))))


def test_forward_derivative_is_that_of_the_inverse() -> None:
    # d(A^-1 b) = A^-1 (db - dA A^-1 b) (matrix calculus, common practice, no source)
    rng = np.random.default_rng(4)
    a, da = rng.normal(size=(5, 5)) + 2 * np.eye(5), rng.normal(size=(5, 5))
    b, db = rng.normal(size=5), rng.normal(size=5)
    _, tangent = jax.jvp(solve_small, (a, b), (da, db))
    x = np.linalg.solve(a, b)
    np.testing.assert_allclose(tangent, np.linalg.solve(a, db - da @ x), rtol=1e-10)


def calls_lu(jaxpr) -> bool:
    """Whether the program text (nested sub-programs included) applies the ``lu`` primitive."""
    return re.search(r"= lu[\[ ]", str(jaxpr)) is not None  # "x:f64[..] = lu a", not a variable


def test_the_qre_second_derivatives_call_no_lapack_lu() -> None:
    """The compiled multistart takes forward-mode Hessians of the QRE likelihood, vmapped over
    runs; before the fix their many independent batched ``lu`` calls (LAPACK dgetrf)
    deadlocked XLA's 2-thread CPU pool. None may be left (the program's text is checked, so
    this fails on the old code without needing a 2-core machine to hang)."""
    crra = G.resolve_utility("crra")

    def mean_target(theta):
        game = G.make_game(0.8, 3, 2.0, 1.0, 6, utility=crra, theta={"r": theta[1]})
        return jnp.arange(7.0) @ qre.qre_symmetric(theta[0], game)

    hessian = jax.vmap(jax.jacfwd(jax.jacfwd(mean_target)))
    jaxpr = jax.make_jaxpr(hessian)(jnp.array([[1.5, 0.3], [2.0, 0.1]]))
    assert not calls_lu(jaxpr)
    # the check can fail: with LAPACK's solve put back (the old code) the program has lu calls
    with_lapack = qre.solve_small
    try:
        qre.solve_small = jnp.linalg.solve
        jax.clear_caches()  # traced loop bodies are cached by JAX
        assert calls_lu(jax.make_jaxpr(hessian)(jnp.ones((2, 2))))
    finally:
        qre.solve_small = with_lapack
        jax.clear_caches()
    # (that the derivatives still follow the QRE: tests/test_contest_qre.py's finite-
    # difference check of the implicit gradient, and tests/test_contest_compiled_slow.py)


@pytest.mark.slow  # ~20 s of tracing on a loaded 2-core machine
def test_qre_profile_unchanged_by_the_new_solve() -> None:
    """The QRE itself, solved with LAPACK's solve (the old code) and with solve_small."""
    crra = G.resolve_utility("crra")
    game = G.make_game(0.8, 3, 2.0, 1.0, 6, utility=crra, theta={"r": 0.3})
    new = np.asarray(jax.jit(qre.qre_symmetric)(2.5, game))
    old_solve = qre.solve_small
    try:
        qre.solve_small = jnp.linalg.solve
        jax.clear_caches()
        old = np.asarray(jax.jit(qre.qre_symmetric)(2.5, game))
    finally:
        qre.solve_small = old_solve
        jax.clear_caches()
    np.testing.assert_allclose(new, old, rtol=1e-12, atol=1e-15)
