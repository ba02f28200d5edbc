"""Participants a likelihood-ratio test needs to reject a nested model, before any data.

A small model S is nested in a big model B (estimation/nesting.classify: S = B at a stated
restriction of q parameters, m of them on a bound of their range, e.g. tremble = 0). With
B true at theta_B, the per-participant expected log-likelihood ratio against S at its
pseudo-true values theta_S* is mu = E_B[ln L_B(theta_B) - ln L_S(theta_S*)]
(design_discrimination, exact over the design's decision paths). With N participants the
statistic LR = 2 (ln L_B - ln L_S) is approximately non-central chi-square (Wald 1943;
Davidson & Lever 1970, local alternatives; cited from memory) with q degrees of freedom and
non-centrality

    lambda(N) = 2 N mu.

The test at level alpha rejects when LR > c_alpha, c_alpha the (1 - alpha) quantile of the
null reference: chi2(q) when no restricted parameter is on a bound; otherwise the
chi-bar-square mixture sum_j C(m, j) 2^-m chi2(q - m + j) (Self & Liang 1987), as in
estimation/pair_tests.py. Power:

    interior (m = 0):   P(N) = P(chi2_q(lambda(N)) > c_alpha)
    one boundary parameter (q = m = 1): LR ~ max(Z, 0)^2 with Z ~ N(sqrt(lambda), 1), so
                        P(N) = Phi(sqrt(lambda(N)) - sqrt(c_alpha)),  c_alpha = z_(1-alpha)^2
    other boundary mixes: P(chi2_q(lambda) > c_alpha) with the chi-bar-square c_alpha
                        (an approximation; reported as such).

The participants needed for power pi are the smallest N with P(N) >= pi (P grows with N).
Certificates: the rival's pseudo-true values converged (gradient), and the nesting holds on
the design: B at theta_S* plus the restriction reproduces S's decision probabilities on
every probed decision (largest absolute log difference reported, refused above
NESTING_TOLERANCE).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
from scipy import optimize, stats

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation import design_info as D
from stopwise.estimation.design_discrimination import decision_tables, discrimination, unconstrained
from stopwise.estimation.design_study import Plan
from stopwise.estimation.nesting import classify
from stopwise.estimation.pair_tests import chi_bar_square_sf
from stopwise.models.base import Model

LEVEL = 0.05
TARGET_POWERS = (0.8, 0.95)
NESTING_TOLERANCE = 1e-8
MAX_PARTICIPANTS = 10**7


def critical_value(df: int, n_boundary: int, level: float = LEVEL) -> float:
    """c with P(LR > c) = level under chi2(df) or the chi-bar-square mixture."""
    if n_boundary == 0:
        return float(stats.chi2.isf(level, df))
    high = float(stats.chi2.isf(level, df)) + 1.0
    return float(optimize.brentq(lambda c: chi_bar_square_sf(c, df, n_boundary) - level, 0.0, high))


def lr_power(noncentrality: float, df: int, n_boundary: int, level: float = LEVEL) -> float:
    """P(LR > c_level) at non-centrality lambda (module docstring)."""
    c = critical_value(df, n_boundary, level)
    lam = max(float(noncentrality), 0.0)
    if n_boundary == 1 and df == 1:
        return float(stats.norm.cdf(math.sqrt(lam) - math.sqrt(c)))
    if lam == 0.0:
        return float(stats.chi2.sf(c, df))
    return float(stats.ncx2.sf(c, df, lam))


def participants_for_power(
    mu: float, df: int, n_boundary: int, target: float, level: float = LEVEL
) -> int | None:
    """Smallest N with P(N) >= target, lambda(N) = 2 N mu (doubling, then bisection); None
    when mu <= 0 or N would exceed MAX_PARTICIPANTS."""
    if not mu > 0:
        return None

    def power(n: int) -> float:
        return lr_power(2.0 * n * mu, df, n_boundary, level)

    high = 1
    while power(high) < target:
        high *= 2
        if high > MAX_PARTICIPANTS:
            return None
    low = high // 2
    while high - low > 1:
        mid = (low + high) // 2
        low, high = (low, mid) if power(mid) >= target else (mid, high)
    return high


def nesting_gap(
    big: Model,
    small: Model,
    small_theta: Mapping[str, float],
    restriction: Mapping[str, float],
    plan: Plan,
) -> float:
    """max |log P_B(theta_S* + restriction) - log P_S(theta_S*)| over the probed decisions
    (finite entries): 0 when B at the restriction is S on this design."""
    n_steps = 1 if plan.items is not None else D.cap_steps(plan.p_survive)
    theta_big = {**big.start_theta(), **dict(small_theta), **dict(restriction)}
    big_tables = decision_tables(big, plan, n_steps)
    small_tables = decision_tables(small, plan, n_steps)
    gaps = []
    for b, s in zip(
        big_tables.log_probs(unconstrained(big, theta_big)),
        small_tables.log_probs(unconstrained(small, small_theta)),
    ):
        b, s = np.asarray(b), np.asarray(s)
        finite = np.isfinite(b) & np.isfinite(s)
        gaps.append(float(np.max(np.abs(b - s)[finite], initial=0.0)))
        if np.any(np.isfinite(b) != np.isfinite(s)):
            return math.inf
    return max(gaps)


def lr_test_plan(
    big: Model, theta: Mapping[str, float], small: Model, plan: Plan, level: float = LEVEL
) -> dict[str, Any]:
    """Power of the LR test of ``small`` against ``big`` (true at ``theta``) for the plan's
    participants and the participants for 80% and 95% power, with the certificates."""
    relation = classify(big, small)
    if relation.kind != "nested" or (big, small)[relation.big] is not big:
        raise StopwiseInputError(
            f"the LR-test sample size needs {small.name} nested in {big.name}; they are "
            f"{relation.kind} ({relation.reason})"
        )
    df = len(relation.restriction)
    n_boundary = len(relation.boundary)
    row = discrimination(big, theta, small, plan)
    gap = nesting_gap(big, small, row["rival_pseudo_true"], relation.restriction, plan)
    mu = row["llr_mean_per_subject"]
    certified = bool(row["pseudo_true_converged"]) and gap <= NESTING_TOLERANCE
    exact = n_boundary == 0 or (n_boundary == 1 and df == 1)
    needed = {
        f"power_{round(100 * t)}": participants_for_power(mu, df, n_boundary, t, level)
        if certified
        else None
        for t in TARGET_POWERS
    }
    return {
        "big": big.name,
        "small": small.name,
        "restriction": dict(relation.restriction),
        "boundary": list(relation.boundary),
        "df": df,
        "level": level,
        "reference": "chi2" if n_boundary == 0 else "chi-bar-square (Self & Liang 1987)",
        "critical_value": critical_value(df, n_boundary, level),
        "small_pseudo_true": row["rival_pseudo_true"],
        "llr_mean_per_subject": mu,
        "noncentrality_per_subject": 2.0 * mu,
        f"power_at_{plan.subjects}": lr_power(2 * plan.subjects * mu, df, n_boundary, level)
        if certified
        else math.nan,
        "participants_needed": needed,
        "power_formula": "exact asymptotic" if exact else "approximate (mixed boundary)",
        "checks": {
            "pseudo_true_converged": bool(row["pseudo_true_converged"]),
            "pseudo_true_gradient_max": row["pseudo_true_gradient_max"],
            "nesting_gap": gap,
            "nesting_tolerance": NESTING_TOLERANCE,
        },
        "certified": certified,
    }


def lr_test_text(row: dict[str, Any], subjects: int) -> str:
    """Readable lines for the summary."""
    needed = row["participants_needed"]
    head = (
        f"LR test of {row['small']} ({', '.join(f'{k} = {v:g}' for k, v in row['restriction'].items())})"
        f" against {row['big']} at {100 * row['level']:g}%: reference {row['reference']}, "
        f"critical value {row['critical_value']:.4g}; non-centrality per participant "
        f"{row['noncentrality_per_subject']:.4g}"
    )
    lines = [
        head,
        f"  power with {subjects} participants: {row[f'power_at_{subjects}']:.3f}; participants "
        f"for 80% power: {needed['power_80']}, for 95%: {needed['power_95']} "
        f"({row['power_formula']}); certified: {row['certified']}",
    ]
    if not row["certified"]:
        lines.append(
            "    REFUSED: the small model's pseudo-true values did not converge or the nesting "
            f"does not hold on this design (gap {row['checks']['nesting_gap']:.2g})"
        )
    return "\n".join(lines)
