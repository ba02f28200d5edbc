"""How two models relate before any test is chosen: nested, overlapping or non-nested.

A model A is *nested* in B when fixing some of B's parameters at stated values gives A for
every data set (the restriction is named, e.g. ``tremble = 0`` or ``r = 0``). Two models
*overlap* when neither nests the other but both reduce to a common model (crra and cara both
reduce to linear utility, at r = 0 and a = 0). Otherwise they are *non-nested* (logit versus
probit noise, one stopping policy versus another).

The relation is read from the spec parts by one-step reductions that are facts of the
trade (common practice, no source):

* noise:      X+tremble  -> X                  at tremble = 0 (a boundary of [0, 1])
* utility:    crra -> linear at r = 0;  cara -> linear at a = 0;  expo -> cara at r = 0;
              pt -> linear at alpha = beta = loss_aversion = 1
* weighting:  tk -> none at gamma = delta = 1;  prelec -> none at gamma = 1;
              prelec2 -> prelec at delta = 1;  ge -> none at gamma = delta = 1

Their closure gives every model a spec reduces to, with the accumulated restriction. A
model of your own may declare its restrictions: ``options["restrictions"] = {other_name:
{param: value}}``. A claimed nesting is then *verified* on the data (``verify_nesting``):
the big model's log-likelihood at the small model's estimate plus the restriction must
equal the small model's; a claim that fails is reported and the pair treated as
non-nested.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import jax
import numpy as np

from stopwise.models.spec import KNOWN_PARTS

REDUCTIONS_UTILITY: dict[str, tuple[tuple[str, dict[str, float]], ...]] = {
    "crra": (("linear", {"r": 0.0}),),
    "cara": (("linear", {"a": 0.0}),),
    "expo": (("cara", {"r": 0.0}),),
    "pt": (("linear", {"alpha": 1.0, "beta": 1.0, "loss_aversion": 1.0}),),
}
REDUCTIONS_WEIGHTING: dict[str, tuple[tuple[str | None, dict[str, float]], ...]] = {
    "tk": ((None, {"gamma": 1.0, "delta": 1.0}),),
    "prelec": ((None, {"gamma": 1.0}),),
    "prelec2": (("prelec", {"delta": 1.0}),),
    "ge": ((None, {"gamma": 1.0, "delta": 1.0}),),
}
VERIFY_TOLERANCE = 1e-6  # |ln L_big(restricted) - ln L_small| <= tol * (1 + |ln L_small|)


@dataclass(frozen=True)
class SpecParts:
    """A solo or lottery spec split into its parts (policy None for lottery models)."""

    utility: str
    weighting: str | None
    policy: str | None
    noise: str
    tremble: bool

    def name(self) -> str:
        parts = [self.utility, self.weighting, self.policy, self.noise]
        return "+".join(p for p in parts if p) + ("+tremble" if self.tremble else "")


@dataclass
class Relation:
    """``kind``: "nested", "overlapping" or "non-nested". For "nested", ``small`` and
    ``big`` are indices into the pair (0 or 1) and ``restriction`` the values that reduce
    the big model to the small one; ``boundary`` lists restricted parameters whose value is
    a bound of their range. ``common`` names the shared special case of overlapping models."""

    kind: str
    small: int = 0
    big: int = 1
    restriction: dict[str, float] = field(default_factory=dict)
    boundary: list[str] = field(default_factory=list)
    common: str = ""
    reason: str = ""

    def restriction_text(self) -> str:
        return ", ".join(f"{k} = {v:g}" for k, v in self.restriction.items())


def parse_parts(model: Any) -> SpecParts | None:
    """SpecParts from a spec-built solo/lottery model's name; None for contest models and
    models of one's own (their name is not a spec)."""
    if getattr(model, "data_kind", None) not in ("stopping", "lottery"):
        return None
    found: dict[str, list[str]] = {}
    for part in str(model.name).lower().split("+"):
        kind = next((k for k, names in KNOWN_PARTS.items() if part in names), None)
        if kind is None or kind == "contest":
            return None
        found.setdefault(kind, []).append(part)
    if len(found.get("utility", [])) != 1:
        return None
    noise = found.get("noise", [])
    bases = [n for n in noise if n != "tremble"]
    return SpecParts(
        utility=found["utility"][0],
        weighting=(found.get("weighting") or [None])[0],
        policy=(found.get("policy") or [None])[0],
        noise=bases[0] if bases else "logit",
        tremble="tremble" in noise,
    )


def one_step_reductions(parts: SpecParts) -> list[tuple[SpecParts, dict[str, float]]]:
    """Every spec one known restriction away from ``parts`` (module docstring)."""
    out: list[tuple[SpecParts, dict[str, float]]] = []
    if parts.tremble:
        out.append((_with(parts, tremble=False), {"tremble": 0.0}))
    for target, values in REDUCTIONS_UTILITY.get(parts.utility, ()):
        if target == "linear" and parts.utility == "pt" and parts.weighting:
            continue  # pt's weighting of losses has no counterpart without pt
        out.append((_with(parts, utility=target), dict(values)))
    if parts.weighting:
        for w_target, values in REDUCTIONS_WEIGHTING.get(parts.weighting, ()):
            out.append((_with(parts, weighting=w_target), dict(values)))
    return out


def _with(parts: SpecParts, **changes: Any) -> SpecParts:
    values = {**parts.__dict__, **changes}
    return SpecParts(**values)


def reachable(parts: SpecParts) -> dict[SpecParts, dict[str, float]]:
    """Every spec ``parts`` reduces to (itself included) with the accumulated restriction
    (breadth first, so each restriction is a shortest one)."""
    seen: dict[SpecParts, dict[str, float]] = {parts: {}}
    frontier = [parts]
    while frontier:
        nxt = []
        for p in frontier:
            for q, values in one_step_reductions(p):
                if q not in seen:
                    seen[q] = {**seen[p], **values}
                    nxt.append(q)
        frontier = nxt
    return seen


def declared_restriction(big: Any, small: Any) -> dict[str, float] | None:
    """A model's own declaration (options["restrictions"][small.name]), if any."""
    declared = (big.options or {}).get("restrictions") if hasattr(big, "options") else None
    if isinstance(declared, Mapping) and small.name in declared:
        return {str(k): float(v) for k, v in declared[small.name].items()}
    return None


def same_options(model_a: Any, model_b: Any) -> bool:
    """Fixed settings that change the likelihood (wealth, reference, contextual) agree."""
    keys = ("wealth", "reference", "contextual")
    oa, ob = dict(model_a.options or {}), dict(model_b.options or {})
    return all(oa.get(k) == ob.get(k) for k in keys)


def classify(model_a: Any, model_b: Any) -> Relation:
    """The relation of two models (module docstring); structure only, not yet verified."""
    for small, big in ((0, 1), (1, 0)):
        models = (model_a, model_b)
        declared = declared_restriction(models[big], models[small])
        if declared is not None:
            return _nested(models, small, big, declared, "declared by the model")
    pa, pb = parse_parts(model_a), parse_parts(model_b)
    if pa is None or pb is None or not same_options(model_a, model_b):
        why = (
            "different fixed settings (wealth, reference or contextual)"
            if pa is not None and pb is not None
            else "no known restriction links these models"
        )
        return Relation("non-nested", reason=why)
    if pa == pb:
        return Relation("non-nested", reason="the same specification twice")
    ra, rb = reachable(pa), reachable(pb)
    if pb in ra:
        return _nested((model_a, model_b), 1, 0, ra[pb], "spec parts")
    if pa in rb:
        return _nested((model_a, model_b), 0, 1, rb[pa], "spec parts")
    common = [p for p in ra if p in rb]
    if common:
        shared = min(common, key=lambda p: len(ra[p]) + len(rb[p]))
        return Relation(
            "overlapping",
            common=shared.name(),
            reason=f"both reduce to {shared.name()} ({_text(ra[shared])}; {_text(rb[shared])})",
        )
    return Relation("non-nested", reason="no restriction of either gives the other")


def _text(values: Mapping[str, float]) -> str:
    return ", ".join(f"{k} = {v:g}" for k, v in values.items())


def _nested(
    models: tuple[Any, Any], small: int, big: int, restriction: dict[str, float], how: str
) -> Relation:
    big_model = models[big]
    boundary = []
    for name, value in restriction.items():
        spec = big_model.spec(name)
        if np.isclose(value, spec.lower) or np.isclose(value, spec.upper):
            boundary.append(name)
    return Relation(
        "nested",
        small=small,
        big=big,
        restriction=dict(restriction),
        boundary=boundary,
        reason=f"{models[small].name} = {big_model.name} at {_text(restriction)} ({how})",
    )


def verify_nesting(
    big_model: Any,
    small_theta: Mapping[str, float],
    restriction: Mapping[str, float],
    data: Any,
    small_loglik: float,
) -> tuple[bool, float]:
    """ln L_big(theta_small with the restriction) against ln L_small(theta_small): returns
    (agree within VERIFY_TOLERANCE, the absolute difference). Parameters of the big model
    that are neither restricted nor in the small model make the claim false."""
    theta: dict[str, float] = {}
    for name in big_model.param_names:
        if name in restriction:
            theta[name] = float(restriction[name])
        elif name in small_theta:
            theta[name] = float(small_theta[name])
        else:
            return False, float("inf")
    loglik = jax.jit(big_model.loglik_obs)
    value = float(np.sum(np.asarray(loglik(theta, data))))
    gap = abs(value - small_loglik)
    return bool(np.isfinite(value) and gap <= VERIFY_TOLERANCE * (1.0 + abs(small_loglik))), gap
