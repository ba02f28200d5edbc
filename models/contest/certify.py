"""Certificates of contest answers: every symmetric target distribution carries a check.

* Nash: the maximum regret of the symmetric profile sigma,

      regret = max_t U_t(sigma) - sigma . U(sigma)      (>= 0; 0 exactly at an equilibrium),

  in payoff units and as a share of the payoff range (max - min of the slot payoffs u0 and
  u0 + du); certified when the share is <= tolerance and no target removed by iterated
  strict dominance carries more than `tolerance` probability (a dominated target is never a
  best response, so such mass contradicts the equilibrium).
* Logit QRE (normal form or agent form): the fixed-point residual
  max |x - log_softmax(lambda U(exp x))| in log-probability (or log-odds) units; certified
  when <= tolerance.
* Level-k and cognitive hierarchy: a finite recursion of logit responses, exact by
  construction; certified when the distribution is finite and sums to 1 within tolerance.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

DEFAULT_TOLERANCE = 1e-6

NASH = "max regret"
FIXED_POINT = "fixed-point residual"
EXACT = "exact by construction"


class UncertifiedAnswer(RuntimeError):
    """An answer failed its certificate and the caller did not ask for approximations."""


@dataclass(frozen=True)
class Certificate:
    """kind (NASH, FIXED_POINT or EXACT), the checked value, the tolerance, the verdict and a
    sentence saying what was checked."""

    kind: str
    value: float
    tolerance: float
    certified: bool
    statement: str

    def as_dict(self) -> dict[str, Any]:
        return {
            "kind": self.kind,
            "value": self.value,
            "tolerance": self.tolerance,
            "certified": self.certified,
            "statement": self.statement,
        }


def symmetric_regret(payoffs: np.ndarray, sigma: np.ndarray) -> float:
    """max(0, max_t U_t - sigma . U) (rounding can make the difference -1e-16)."""
    return max(0.0, float(np.max(payoffs) - sigma @ payoffs))


def dominated_mass(sigma: np.ndarray, dominated: list[int]) -> float:
    """Probability that sigma puts on the targets in `dominated`."""
    return float(np.sum(sigma[dominated])) if dominated else 0.0


def nash_certificate(
    regret: float,
    payoff_range: float,
    mass_on_dominated: float,
    tolerance: float = DEFAULT_TOLERANCE,
) -> Certificate:
    """Certified when regret / payoff_range <= tolerance and the mass on strictly dominated
    targets is <= tolerance (module docstring)."""
    share = regret / payoff_range if payoff_range > 0 else 0.0
    ok = bool(np.isfinite(share) and share <= tolerance and mass_on_dominated <= tolerance)
    statement = (
        f"max regret {regret:.3g} = {share:.3g} of the payoff range "
        f"({'<=' if share <= tolerance else '>'} tolerance {tolerance:g}); "
        f"probability on strictly dominated targets {mass_on_dominated:.3g}"
    )
    return Certificate(NASH, share, tolerance, ok, statement)


def fixed_point_certificate(residual: float, tolerance: float = DEFAULT_TOLERANCE) -> Certificate:
    """Certified when the fixed-point residual (log units) is finite and <= tolerance."""
    ok = bool(np.isfinite(residual) and residual <= tolerance)
    statement = (
        f"fixed-point residual max|log sigma - log_softmax(lambda U(sigma))| = {residual:.3g} "
        f"({'<=' if ok else '>'} tolerance {tolerance:g})"
    )
    return Certificate(FIXED_POINT, float(residual), tolerance, ok, statement)


def exact_certificate(sigma: np.ndarray, tolerance: float = DEFAULT_TOLERANCE) -> Certificate:
    """Level-k / CH: a finite recursion, exact by construction; checks finiteness and that
    the probabilities sum to 1 within tolerance."""
    gap = abs(float(np.sum(sigma)) - 1.0) if np.all(np.isfinite(sigma)) else float("inf")
    ok = bool(gap <= tolerance and np.all(sigma >= 0))
    statement = (
        "exact by construction (a finite recursion of logit responses, no equation solved); "
        f"probabilities sum to 1 within {gap:.3g}"
    )
    return Certificate(EXACT, gap, tolerance, ok, statement)
