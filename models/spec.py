"""Model specs: "crra+planner+logit" -> a :class:`~stopwise.models.base.Model`.

A spec joins parts with ``+``: one utility (linear, crra, cara, expo, pt), at most one
weighting (tk, prelec, prelec2, ge), at most one stopping policy (target, myopic, planner;
none for lottery-choice data) and a noise rule (logit or probit, optionally with tremble;
``tremble`` alone means logit with a tremble). A part naming a contest play concept (nash, qre,
levelk, ch, aqre) hands the whole spec to the contest models.

Model options (keyword arguments of :func:`build_model`, recorded in ``Model.options``):

- ``wealth`` (float, default 0): utilities are over wealth + payoff.
- ``reference`` ("start" or a number): the prospect-theory reference point; "start" (the
  default) is the bank at the start of the trial for stopping data and 0 for lotteries.
- ``contextual`` (bool, default False): contextual utility (Wilcox 2011).
- ``max_p_survive`` (default None: the data's largest p_survive when the data are concrete,
  else 0.99; at most 0.999): the survival chance the static caps are sized for (a warning
  says when concrete data exceed it).
- ``target_tolerance`` (default 1e-4): targets considered succeed with at least this chance.
- ``max_target`` (int or None): a fixed cap on planned / possible draws (see models.stopping).

Parameter bounds (open intervals; start values in brackets): r (-3, 5) [0.3] (expo: (-3, 1));
a (-5, 5) [0.05]; alpha, beta (0.05, 2.5) [0.8]; loss_aversion (0.1, 10) [1.5];
gamma (tk: (0.28, 2); others (0.1, 2.5)) [0.7]; delta (tk (0.28, 2) [0.7]; elevation
(0.1, 5) [1]); precision (0, inf) [1, or 5 when contextual]; sigma (0, inf) [1, or 0.2
when contextual]; tremble (0, 1) [0.05].
"""

from __future__ import annotations

import dataclasses
import json
import math
import warnings
from collections.abc import Mapping
from typing import Any

import jax
import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.limits import MAX_TARGET
from stopwise.models.base import Model, ParamSpec
from stopwise.models.domain import check_outcome_domain
from stopwise.models.learning import (
    LEARNING_PARAMS,
    LEARNING_PART,
    check_learning_data,
    learner_conditions,
)
from stopwise.models.learning_simulate import simulate_learners
from stopwise.models.lottery import lottery_loglik, lottery_predict
from stopwise.models.noise import NOISE
from stopwise.models.simulate import simulate_lottery, simulate_stopping
from stopwise.models.stopping import (
    LARGEST_MAX_P_SURVIVE,
    POLICIES,
    Caps,
    Conditions,
    RiskParts,
    gather_rows,
    policy_tables,
)
from stopwise.models.table_size import check_table_size
from stopwise.models.utility import UTILITIES
from stopwise.models.weighting import WEIGHTINGS

CONTEST_PARTS = ("nash", "qre", "levelk", "ch", "aqre")

KNOWN_PARTS: dict[str, tuple[str, ...]] = {
    "utility": tuple(UTILITIES),
    "weighting": tuple(WEIGHTINGS),
    "policy": POLICIES,
    "learning": (LEARNING_PART,),
    "noise": ("logit", "probit", "tremble"),
    "contest": CONTEST_PARTS,
}

DEFAULT_OPTIONS: dict[str, Any] = {
    "wealth": 0.0,
    "reference": "start",
    "contextual": False,
    "max_p_survive": None,
    "target_tolerance": 1e-4,
    "max_target": None,
}


def known_parts_text() -> str:
    """One line per kind of part, for error messages."""
    return "; ".join(f"{kind}: {', '.join(names)}" for kind, names in KNOWN_PARTS.items())


def split_spec(spec: str) -> list[str]:
    """'CRRA + planner+logit' -> ['crra', 'planner', 'logit'] (refuses empty parts)."""
    if not isinstance(spec, str) or not spec.strip():
        raise StopwiseInputError(
            f"model spec must be a non-empty string like crra+planner+logit, got {spec!r}"
        )
    parts = [p.strip().lower() for p in spec.split("+")]
    if any(not p for p in parts):
        raise StopwiseInputError(f"model spec {spec!r} has an empty part (two '+' in a row?)")
    return parts


def _kind_of(part: str, spec: str) -> str:
    for kind, names in KNOWN_PARTS.items():
        if part in names:
            return kind
    raise StopwiseInputError(
        f"unknown part {part!r} in model spec {spec!r}; known parts are {known_parts_text()}"
    )


def _one(kinds: dict[str, list[str]], kind: str, spec: str, required: bool) -> str | None:
    found = kinds.get(kind, [])
    if len(found) > 1:
        raise StopwiseInputError(
            f"model spec {spec!r} names more than one {kind}: {', '.join(found)}; choose one of "
            f"{', '.join(KNOWN_PARTS[kind])}"
        )
    if required and not found:
        raise StopwiseInputError(
            f"model spec {spec!r} names no {kind}; add one of {', '.join(KNOWN_PARTS[kind])}"
        )
    return found[0] if found else None


def _noise_name(noise_parts: list[str], spec: str) -> str:
    bases = [p for p in noise_parts if p != "tremble"]
    trembles = len(noise_parts) - len(bases)
    if len(bases) > 1 or trembles > 1:
        raise StopwiseInputError(
            f"model spec {spec!r} names noise rules {', '.join(noise_parts)}; use one of logit or "
            "probit, optionally with tremble"
        )
    if not noise_parts:
        raise StopwiseInputError(
            f"model spec {spec!r} names no noise rule; add logit, probit or tremble"
        )
    base = bases[0] if bases else "logit"
    return f"{base}+tremble" if trembles else base


def _check_options(options: Mapping[str, Any]) -> dict[str, Any]:
    unknown = [k for k in options if k not in DEFAULT_OPTIONS]
    if unknown:
        raise StopwiseInputError(
            f"unknown model option(s) {', '.join(unknown)}; known options: "
            f"{', '.join(DEFAULT_OPTIONS)}"
        )
    merged = {**DEFAULT_OPTIONS, **{k: v for k, v in options.items() if v is not None}}
    try:
        merged["wealth"] = float(merged["wealth"])
        if merged["max_p_survive"] is not None:
            merged["max_p_survive"] = float(merged["max_p_survive"])
        merged["target_tolerance"] = float(merged["target_tolerance"])
        merged["contextual"] = bool(merged["contextual"])
        if merged["max_target"] is not None:
            merged["max_target"] = int(merged["max_target"])
        if merged["reference"] != "start":
            merged["reference"] = float(merged["reference"])
    except (TypeError, ValueError) as exc:
        raise StopwiseInputError(f"bad model option value: {exc}") from None
    checks = [
        (math.isfinite(merged["wealth"]) and merged["wealth"] >= 0, "wealth must be >= 0"),
        (
            merged["max_p_survive"] is None or 0 < merged["max_p_survive"] <= 0.999,
            "max_p_survive must lie in (0, 0.999]",
        ),
        (0 < merged["target_tolerance"] < 1, "target_tolerance must lie in (0, 1)"),
        (merged["max_target"] is None or merged["max_target"] >= 1, "max_target must be >= 1"),
        (
            merged["max_target"] is None or merged["max_target"] <= MAX_TARGET,
            f"max_target must be at most {MAX_TARGET} (the documented limit, README 'Limits')",
        ),
    ]
    for ok, message in checks:
        if not ok:
            raise StopwiseInputError(f"model option: {message}")
    return merged


def _noise_params(noise: str, contextual: bool) -> tuple[ParamSpec, ...]:
    """Noise parameter specs; start values on the contextual (unit-range) scale if asked."""
    specs = NOISE[noise].params
    if not contextual:
        return specs
    starts = {"precision": 5.0, "sigma": 0.2}
    return tuple(
        dataclasses.replace(s, start=starts[s.name]) if s.name in starts else s for s in specs
    )


def canonical_name(
    utility: str, weighting: str | None, policy: str | None, noise: str, learning: str | None = None
) -> str:
    """utility[+weighting][+learn][+policy]+noise, e.g. 'pt+prelec+target+logit'."""
    return "+".join(p for p in (utility, weighting, learning, policy, noise) if p)


def build_model(spec: str, **options: Any) -> Model:
    """Parse ``spec`` (see the module docstring) into a Model with the given options."""
    parts = split_spec(spec)
    kinds: dict[str, list[str]] = {}
    for part in parts:
        kinds.setdefault(_kind_of(part, spec), []).append(part)
    if "contest" in kinds:
        from stopwise.models.contest.build import build_contest_model

        return build_contest_model(parts, **options)
    utility = _one(kinds, "utility", spec, required=True)
    weighting = _one(kinds, "weighting", spec, required=False)
    policy = _one(kinds, "policy", spec, required=False)
    learning = _one(kinds, "learning", spec, required=False)
    if learning and policy is None:
        raise StopwiseInputError(
            f"model spec {spec!r}: 'learn' needs a stopping policy ({', '.join(POLICIES)})"
        )
    noise = _noise_name(kinds.get("noise", []), spec)
    opts = _check_options(options)
    risk = RiskParts(
        utility=UTILITIES[utility],
        weighting=WEIGHTINGS[weighting] if weighting else None,
        noise=NOISE[noise],
        wealth=opts["wealth"],
        reference=opts["reference"],
        contextual=opts["contextual"],
    )
    params = (
        risk.utility.params
        + (risk.weighting.params if risk.weighting else ())
        + _noise_params(noise, opts["contextual"])
        + (LEARNING_PARAMS if learning else ())
    )
    name = canonical_name(utility, weighting, policy, noise, learning)
    if policy is None:
        return _lottery_model(name, params, risk, opts)
    caps = Caps(opts["max_p_survive"], opts["target_tolerance"], opts["max_target"])
    return _stopping_model(name, params, risk, policy, caps, opts, learning is not None)


def _stopping_model(
    name: str,
    params: tuple[ParamSpec, ...],
    risk: RiskParts,
    policy: str,
    caps: Caps,
    opts: dict[str, Any],
    learning: bool = False,
) -> Model:
    seen: dict[str, Caps] = {}

    def prepare(data: Any) -> None:
        """Size the static caps from concrete data before an engine traces the likelihood
        (the largest survival chance seen so far wins), so traced evaluations do not fall
        back to the generous default bound."""
        check_outcome_domain(name, risk.utility.name, risk.wealth, data)
        for message in check_learning_data(name, data) if learning else ():
            warnings.warn(message, stacklevel=2)
        sized = caps.sized_for(data.cond_p_survive)
        n_cond = len(np.asarray(data.cond_p_survive))
        check_table_size(name, policy, risk.noise.base, n_cond, int(data.horizon), sized)
        previous = seen.get("caps")
        if sized.max_p_survive is not None and (
            previous is None or sized.max_p_survive > previous.p_bound
        ):
            seen["caps"] = sized

    def tables(theta: Any, data: Any) -> tuple[Any, Any]:
        warn_beyond_caps(data, caps, policy)
        if isinstance(data.cond_p_survive, jax.core.Tracer):
            sized = seen.get("caps", caps)
        else:
            sized = caps.sized_for(data.cond_p_survive)
        cond = Conditions.from_data(data)
        if learning:
            cond = learner_conditions(cond, data, theta)
        return policy_tables(policy, risk, theta, cond, data.horizon, sized)

    def loglik_obs(theta: Any, data: Any) -> Any:
        """log P(action of each row | condition, step): the policy's table, gathered."""
        log_draw, log_stop = tables(theta, data)
        return gather_rows(log_draw, log_stop, data)

    def predict(theta: Any, data: Any) -> Any:
        """P(draw | condition, step) per row."""
        log_draw, _ = tables(theta, data)
        return jax.numpy.exp(log_draw)[data.cond, data.step]

    sim_tables = jax.jit(
        lambda theta, cond, n_steps, sized: policy_tables(
            policy, risk, theta, cond, n_steps, sized, 0
        ),
        static_argnums=(2, 3),
    )

    def simulate(theta: Any, design: Any, key: Any) -> Any:
        check_design_tables(design)
        if learning:
            return simulate_learners(policy, caps, theta, design, key, sim_tables)
        return simulate_stopping(policy, risk, caps, theta, design, key, tables_fn=sim_tables)

    def check_design_tables(design: Any) -> None:
        """The table-size limit for a simulation design (its survival chances in (0, 1))."""
        if "p_survive" not in getattr(design, "columns", ()):
            return
        p = pd.to_numeric(design["p_survive"], errors="coerce").to_numpy(dtype=np.float64)
        p = np.unique(p[(p > 0) & (p < 1)])
        if p.size:
            check_table_size(name, policy, risk.noise.base, p.size, 1, caps.sized_for(p))

    def program_key() -> str:
        """What the traced likelihood depends on besides the data's shapes: the model, its
        options and the static caps in use (estimation/program_store.py)."""
        return structure_key(name, opts, repr(seen.get("caps", caps)))

    return Model(
        name=name,
        params=params,
        loglik_obs=loglik_obs,
        simulate=simulate,
        data_kind="stopping",
        predict=predict,
        options={
            **opts,
            "policy": policy,
            "prepare": prepare,
            "learning": learning,
            "program_key": program_key,
            "horizon_invariant": horizon_invariant(policy, caps),
        },
        description=f"stopping model {name}",
    )


def horizon_invariant(policy: str, caps: Caps) -> bool:
    """Whether padding the data's horizon (more steps than any trial has) leaves every row's
    log-likelihood unchanged: the myopic rule looks one step ahead; the planner without
    ``max_target`` plans H = horizon + ceil(log(1e-15)/log p) steps, so a longer horizon adds
    only terms below 1e-15. The target rule's set of targets and the planner's
    max(horizon, max_target) extend to the horizon: padding it changes the model."""
    return policy == "myopic" or (policy == "planner" and caps.max_target is None)


def structure_key(name: str, opts: Mapping[str, Any], caps: str) -> str:
    """JSON text naming a spec-built model's traced structure: its canonical name, its plain
    options and its static caps (the key of its stored programs)."""
    plain = {k: v for k, v in opts.items() if v is None or isinstance(v, (str, int, float))}
    return json.dumps({"model": name, "options": plain, "caps": caps}, sort_keys=True)


def warn_beyond_caps(data: Any, caps: Caps, policy: str) -> None:
    """Warn (when the data are concrete numpy arrays, e.g. closed over by a jitted objective)
    if a survival chance exceeds ``max_p_survive``, the value the static caps are sized for."""
    p_survive = getattr(data, "cond_p_survive", None)
    if caps.max_target is not None or policy == "myopic" or not isinstance(p_survive, np.ndarray):
        return
    largest = float(np.max(p_survive)) if p_survive.size else 0.0
    bound = LARGEST_MAX_P_SURVIVE if caps.max_p_survive is None else caps.max_p_survive
    if largest > bound:
        effect = (
            "targets are capped below the tolerance rule"
            if policy == "target"
            else "the planner's cap may leave a chance above 1e-15 of reaching it"
        )
        warnings.warn(
            f"the data have p_survive up to {largest:g}, above max_p_survive={bound:g}: "
            f"{effect}; rebuild the model with a larger max_p_survive (at most 0.999) or a "
            "max_target",
            stacklevel=3,
        )


def _lottery_model(
    name: str, params: tuple[ParamSpec, ...], risk: RiskParts, opts: dict[str, Any]
) -> Model:
    def loglik_obs(theta: Any, data: Any) -> Any:
        """log P(observed choice) per lottery row."""
        return lottery_loglik(risk, theta, data)

    def prepare(data: Any) -> None:
        """Refuse outcomes outside a power utility's domain (models.domain) before fitting."""
        check_outcome_domain(name, risk.utility.name, risk.wealth, data)

    def predict(theta: Any, data: Any) -> Any:
        """P(choose B) per row."""
        return lottery_predict(risk, theta, data)

    predict_jit = jax.jit(predict)

    def simulate(theta: Any, design: Any, key: Any) -> Any:
        return simulate_lottery(predict_jit, theta, design, key)

    lottery_opts = {k: opts[k] for k in ("wealth", "reference", "contextual")}
    lottery_opts["prepare"] = prepare
    lottery_opts["program_key"] = lambda: structure_key(name, opts, "")
    return Model(
        name=name,
        params=params,
        loglik_obs=loglik_obs,
        simulate=simulate,
        data_kind="lottery",
        predict=predict,
        options=lottery_opts,
        description=f"lottery-choice model {name}",
    )
