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
* Both need differences above the numerical accuracy of the per-subject log-likelihoods.
  Each subject g gets a scale s_g = max(n_g, 1 + max(|ln L_A,g|, |ln L_B,g|)), n_g its
  decision rows (a row's log-likelihood is of order one; without row counts the second term
  alone). Subject g is a *tie* when |d_g| <= ROW_TOLERANCE * s_g, ROW_TOLERANCE = 1e-6 per
  row: the accuracy to which a row's likelihood is known (a QRE fixed point is certified to
  a residual of 1e-6; summation rounding is far below it). The pair reads
  "indistinguishable" when BOTH
    (a) the totals agree: |sum_g d_g| <= ROW_TOLERANCE * sum_g s_g, and
    (b) the differences are at rounding level: every subject ties, or
        sd(d) <= ROW_TOLERANCE * mean(s_g).
  Without (b) the Schwarz term (k_A - k_B) ln(G) / 2, or a rounding-level mean, divided by a
  rounding-level sd gives an arbitrarily large Z (1e4 and more) that measures nothing; for
  overlapping models (b) stands in for Vuong's first step, the test that the two coincide.
  Vuong's Z is not computed when sd(d) is at rounding level. Clarke's test drops ties, as a
  sign test does (common practice, no source): B counts the untied subjects favouring A
  and the reference is Binomial(untied, 1/2).

References are cited from memory.
"""

from __future__ import annotations

from math import comb

import numpy as np
from scipy import stats

LEVEL = 0.05
ROW_TOLERANCE = 1e-6  # per decision row: |d_g| <= ROW_TOLERANCE * s_g is a tie


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


def subject_scales(
    ll_a: np.ndarray, ll_b: np.ndarray, rows: np.ndarray | None = None
) -> np.ndarray:
    """s_g = max(n_g, 1 + max(|ln L_A,g|, |ln L_B,g|)); without ``rows`` the second term."""
    a, b = np.asarray(ll_a, dtype=float), np.asarray(ll_b, dtype=float)
    magnitude = 1.0 + np.maximum(np.abs(a), np.abs(b))
    if rows is None:
        return magnitude
    return np.maximum(np.asarray(rows, dtype=float), magnitude)


def ties(ll_a: np.ndarray, ll_b: np.ndarray, rows: np.ndarray | None = None) -> np.ndarray:
    """Subjects whose difference is at rounding level: |d_g| <= ROW_TOLERANCE * s_g."""
    d = np.asarray(ll_a, dtype=float) - np.asarray(ll_b, dtype=float)
    return np.abs(d) <= ROW_TOLERANCE * subject_scales(ll_a, ll_b, rows)


def spread_at_rounding_level(
    ll_a: np.ndarray, ll_b: np.ndarray, rows: np.ndarray | None = None
) -> bool:
    """sd(d) (divisor G) <= ROW_TOLERANCE * mean(s_g): no variation to scale a statistic by."""
    d = np.asarray(ll_a, dtype=float) - np.asarray(ll_b, dtype=float)
    if len(d) == 0:
        return True
    limit = ROW_TOLERANCE * float(np.mean(subject_scales(ll_a, ll_b, rows)))
    return bool(float(d.std(ddof=0)) <= limit)


def totals_agree(ll_a: np.ndarray, ll_b: np.ndarray, rows: np.ndarray | None = None) -> bool:
    """|sum_g d_g| <= ROW_TOLERANCE * sum_g s_g."""
    d = np.asarray(ll_a, dtype=float) - np.asarray(ll_b, dtype=float)
    limit = ROW_TOLERANCE * float(np.sum(subject_scales(ll_a, ll_b, rows)))
    return bool(abs(float(d.sum())) <= limit)


def indistinguishable(ll_a: np.ndarray, ll_b: np.ndarray, rows: np.ndarray | None = None) -> bool:
    """The totals agree and the per-subject differences are at rounding level (module
    docstring, rules (a) and (b))."""
    at_rounding = bool(np.all(ties(ll_a, ll_b, rows))) or spread_at_rounding_level(ll_a, ll_b, rows)
    return totals_agree(ll_a, ll_b, rows) and at_rounding


def vuong_test(
    ll_a: np.ndarray, ll_b: np.ndarray, k_a: int, k_b: int, rows: np.ndarray | None = None
) -> tuple[float, float]:
    """Vuong's Schwarz-corrected Z = (sum_g d_g - (k_A - k_B) ln(G) / 2) / (sqrt(G) sd(d))
    over G units and its two-sided p-value; (nan, nan) with fewer than 2 units or when
    sd(d) is at rounding level (module docstring)."""
    d = np.asarray(ll_a, dtype=float) - np.asarray(ll_b, dtype=float)
    g = len(d)
    sd = float(d.std(ddof=0)) if g else 0.0
    if g < 2 or sd <= 0.0 or spread_at_rounding_level(ll_a, ll_b, rows):
        return float("nan"), float("nan")
    corrected = d.sum() - (k_a - k_b) * np.log(g) / 2.0
    z = corrected / (np.sqrt(g) * sd)
    return float(z), float(2.0 * stats.norm.sf(abs(z)))


def clarke_test(
    ll_a: np.ndarray, ll_b: np.ndarray, k_a: int, k_b: int, rows: np.ndarray | None = None
) -> tuple[float, float]:
    """Clarke's B = #{untied g: d_g - (k_A - k_B) ln(G) / (2G) > 0} and its two-sided
    Binomial(untied, 1/2) p-value; ties at rounding level are dropped (module docstring);
    (nan, nan) when every subject ties."""
    d = np.asarray(ll_a, dtype=float) - np.asarray(ll_b, dtype=float)
    g = len(d)
    untied = ~ties(ll_a, ll_b, rows)
    n_untied = int(untied.sum())
    if n_untied == 0:
        return float("nan"), float("nan")
    corrected = d[untied] - (k_a - k_b) * np.log(g) / (2.0 * g)
    b = int((corrected > 0).sum())
    return float(b), float(stats.binomtest(b, n_untied, 0.5).pvalue)
