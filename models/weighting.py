"""Probability weighting functions and rank-dependent / cumulative aggregation (pure JAX).

Families (``fn(p, theta, losses=False) -> w``, elementwise, w(0) = 0 and w(1) = 1 exactly):

- ``tk`` (Tversky & Kahneman 1992): w(p) = p^c / (p^c + (1-p)^c)^(1/c) with c = ``gamma`` for
  gains and c = ``delta`` for losses. Bounded below at 0.28 where w stops being monotone
  (Ingersoll 2008 puts the limit near 0.279).
- ``prelec`` (Prelec 1998, one parameter): w(p) = exp(-(-ln p)^gamma); w(1/e) = 1/e.
- ``prelec2`` (Prelec 1998, two parameters): w(p) = exp(-delta (-ln p)^gamma); ``gamma``
  curvature, ``delta`` elevation.
- ``ge`` (Goldstein & Einhorn 1987, as in Gonzalez & Wu 1999): w(p) = delta p^gamma /
  (delta p^gamma + (1-p)^gamma); ``gamma`` curvature, ``delta`` elevation.

Only ``tk`` weights losses with its own parameter; the others use the same w for gains and
losses.

Aggregation over outcomes on the last axis (any number K, padded outcomes with probability 0
add nothing): rank outcomes from best to worst, c_i = P(outcome ranked i or better);
rank-dependent utility (Quiggin 1982): V = sum_i [w(c_i) - w(c_{i-1})] u_i;
cumulative prospect theory (Tversky & Kahneman 1992): gains (v > 0) get
[w+(c_i) - w+(c_{i-1})], losses (v < 0) get [w-(1 - c_{i-1}) - w-(1 - c_i)].
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp

from stopwise.models.base import ParamSpec

Theta = Mapping[str, Any]
WeightFn = Callable[[Any], Any]


@dataclass(frozen=True)
class WeightingFamily:
    """A weighting family: name, parameter specs and ``fn(p, theta, losses=False) -> w``."""

    name: str
    params: tuple[ParamSpec, ...]
    fn: Callable[..., Any]
    description: str = ""


def _interior(p: Any) -> tuple[Any, Any, Any]:
    """(p as float64, mask of 0 < p < 1, a safe copy with 0.5 outside the interior)."""
    p = jnp.clip(jnp.asarray(p, dtype=jnp.float64), 0.0, 1.0)
    inside = (p > 0.0) & (p < 1.0)
    return p, inside, jnp.where(inside, p, 0.5)


def _finish(p: Any, inside: Any, w_inside: Any) -> Any:
    """w(0) = 0, w(1) = 1, and w_inside in between."""
    return jnp.where(inside, w_inside, jnp.where(p >= 1.0, 1.0, 0.0))


def tk_weight(p: Any, theta: Theta, losses: bool = False) -> Any:
    """w(p) = p^c / (p^c + (1-p)^c)^(1/c); c = gamma (gains) or delta (losses)."""
    c = jnp.asarray(theta["delta" if losses else "gamma"], dtype=jnp.float64)
    p, inside, q = _interior(p)
    log_num = c * jnp.log(q)
    log_den = jnp.logaddexp(c * jnp.log(q), c * jnp.log1p(-q)) / c
    return _finish(p, inside, jnp.exp(log_num - log_den))


def prelec_weight(p: Any, theta: Theta, losses: bool = False) -> Any:
    """w(p) = exp(-delta (-ln p)^gamma), delta = 1 unless ``theta`` has ``delta``."""
    gamma = jnp.asarray(theta["gamma"], dtype=jnp.float64)
    delta = jnp.asarray(theta.get("delta", 1.0), dtype=jnp.float64)
    p, inside, q = _interior(p)
    w = jnp.exp(-delta * jnp.exp(gamma * jnp.log(-jnp.log(q))))
    return _finish(p, inside, w)


def prelec_one_weight(p: Any, theta: Theta, losses: bool = False) -> Any:
    """w(p) = exp(-(-ln p)^gamma) (one-parameter Prelec 1998)."""
    return prelec_weight(p, {"gamma": theta["gamma"]}, losses)


def ge_weight(p: Any, theta: Theta, losses: bool = False) -> Any:
    """w(p) = delta p^gamma / (delta p^gamma + (1-p)^gamma) (Goldstein-Einhorn)."""
    gamma = jnp.asarray(theta["gamma"], dtype=jnp.float64)
    delta = jnp.asarray(theta["delta"], dtype=jnp.float64)
    p, inside, q = _interior(p)
    log_num = jnp.log(delta) + gamma * jnp.log(q)
    log_den = jnp.logaddexp(log_num, gamma * jnp.log1p(-q))
    return _finish(p, inside, jnp.exp(log_num - log_den))


TK_GAMMA = ParamSpec("gamma", 0.28, 2.0, 0.7, "weighting curvature for gains")
TK_DELTA = ParamSpec("delta", 0.28, 2.0, 0.7, "weighting curvature for losses")
CURVATURE = ParamSpec("gamma", 0.1, 2.5, 0.7, "weighting curvature (1 = no weighting)")
ELEVATION = ParamSpec("delta", 0.1, 5.0, 1.0, "weighting elevation (1 = neutral)")

WEIGHTINGS: dict[str, WeightingFamily] = {
    "tk": WeightingFamily("tk", (TK_GAMMA, TK_DELTA), tk_weight, "Tversky-Kahneman (1992)"),
    "prelec": WeightingFamily("prelec", (CURVATURE,), prelec_one_weight, "Prelec (1998), 1 par."),
    "prelec2": WeightingFamily(
        "prelec2", (CURVATURE, ELEVATION), prelec_weight, "Prelec (1998), 2 parameters"
    ),
    "ge": WeightingFamily("ge", (CURVATURE, ELEVATION), ge_weight, "Goldstein-Einhorn (1987)"),
}


def identity_weight(p: Any) -> Any:
    """w(p) = p."""
    return jnp.asarray(p, dtype=jnp.float64)


def weight_functions(family: WeightingFamily | None, theta: Theta) -> tuple[WeightFn, WeightFn]:
    """(w for gains, w for losses) of ``family`` at ``theta``; identities when None."""
    if family is None:
        return identity_weight, identity_weight
    return (lambda p: family.fn(p, theta, False)), (lambda p: family.fn(p, theta, True))


def expected_value(values: Any, probs: Any) -> Any:
    """V = sum_k p_k v_k over the last axis."""
    return jnp.sum(jnp.asarray(probs) * jnp.asarray(values), axis=-1)


def _ranked(values: Any, probs: Any) -> tuple[Any, Any, Any]:
    """Sort outcomes best to worst; return (values, c_i = P(rank <= i), c_{i-1})."""
    values = jnp.asarray(values, dtype=jnp.float64)
    probs = jnp.broadcast_to(jnp.asarray(probs, dtype=jnp.float64), values.shape)
    order = jnp.argsort(-values, axis=-1, stable=True)
    v = jnp.take_along_axis(values, order, axis=-1)
    p = jnp.take_along_axis(probs, order, axis=-1)
    upto = jnp.clip(jnp.cumsum(p, axis=-1), 0.0, 1.0)
    before = jnp.clip(upto - p, 0.0, 1.0)
    return v, upto, before


def rank_dependent_value(values: Any, probs: Any, weight: WeightFn) -> Any:
    """RDU: V = sum_i [w(c_i) - w(c_{i-1})] u_i, outcomes ranked from best (last axis)."""
    v, upto, before = _ranked(values, probs)
    return jnp.sum((weight(upto) - weight(before)) * v, axis=-1)


def cumulative_prospect_value(
    values: Any, probs: Any, weight_gain: WeightFn, weight_loss: WeightFn
) -> Any:
    """CPT: gains v_i > 0 weigh [w+(c_i) - w+(c_{i-1})], losses [w-(1-c_{i-1}) - w-(1-c_i)]."""
    v, upto, before = _ranked(values, probs)
    gain_weight = weight_gain(upto) - weight_gain(before)
    loss_weight = weight_loss(1.0 - before) - weight_loss(1.0 - upto)
    pi = jnp.where(v > 0, gain_weight, jnp.where(v < 0, loss_weight, 0.0))
    return jnp.sum(pi * v, axis=-1)


def two_outcome_value(
    v_first: Any,
    p_first: Any,
    v_second: Any,
    weight_gain: WeightFn,
    weight_loss: WeightFn,
    sign_dependent: bool,
) -> Any:
    """Value of the gamble (v_first with p_first, v_second otherwise), elementwise.

    Rank-dependent (sign_dependent False): V = w(P(best)) v_best + (1 - w(P(best))) v_worst.
    Cumulative (True): gains and losses weighted apart as in :func:`cumulative_prospect_value`.
    """
    first_better = v_first >= v_second
    v_hi = jnp.where(first_better, v_first, v_second)
    v_lo = jnp.where(first_better, v_second, v_first)
    p_hi = jnp.where(first_better, p_first, 1.0 - p_first)
    if not sign_dependent:
        w_hi = weight_gain(p_hi)
        return w_hi * v_hi + (1.0 - w_hi) * v_lo
    hi_weight = jnp.where(v_hi > 0, weight_gain(p_hi), 1.0 - weight_loss(1.0 - p_hi))
    lo_weight = jnp.where(v_lo < 0, weight_loss(1.0 - p_hi), 1.0 - weight_gain(p_hi))
    hi_weight = jnp.where(v_hi == 0, 0.0, hi_weight)
    lo_weight = jnp.where(v_lo == 0, 0.0, lo_weight)
    return hi_weight * v_hi + lo_weight * v_lo
