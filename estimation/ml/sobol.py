"""Scrambled Sobol points for the multistart design, without loading ``scipy.stats``.

Loading ``scipy.stats`` (for ``qmc.Sobol``) cost every ``stopwise fit`` process several
hundred milliseconds, for a handful of points. This module computes the same points, bit
for bit, as ``scipy.stats.qmc.Sobol(d, scramble=True, bits=30, seed=seed).random(n)`` for
``d <= len(POLYNOMIALS)`` (tests/test_sobol_starts.py checks the equality), so the starts,
and hence every fit, stay as they were. Larger dimensions fall back to scipy itself.

* Direction numbers (Bratley & Fox 1988, algorithm 659): dimension 1 has v_i = 2^(B-1-i);
  dimension j has a primitive polynomial of degree m with coefficients a_1..a_(m-1) (the
  bits of ``POLYNOMIALS[j]`` below its leading one) and initial numbers m_1..m_m
  (``INITIAL[j]``); then m_i = 2 a_1 m_(i-1) xor 4 a_2 m_(i-2) xor ... xor 2^m m_(i-m) xor
  m_(i-m), and v_i = m_i 2^(B-1-i). The polynomials and initial numbers are the first rows
  of Joe & Kuo (2008), "Constructing Sobol sequences with better two-dimensional
  projections", SIAM J. Sci. Comput. 30, table new-joe-kuo-6.21201.
* Scrambling (Owen 1998; Matousek 1998): a random lower-triangular bit matrix L with unit
  diagonal per dimension (linear matrix scramble: v <- L v over GF(2), bits most significant
  first) and a random digital shift s; both drawn from ``numpy.random.default_rng(seed)``,
  the shift first (integers in {0, 1} of shape (d, B)), then L (shape (d, B, B)).
* Points in Gray-code order (Antonov & Saleev 1979): x_0 = s, x_(g+1) = x_g xor v_c(g)
  with c(g) the index of the lowest zero bit of g; the point is x 2^-B.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np

BITS = 30
POLYNOMIALS = (
    1, 3, 7, 11, 13, 19, 25, 37, 41, 47, 55, 59, 61, 67, 91, 97, 103, 109, 115, 131,
    137, 143, 145, 157, 167, 171, 185, 191, 193, 203, 211, 213, 229, 239, 241, 247, 253,
    285, 299, 301,
)  # fmt: skip
INITIAL = (
    (), (1,), (1, 3), (1, 3, 1), (1, 1, 1), (1, 1, 3, 3), (1, 3, 5, 13), (1, 1, 5, 5, 17),
    (1, 1, 5, 5, 5), (1, 1, 7, 11, 19), (1, 1, 5, 1, 1), (1, 1, 1, 3, 11), (1, 3, 5, 5, 31),
    (1, 3, 3, 9, 7, 49), (1, 1, 1, 15, 21, 21), (1, 3, 1, 13, 27, 49), (1, 1, 1, 15, 7, 5),
    (1, 3, 1, 15, 13, 25), (1, 1, 5, 5, 19, 61), (1, 3, 7, 11, 23, 15, 103),
    (1, 3, 7, 13, 13, 15, 69), (1, 1, 3, 13, 7, 35, 63), (1, 3, 5, 9, 1, 25, 53),
    (1, 3, 1, 13, 9, 35, 107), (1, 3, 1, 5, 27, 61, 31), (1, 1, 5, 11, 19, 41, 61),
    (1, 3, 5, 3, 3, 13, 69), (1, 1, 7, 13, 1, 19, 1), (1, 3, 7, 5, 13, 19, 59),
    (1, 1, 3, 9, 25, 29, 41), (1, 3, 5, 13, 23, 1, 55), (1, 3, 7, 3, 13, 59, 17),
    (1, 3, 1, 3, 5, 53, 69), (1, 1, 5, 5, 23, 33, 13), (1, 1, 7, 7, 1, 61, 123),
    (1, 1, 7, 9, 13, 61, 49), (1, 3, 3, 5, 3, 55, 33), (1, 3, 1, 15, 31, 13, 49, 245),
    (1, 3, 5, 15, 31, 59, 63, 97), (1, 3, 1, 11, 11, 11, 77, 249),
)  # fmt: skip
MAX_DIM = len(POLYNOMIALS)


def direction_numbers(d: int) -> np.ndarray:
    """v[j, i], (d, BITS): the unscrambled direction numbers (module docstring)."""
    v = np.zeros((d, BITS), dtype=np.int64)
    v[0, :] = 1
    for j in range(1, d):
        poly, degree = POLYNOMIALS[j], POLYNOMIALS[j].bit_length() - 1
        v[j, :degree] = INITIAL[j]
        for i in range(degree, BITS):
            m = int(v[j, i - degree])
            for k in range(degree):
                if (poly >> (degree - 1 - k)) & 1:
                    m ^= int(v[j, i - k - 1]) << (k + 1)
            v[j, i] = m
    return v << np.arange(BITS - 1, -1, -1, dtype=np.int64)


def bit_columns(values: np.ndarray) -> np.ndarray:
    """The BITS bits of each integer, most significant first: shape values.shape + (BITS,)."""
    shifts = np.arange(BITS - 1, -1, -1, dtype=np.int64)
    return (values[..., None] >> shifts) & 1


def scrambled_directions(v: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """L v over GF(2) for every dimension k and direction j: bits (L_k bits(v_kj)) mod 2."""
    bits = np.einsum("kpi,kji->kjp", lower, bit_columns(v)) % 2
    return bits @ (np.int64(1) << np.arange(BITS - 1, -1, -1, dtype=np.int64))


def scrambled_sobol(d: int, n: int, seed: int) -> np.ndarray:
    """The first n scrambled Sobol points in [0, 1)^d, (n, d) (module docstring); a fixed
    integer seed gives the same points, so they are computed once per (d, n, seed)."""
    if isinstance(seed, (int, np.integer)) and not isinstance(seed, bool):
        return _sobol_once(int(d), int(n), int(seed)).copy()
    return _sobol_points(d, n, seed)


@lru_cache(maxsize=64)
def _sobol_once(d: int, n: int, seed: int) -> np.ndarray:
    return _sobol_points(d, n, seed)


def _sobol_points(d: int, n: int, seed: Any) -> np.ndarray:
    if d > MAX_DIM:
        from scipy.stats import qmc  # many parameters: scipy's table of 21,201 dimensions

        return qmc.Sobol(d=d, scramble=True, seed=seed).random(n)
    rng = np.random.default_rng(seed)
    powers = np.uint64(1) << np.arange(BITS, dtype=np.uint64)
    shift = rng.integers(0, 2, size=(d, BITS), dtype=np.uint64) @ powers
    lower = np.tril(rng.integers(0, 2, size=(d, BITS, BITS), dtype=np.uint64))
    lower[:, np.arange(BITS), np.arange(BITS)] = 1
    v = scrambled_directions(direction_numbers(d), lower.astype(np.int64))
    x = shift.astype(np.int64)
    points = np.empty((n, d))
    for g in range(n):
        points[g] = x * 2.0**-BITS
        x = x ^ v[:, ((~g) & (g + 1)).bit_length() - 1]
    return points
