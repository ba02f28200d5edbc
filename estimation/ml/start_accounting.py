"""Where every start of a multistart fit ended: at the best optimum, at a lower optimum, or
not converged (max |gradient| above the optimiser's tolerance).

A converged run counts as "at the best" when its log-likelihood is within ``SAME_OPTIMUM``
of the best converged one; the spread is max - min of the converged log-likelihoods. The
counts always add up to the number of starts.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from stopwise.estimation.ml.optimize import OptimumRecord

SAME_OPTIMUM = 1e-3  # log-likelihood units


@dataclass(frozen=True)
class StartAccount:
    """Outcome of every start (in start order) and the summary counts."""

    outcomes: tuple[str, ...]
    spread: float

    def count(self, outcome: str) -> int:
        return sum(1 for o in self.outcomes if o == outcome)

    def note(self) -> str | None:
        """One sentence naming every start, or None when all starts agree."""
        n = len(self.outcomes)
        at_best, lower = self.count("best"), self.count("lower optimum")
        failed = self.count("not converged")
        if n <= 1 or at_best == n:
            return None
        below = f" (up to {self.spread:.3g} log-likelihood units below)" if lower else ""
        return (
            f"of {n} starts, {at_best} converged at the best optimum, {lower} converged at a "
            f"lower optimum{below} and {failed} did not converge; the best converged optimum "
            "is kept"
        )


def account_starts(runs: Sequence[OptimumRecord]) -> StartAccount:
    """Classify every run (module docstring)."""
    converged = [-r.value for r in runs if r.converged]
    best = max(converged) if converged else None
    outcomes = []
    for r in runs:
        if not r.converged or best is None:
            outcomes.append("not converged")
        elif best - (-r.value) <= SAME_OPTIMUM:
            outcomes.append("best")
        else:
            outcomes.append("lower optimum")
    spread = float(max(converged) - min(converged)) if len(converged) > 1 else 0.0
    return StartAccount(tuple(outcomes), spread)
