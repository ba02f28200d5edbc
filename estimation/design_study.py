"""Expected precision of a planned study: a plan, parameter points, and certified SEs.

A plan gives survival chances, trials per participant and participants (stopping models) or
a lottery list answered once per participant (lottery models); optionally a gain per
condition, an allocation of the trials over the conditions, and a contest scheme played in
every trial (contest models; stopwise.estimation.design_contest). The information per
participant I_1(theta) comes from stopwise.estimation.design_info (exact over decision paths).

Parameter uncertainty (pseudo-Bayesian design): ``ranges`` {name: (lo, hi)} replace a value
by the midpoints lo + (j + 1/2)(hi - lo)/m, j = 0..m-1, of m equal bins (a uniform prior),
the product over ranged parameters giving the points theta_1..theta_M. Reported are the
expected SEs at the given values, their mean over the points and the worst point.

Every answer carries its checks: the path mass left beyond the cap (refused above
MAX_TRUNCATED_MASS) and whether I_1 is positive definite (design_info.precision_from_information);
for a logit-QRE contest also the fixed-point residual of the equilibrium (refused above
design_contest.MAX_QRE_RESIDUAL).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation import design_info as D
from stopwise.estimation.design_contest import (
    MAX_QRE_RESIDUAL,
    ContestScheme,
    check_scheme,
    contest_path_tables,
    model_cap,
    qre_residuals,
)
from stopwise.models.base import Model

MAX_TRUNCATED_MASS = 1e-8
POINTS_PER_RANGE = 5
MAX_POINTS = 125


@dataclass(frozen=True)
class Plan:
    """What the researcher chooses: survival chances (stopping) or the lottery ``items``,
    trials per participant, participants, gain and start bank per trial. ``gains``: one
    gain per condition (else ``gain`` everywhere); ``allocation``: trials per condition
    (else trial t uses condition t mod k); ``contest``: the scheme of every trial."""

    p_survive: tuple[float, ...] = ()
    trials: int = 60
    subjects: int = 100
    gain: float = 1.0
    start: float = 0.0
    items: pd.DataFrame | None = None
    gains: tuple[float, ...] = ()
    allocation: tuple[int, ...] = ()
    contest: ContestScheme | None = None

    def condition_gains(self) -> np.ndarray:
        """Gain per condition (n_cond,)."""
        if self.gains:
            return np.asarray(self.gains, dtype=np.float64)
        return np.full(len(self.p_survive), float(self.gain))

    def condition_counts(self) -> np.ndarray:
        """Trials per condition n_c (n_cond,): the allocation, else round robin."""
        if self.allocation:
            return np.asarray(self.allocation, dtype=np.float64)
        return D.trial_counts(len(self.p_survive), self.trials)

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"trials": self.trials, "subjects": self.subjects}
        if self.items is None:
            out.update(p_survive=list(self.p_survive), gain=self.gain, start=self.start)
        if self.gains:  # one gain per chance replaces the single gain
            out.pop("gain", None)
            out["gains"] = list(self.gains)
        if self.allocation:
            out["allocation"] = list(self.allocation)
        if self.contest is not None:
            out["contest"] = self.contest.to_dict()
        return out


def range_points(
    theta: Mapping[str, float],
    ranges: Mapping[str, tuple[float, float]],
    per_range: int = POINTS_PER_RANGE,
) -> list[dict[str, float]]:
    """theta with each ranged parameter replaced by the midpoints of ``per_range`` equal
    bins of its range (module docstring); the product over the ranged parameters."""
    if not ranges:
        return [dict(theta)]
    grids = []
    for name, (lo, hi) in ranges.items():
        grids.append([(name, lo + (j + 0.5) * (hi - lo) / per_range) for j in range(per_range)])
    points = [{**theta, **dict(combo)} for combo in itertools.product(*grids)]
    if len(points) > MAX_POINTS:
        raise StopwiseInputError(
            f"--range: {len(points)} parameter points (over {MAX_POINTS}); give fewer ranges"
        )
    return points


def per_trial_information(
    model: Model, points: Sequence[Mapping[str, float]], plan: Plan
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(information per trial of each condition or item (m, n_cond, k, k), trials per
    condition (n_cond,), path mass beyond the cap (m, n_cond))."""
    if model.data_kind == "lottery":
        if plan.items is None:
            raise StopwiseInputError(f"model {model.name} answers a lottery list: give items")
        info = D.lottery_information(model, points, plan.items)
        return info, np.ones(info.shape[1]), np.zeros(info.shape[:2])
    gains = plan.condition_gains()
    if model.data_kind == "contest":
        tables, _ = contest_path_tables(
            model, points, plan.p_survive, gains, plan.start, plan.contest
        )
    elif model.data_kind == "stopping":
        if plan.contest is not None:
            raise StopwiseInputError(f"model {model.name} is a solo model: drop the contest")
        tables = D.path_tables(model, points, plan.p_survive, gains, plan.start)
    else:
        raise StopwiseInputError(f"model {model.name} ({model.data_kind}): no design engine")
    return D.condition_information(tables), plan.condition_counts(), tables.truncated_mass


def participant_information(per_trial: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """I_1 = sum_c n_c I_c, shape (m, k, k)."""
    return np.einsum("c,mcij->mij", counts, per_trial)


@dataclass
class DesignResult:
    """Expected precision of a plan for one model, with its checks."""

    model: str
    names: tuple[str, ...]
    plan: Plan
    points: list[dict[str, float]]
    precisions: list[D.Precision]
    truncated_mass: float
    extras: dict[str, Any] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    qre_residual: float = math.nan  # worst fixed-point residual (logit-QRE contests only)

    @property
    def certified(self) -> bool:
        """Every point identified, the path mass beyond the cap negligible and (logit QRE)
        the equilibrium solved."""
        solved = math.isnan(self.qre_residual) or self.qre_residual <= MAX_QRE_RESIDUAL
        return (
            solved
            and self.truncated_mass <= MAX_TRUNCATED_MASS
            and all(p.identified for p in self.precisions)
        )

    def se_table(self) -> pd.DataFrame:
        """Per parameter: expected SE pooled over the plan's participants at the given values
        (the first point), mean and worst over the range points (the points after the
        first; without ranges the given values), and for one participant."""
        n = self.plan.subjects
        pooled = np.array([p.se_pooled(n) for p in self.precisions])
        one = self.precisions[0].se_one
        over = pooled[1:] if len(pooled) > 1 else pooled
        return pd.DataFrame(
            {
                "value": [self.points[0][name] for name in self.names],
                f"se_{n}_subjects": pooled[0],
                "se_mean_over_range": over.mean(axis=0),
                "se_worst_over_range": over.max(axis=0),
                "se_one_subject": one,
            },
            index=pd.Index(self.names, name="parameter"),
        )

    def correlation(self) -> pd.DataFrame:
        """Expected correlation of the estimates at the given values."""
        corr = self.precisions[0].correlation
        return pd.DataFrame(corr, index=self.names, columns=self.names)

    def to_dict(self) -> dict[str, Any]:
        table = self.se_table().reset_index()
        first = self.precisions[0]
        return {
            "model": self.model,
            "plan": self.plan.to_dict(),
            "range_points": max(len(self.points) - 1, 0) if len(self.points) > 1 else 0,
            "params": table.to_dict(orient="records"),
            "correlation": self.correlation().to_dict(),
            "information_per_subject": first.information.tolist(),
            "checks": self.checks(),
            "certified": self.certified,
            **{k: v for k, v in self.extras.items() if not k.endswith("_text")},
            "notes": list(self.notes),
        }

    def checks(self) -> dict[str, Any]:
        """The certificate: truncated path mass, smallest eigenvalue and condition number of
        the information per participant (worst over the points)."""
        qre = (
            {} if math.isnan(self.qre_residual) else {"qre_fixed_point_residual": self.qre_residual}
        )
        return {
            **qre,
            "truncated_mass": self.truncated_mass,
            "max_truncated_mass": MAX_TRUNCATED_MASS,
            "identified_at_every_point": all(p.identified for p in self.precisions),
            "min_eigenvalue": min(p.min_eigenvalue for p in self.precisions),
            "condition_number": max(p.condition_number for p in self.precisions),
        }

    def summary(self) -> str:
        checks = self.checks()
        lines = [
            f"Expected precision of a design for {self.model}",
            f"plan: {self.plan.to_dict()}; range points: {max(len(self.points) - 1, 0)}",
            self.se_table().to_string(float_format=lambda v: f"{v:.4g}"),
            "",
            "Expected correlation of the estimates",
            self.correlation().to_string(float_format=lambda v: f"{v:.3f}"),
            f"check: path mass beyond the cap {checks['truncated_mass']:.2g} "
            f"(limit {MAX_TRUNCATED_MASS:g}); information per participant condition number "
            f"{checks['condition_number']:.3g}; certified: {self.certified}",
        ]
        for key in ("optimisation", "discrimination", "lr_test"):
            if key in self.extras:
                lines += ["", self.extras[f"{key}_text"]]
        lines += [f"Note: {n}" for n in self.notes]
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


def expected_precision(
    model: Model,
    theta: Mapping[str, float],
    plan: Plan,
    ranges: Mapping[str, tuple[float, float]] | None = None,
) -> DesignResult:
    """Expected SEs and correlations of ``plan`` at ``theta`` (averaged over ``ranges``)."""
    points = [dict(theta)] + (range_points(theta, ranges) if ranges else [])
    per_trial, counts, truncated = per_trial_information(model, points, plan)
    info = participant_information(per_trial, counts)
    precisions = [D.precision_from_information(model.param_names, i) for i in info]
    result = DesignResult(
        model.name, model.param_names, plan, points, precisions, float(np.max(truncated))
    )
    if model.data_kind == "contest":
        result.qre_residual = contest_residual(model, points, plan)
        result.notes += contest_notes(model, plan)
    result.notes += design_notes(result)
    return result


def contest_residual(model: Model, points: Sequence[Mapping[str, float]], plan: Plan) -> float:
    """Worst QRE fixed-point residual over the points (NaN for other concepts)."""
    gains = plan.condition_gains()
    residuals = qre_residuals(model, points, plan.p_survive, gains, plan.start, plan.contest)
    return float(np.max(residuals)) if not np.all(np.isnan(residuals)) else math.nan


def contest_notes(model: Model, plan: Plan) -> list[str]:
    """The model's identification warnings on the planned contests and what was assumed."""
    gains = plan.condition_gains()
    _, warned = model_cap(model, plan.p_survive, gains, plan.start, check_scheme(plan.contest))
    return [
        "contest play: every participant's targets are independent draws from the concept's "
        "symmetric target distribution (the likelihood the fit uses); groups add nothing else",
        *warned,
    ]


def design_notes(result: DesignResult) -> list[str]:
    """Plain statements of what the numbers are and of failed checks."""
    notes = [
        "expected SEs are asymptotic (inverse expected Fisher information, exact over the "
        "model's decision paths); per-subject SEs with few trials are optimistic"
    ]
    if result.qre_residual > MAX_QRE_RESIDUAL:
        notes.append(
            f"REFUSED: the logit QRE is not solved (fixed-point residual "
            f"{result.qre_residual:.2g} > {MAX_QRE_RESIDUAL:g}); lower the precision"
        )
    if result.truncated_mass > MAX_TRUNCATED_MASS:
        notes.append(
            f"REFUSED: the paths beyond the cap carry mass {result.truncated_mass:.2g}; "
            "lower the largest survival chance"
        )
    if not all(p.identified for p in result.precisions):
        notes.append(
            "REFUSED: at some parameter point the information is singular: this design "
            "does not identify every parameter (SEs withheld)"
        )
    return notes


def n_for_se(se_one: float, target: float) -> int:
    """Participants needed for a pooled SE of ``target``: ceil((SE_1 / target)^2)."""
    return math.ceil((se_one / target) ** 2)
