"""Tests for one pair of fitted models, chosen by their relation (estimation/nesting.py).

* Nested: likelihood-ratio statistic LR = 2 (ln L_big - ln L_small) (Wilks 1938). With q
  restricted parameters inside their ranges the reference is chi2(q). When m of the
  restricted parameters sit on a bound of their range (a tremble of 0) the reference is the
  chi-bar-square mixture  P(LR > c) = sum_{j=0}^{m} C(m, j) 2^-m P(chi2(q - m + j) > c)
  (Self & Liang 1987, their cases 5-9 with uncorrelated boundary parameters; chi2(0) is the
  point mass at 0).
* Non-nested and overlapping: with d_g = ln L_A,g - ln L_B,g per subject g (G subjects),
  Vuong's (1989) Schwarz-corrected statistic  Z = (sum_g d_g - (k_A - k_B) ln(G) / 2) /
  (sqrt(G) sd(d)),  sd with divisor G, Z ~ N(0, 1) under equal fit; Z > 0 favours A.
  Clarke's (2007) sign test: B = #{g: d_g - (k_A - k_B) ln(G) / (2G) > 0} ~ Binomial(G, 1/2).
* Both need variation in d: when every |d_g| is below a tolerance the two models make the
  same predictions on these data and the pair reads "indistinguishable" (for overlapping
  models this is Vuong's first step, the test that the two coincide).

References are cited from memory.
"""

from __future__ import annotations

from math import comb

import numpy as np
from scipy import stats

LEVEL = 0.05
SAME_TOLERANCE = 1e-6  # |d_g| <= tol * (1 + |ln L_g|) for every g: indistinguishable


def chi_bar_square_sf(statistic: float, df: int, n_boundary: int) -> float:
    """P(LR > statistic) under the chi-bar-square reference (module docstring); n_boundary =
    0 gives the plain chi2(df) tail."""
    stat = max(float(statistic), 0.0)
    m = min(int(n_boundary), int(df))
    q = int(df) - m
    total = 0.0
    for j in range(m + 1):
        dof = q + j
        tail = (1.0 if stat <= 0 else 0.0) if dof == 0 else float(stats.chi2.sf(stat, dof))
        total += comb(m, j) / 2.0**m * tail
    return total


def likelihood_ratio(
    loglik_small: float, loglik_big: float, df: int, n_boundary: int = 0
) -> dict[str, float | str]:
    """LR statistic, df, p-value and the name of its reference distribution."""
    statistic = max(2.0 * (loglik_big - loglik_small), 0.0)
    reference = (
        f"chi-bar-square ({n_boundary} of {df} on a boundary; Self & Liang 1987)"
        if n_boundary
        else f"chi2({df})"
    )
    return {
        "statistic": statistic,
        "df": int(df),
        "p_value": chi_bar_square_sf(statistic, df, n_boundary),
        "reference": reference,
    }


def indistinguishable(ll_a: np.ndarray, ll_b: np.ndarray) -> bool:
    """Every subject's log-likelihood difference vanishes (module docstring)."""
    a, b = np.asarray(ll_a, dtype=float), np.asarray(ll_b, dtype=float)
    scale = 1.0 + np.maximum(np.abs(a), np.abs(b))
    return bool(np.all(np.abs(a - b) <= SAME_TOLERANCE * scale))


def vuong_test(ll_a: np.ndarray, ll_b: np.ndarray, k_a: int, k_b: int) -> tuple[float, float]:
    """Vuong's Schwarz-corrected Z over G units and its two-sided p-value; (nan, nan) with
    fewer than 2 units or no variation in the differences."""
    d = np.asarray(ll_a, dtype=float) - np.asarray(ll_b, dtype=float)
    g = len(d)
    sd = float(d.std(ddof=0)) if g else 0.0
    if g < 2 or sd <= 0.0 or indistinguishable(ll_a, ll_b):
        return float("nan"), float("nan")
    corrected = d.sum() - (k_a - k_b) * np.log(g) / 2.0
    z = corrected / (np.sqrt(g) * sd)
    return float(z), float(2.0 * stats.norm.sf(abs(z)))


def clarke_test(ll_a: np.ndarray, ll_b: np.ndarray, k_a: int, k_b: int) -> tuple[float, float]:
    """Clarke's B (units favouring A after the per-unit Schwarz correction) and its
    two-sided binomial p-value; (nan, nan) when the differences vanish."""
    d = np.asarray(ll_a, dtype=float) - np.asarray(ll_b, dtype=float)
    g = len(d)
    if g == 0 or indistinguishable(ll_a, ll_b):
        return float("nan"), float("nan")
    corrected = d - (k_a - k_b) * np.log(g) / (2.0 * g)
    b = int((corrected > 0).sum())
    return float(b), float(stats.binomtest(b, g, 0.5).pvalue)
