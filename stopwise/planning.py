"""``stopwise.design(...)``: the expected precision of a planned study before any data,
optionally with the best sets of survival chances and the discrimination of a rival model.

Wires the engines of stopwise.estimation.design_study (expected SEs, exact over decision
paths), design_search (choosing survival chances) and design_discrimination (expected
log-likelihood ratio, participants AIC needs) to model specs and plain values.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.design_allocation import search_allocations
from stopwise.estimation.design_contest import ContestScheme
from stopwise.estimation.design_discrimination import both_directions, discrimination_text
from stopwise.estimation.design_power import lr_test_plan, lr_test_text
from stopwise.estimation.design_search import search_designs
from stopwise.estimation.design_study import DesignResult, Plan, expected_precision
from stopwise.estimation.nesting import classify
from stopwise.models.base import Model
from stopwise.models.spec import build_model


def resolve(model: str | Model, options: Mapping[str, Any] | None) -> Model:
    """A Model from a spec string (with ``options``) or as given."""
    if isinstance(model, Model):
        return model
    return build_model(model, **dict(options or {}))


def check_values(model: Model, params: Mapping[str, float], ranges: Mapping[str, Any]) -> None:
    """Every given value and range names a parameter and lies inside its bounds."""
    for name, value in params.items():
        spec = _spec(model, name)
        if not spec.lower < float(value) < spec.upper:
            raise StopwiseInputError(
                f"{name}={value}: expected a value in ({spec.lower:g}, {spec.upper:g})"
            )
    for name, (lo, hi) in ranges.items():
        spec = _spec(model, name)
        if not spec.lower < lo < hi < spec.upper:
            raise StopwiseInputError(
                f"range {name}={lo}:{hi}: expected LO < HI inside ({spec.lower:g}, {spec.upper:g})"
            )


def _spec(model: Model, name: str) -> Any:
    if name not in model.param_names:
        raise StopwiseInputError(
            f"model {model.name} has no parameter {name!r}; it has {', '.join(model.param_names)}"
        )
    return model.spec(name)


def check_plan(plan: Plan) -> None:
    """Survival chances in (0, 1), at least one trial and participant, gains > 0, one gain
    and one positive whole trial count per condition with the counts summing to the trials."""
    if plan.items is None:
        if not plan.p_survive or not all(0 < p < 1 for p in plan.p_survive):
            raise StopwiseInputError("p_survive: expected values strictly between 0 and 1")
        if not plan.gain > 0 or not all(g > 0 for g in plan.gains):
            raise StopwiseInputError("gain: expected numbers > 0")
        n_cond = len(plan.p_survive)
        if plan.gains and len(plan.gains) != n_cond:
            raise StopwiseInputError(
                f"gain: {len(plan.gains)} gains for {n_cond} survival chances; give one "
                "gain or one per chance"
            )
        if plan.allocation and (
            len(plan.allocation) != n_cond
            or any(n < 1 for n in plan.allocation)
            or sum(plan.allocation) != plan.trials
        ):
            raise StopwiseInputError(
                f"allocation {list(plan.allocation)}: expected {n_cond} whole numbers >= 1 "
                f"summing to the {plan.trials} trials"
            )
    if plan.trials < 1 or plan.subjects < 1:
        raise StopwiseInputError("trials and subjects: expected whole numbers >= 1")


def design(
    model: str | Model,
    params: Mapping[str, float],
    *,
    p_survive: Sequence[float] = (0.6, 0.75, 0.9),
    trials: int = 60,
    subjects: int = 100,
    gain: float | Sequence[float] = 1.0,
    start: float = 0.0,
    items: pd.DataFrame | None = None,
    allocation: Sequence[int] = (),
    contest: ContestScheme | Mapping[str, Any] | None = None,
    ranges: Mapping[str, tuple[float, float]] | None = None,
    versus: str | Model | None = None,
    candidates: Sequence[float] | None = None,
    choose: int = 3,
    criterion: str = "d",
    best: int = 5,
    max_payout: float | None = None,
    gain_candidates: Sequence[float] | None = None,
    allocation_step: int | None = None,
    options: Mapping[str, Any] | None = None,
) -> DesignResult:
    """Expected SEs, correlations and checks of a plan (``subjects`` x ``trials`` over
    ``p_survive``, or the lottery ``items`` once each) at ``params``, averaged over
    ``ranges``; with ``candidates`` the best sets of ``choose`` survival chances by
    ``criterion`` ("d" or "se:NAME"); with ``gain_candidates`` or ``allocation_step`` the
    chances, gains per draw and split of the trials together (design_allocation); with
    ``versus`` the discrimination of that rival. ``gain``: one gain or one per chance;
    ``allocation``: trials per chance; ``contest``: the scheme of a contest model's trials
    (a ContestScheme or a mapping with players, prize and keep_bank)."""
    the_model = resolve(model, options)
    ranges = dict(ranges or {})
    check_values(the_model, params, ranges)
    theta = {**the_model.start_theta(), **{k: float(v) for k, v in params.items()}}
    if contest is not None and not isinstance(contest, ContestScheme):
        contest = ContestScheme(**dict(contest))
    gains = (float(gain),) if np.ndim(gain) == 0 else tuple(float(g) for g in gain)
    plan = Plan(
        tuple(float(p) for p in p_survive),
        trials,
        subjects,
        gains[0] if len(gains) == 1 else 1.0,
        start,
        items,
        gains if len(gains) > 1 else (),
        tuple(int(n) for n in allocation),
        contest,
    )
    if the_model.data_kind == "lottery":
        if items is None:
            raise StopwiseInputError(f"model {the_model.name} answers a lottery list: give items")
        plan = Plan((), len(items), subjects, gain, start, items)
    check_plan(plan)
    if the_model.data_kind == "contest" and (candidates is not None or versus is not None):
        raise StopwiseInputError(
            "contest designs: expected precision only (no search over chances, no rival)"
        )
    result = expected_precision(the_model, theta, plan, ranges)
    if candidates is not None:
        if the_model.data_kind != "stopping":
            raise StopwiseInputError("optimising survival chances needs a stopping model")
        joint = gain_candidates is not None or allocation_step is not None
        if joint or plan.gains or plan.allocation:
            found: Any = search_allocations(
                the_model,
                theta,
                plan,
                candidates,
                gain_candidates or plan.condition_gains()[:1].tolist(),
                choose,
                allocation_step,
                criterion,
                ranges,
                best,
                max_payout,
            )
        else:
            found = search_designs(
                the_model, theta, plan, candidates, choose, criterion, ranges, best, max_payout
            )
        result.extras["optimisation"] = found.to_dict()
        result.extras["optimisation_text"] = found.summary()
    if versus is not None:
        rival = resolve(versus, options)
        if rival.data_kind != the_model.data_kind:
            raise StopwiseInputError(
                f"--versus {rival.name} is a {rival.data_kind} model; {the_model.name} is a "
                f"{the_model.data_kind} model"
            )
        rows = both_directions(the_model, theta, rival, plan)
        result.extras["discrimination"] = rows
        result.extras["discrimination_text"] = discrimination_text(rows, plan.subjects)
        add_lr_test(result, the_model, theta, rival, plan)
    return result


def candidate_grid(text: str) -> list[float]:
    """'0.5:0.97:0.01' -> [0.5, 0.51, ..., 0.97] (LO:HI:STEP, both ends included)."""
    parts = text.split(":")
    try:
        lo, hi, step = (float(p) for p in parts)
    except ValueError:
        raise StopwiseInputError(
            f"--candidates {text!r}: expected LO:HI:STEP, e.g. 0.5:0.97:0.01"
        ) from None
    if not (0 < lo < hi < 1 and step > 0):
        raise StopwiseInputError(f"--candidates {text!r}: expected 0 < LO < HI < 1 and STEP > 0")
    count = int(np.floor((hi - lo) / step + 1e-9)) + 1
    return [round(lo + i * step, 10) for i in range(count)]


def add_lr_test(
    result: DesignResult, model: Model, theta: Mapping[str, float], rival: Model, plan: Plan
) -> None:
    """When the rival is nested in the model (true at ``theta``): the LR test's power and
    the participants for 80% / 95% power (design_power); a note when the nesting runs the
    other way (the power of rejecting a true small model is its size)."""
    relation = classify(model, rival)
    if relation.kind != "nested":
        return
    if (model, rival)[relation.big] is not model:
        result.notes.append(
            f"{model.name} is nested in {rival.name}: give the bigger model as --model for "
            "the sample size of the likelihood-ratio test"
        )
        return
    row = lr_test_plan(model, theta, rival, plan)
    result.extras["lr_test"] = row
    result.extras["lr_test_text"] = lr_test_text(row, plan.subjects)
