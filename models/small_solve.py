"""Small dense linear solves written in plain XLA operations (no LAPACK custom call).

``solve_small(a, b)`` returns x with a x = b by Gaussian elimination with partial pivoting
(Golub & Van Loan 2013, algorithm 3.4.1, from memory): for column k, swap into row k the
row p >= k of largest |a_pk|, then subtract l_i = a_ik / a_kk times row k from every row
i > k (of a and of b); finally back substitution x_i = (b_i - sum_{j>i} a_ij x_j) / a_ii.

Why not ``jnp.linalg.solve``: on the CPU, JAX's LU kernel (LAPACK dgetrf through an XLA FFI
custom call) splits a batch of matrices over XLA's intra-op thread pool and blocks its own
pool thread until the pieces are done. When XLA runs as many independent LU calls at once
as the pool has threads -- which it does inside the vmapped, forward-differentiated QRE
likelihood of the compiled multistart (estimation/ml/compiled_multistart.py) on a 2-core
machine -- every pool thread waits for pieces no free thread can run: the process
deadlocks at 0% CPU (seen with gdb: both ``tf_XLAEigen`` threads in
``jax::ParallelBatchMap`` under ``LuDecomposition::Kernel``). Elimination written in XLA
operations never calls back into the pool, and for the QRE's systems (at most a few dozen
unknowns) costs about what LAPACK does. A singular matrix gives non-finite entries, as
LAPACK's solve does.
"""

from __future__ import annotations

from typing import Any

import jax
import jax.numpy as jnp


def _eliminate_column(k: Any, state: tuple[Any, Any]) -> tuple[Any, Any]:
    """Pivot row k (largest |a_pk|, p >= k) and zero column k below the diagonal."""
    a, b = state
    n = a.shape[0]
    rows = jnp.arange(n)
    p = jnp.argmax(jnp.where(rows >= k, jnp.abs(a[:, k]), -1.0))
    order = jnp.where(rows == k, p, jnp.where(rows == p, k, rows))
    a, b = a[order], b[order]
    factors = jnp.where(rows > k, a[:, k] / a[k, k], 0.0)
    return a - factors[:, None] * a[k][None, :], b - factors * b[k]


def _back_substitute(a: Any, b: Any) -> Any:
    """x_i = (b_i - sum_{j>i} a_ij x_j) / a_ii for i = n-1, ..., 0 (a upper triangular)."""
    n = a.shape[0]

    def row(step: Any, x: Any) -> Any:
        i = n - 1 - step
        return x.at[i].set((b[i] - a[i] @ x) / a[i, i])

    return jax.lax.fori_loop(0, n, row, jnp.zeros_like(b))


def solve_small(a: Any, b: Any) -> Any:
    """x with a x = b for one square a (n x n) and one right-hand side b (n,); batch with
    jax.vmap. Partial-pivoted Gaussian elimination in XLA operations (module docstring)."""
    a = jnp.asarray(a)
    b = jnp.asarray(b, dtype=a.dtype)
    a, b = jax.lax.fori_loop(0, a.shape[0], _eliminate_column, (a, b))
    return _back_substitute(a, b)
