"""Noise (choice) rules: from value differences to log choice probabilities (pure JAX).

Binary choice between option 1 and option 2 with value difference d = V1 - V2:

- ``logit`` (``precision`` = lambda > 0): P(1) = 1 / (1 + exp(-lambda d)), computed as
  log_sigmoid(lambda d).
- ``probit`` (Fechner, ``sigma`` > 0): P(1) = Phi(d / sigma), computed with log_ndtr; sigma is
  the standard deviation of the error on the *difference*.
- ``tremble`` (``tremble`` = eps in (0, 1)) mixes a uniform choice into a base rule:
  P = (1 - eps) P_base + eps / n for n options. Spec parts: ``logit+tremble``,
  ``probit+tremble``; ``tremble`` alone means ``logit+tremble``.

Multi-option choice among values v_1..v_K (``log_choice_probs``):

- logit: log P(j) = lambda v_j - logsumexp_k(lambda v_k) (log_softmax);
- probit with independent normal errors of sd s = sigma/sqrt(2) on every value (so that two
  options reproduce the binary rule): P(j) = E_e[prod_{k != j} Phi((v_j - v_k)/s + e)],
  e ~ N(0, 1), by Gauss-Hermite quadrature with ``PROBIT_NODES`` nodes centred where each
  option's integrand has its mass, summed in log space (relative error about 1e-7 even for
  options many standard deviations below the best).

``mask`` (boolean, same shape as ``values``) removes options from the choice set: they get a
value 1000 (in units of the scaled values) below the worst option, so their probability is
below exp(-1000) (0 in float64) while every log probability stays finite; tremble mass is
spread only over the options in the set.

Contextual utility (Wilcox 2011) divides value differences by the range of utilities of the
outcomes in the choice context before the rule is applied; models do that with
:func:`contextual_divisor`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from jax.scipy.special import log_ndtr

from stopwise.models.base import ParamSpec

Theta = Mapping[str, Any]

PROBIT_NODES = 32
_MASK_GAP = 1000.0
_HERMITE_X, _HERMITE_W = np.polynomial.hermite.hermgauss(PROBIT_NODES)
_LOG_HERMITE_W = np.log(_HERMITE_W) - 0.5 * math.log(math.pi)

PRECISION_SPEC = ParamSpec("precision", 0.0, math.inf, 1.0, "logit precision (0 = random)")
SIGMA_SPEC = ParamSpec("sigma", 0.0, math.inf, 1.0, "probit (Fechner) noise s.d.")
TREMBLE_SPEC = ParamSpec("tremble", 0.0, 1.0, 0.05, "share of uniformly random choices")


@dataclass(frozen=True)
class NoiseRule:
    """A noise rule: ``base`` ("logit" or "probit"), optionally with a tremble."""

    name: str
    base: str
    tremble: bool
    params: tuple[ParamSpec, ...]

    def log_p_choose(self, diff: Any, theta: Theta) -> tuple[Any, Any]:
        """(log P(option 1), log P(option 2)) for value difference ``diff`` = V1 - V2."""
        return log_p_choose(diff, theta, self)

    def log_choice_probs(self, values: Any, theta: Theta, axis: int = -1, mask: Any = None) -> Any:
        """log P(choose j) among the options along ``axis`` of ``values``."""
        return log_choice_probs(values, theta, self, axis=axis, mask=mask)


def _rule(base: str, tremble: bool) -> NoiseRule:
    base_spec = PRECISION_SPEC if base == "logit" else SIGMA_SPEC
    params = (base_spec, TREMBLE_SPEC) if tremble else (base_spec,)
    return NoiseRule(f"{base}+tremble" if tremble else base, base, tremble, params)


NOISE: dict[str, NoiseRule] = {
    "logit": _rule("logit", False),
    "probit": _rule("probit", False),
    "logit+tremble": _rule("logit", True),
    "probit+tremble": _rule("probit", True),
    "tremble": _rule("logit", True),  # shorthand: logit with a tremble
}


def noise_rule(rule: str | NoiseRule) -> NoiseRule:
    """The rule named ``rule`` (one of NOISE) or ``rule`` itself."""
    if isinstance(rule, NoiseRule):
        return rule
    try:
        return NOISE[rule]
    except KeyError:
        raise KeyError(f"unknown noise rule {rule!r}; known: {', '.join(NOISE)}") from None


def _mix_tremble(log_p: Any, eps: Any, n_options: Any) -> Any:
    """log[(1 - eps) p + eps / n] = logaddexp(log1p(-eps) + log p, log eps - log n)."""
    return jnp.logaddexp(jnp.log1p(-eps) + log_p, jnp.log(eps) - jnp.log(n_options))


def log_sigmoid_pair(z: Any) -> tuple[Any, Any]:
    """(log sigmoid(z), log sigmoid(-z)) from one exp and one log1p:
    with l = log(1 + exp(-|z|)), log sigmoid(z) = min(z, 0) - l and log sigmoid(-z) =
    min(-z, 0) - l (no cancellation for large |z|; about half the work of two calls).
    The branches are chosen by one sign test, so every derivative (also at z = 0) is that
    of a single smooth branch."""
    upper = z >= 0
    shared = jnp.log1p(jnp.exp(jnp.where(upper, -z, z)))
    return jnp.where(upper, -shared, z - shared), jnp.where(upper, -z - shared, -shared)


def log_p_choose(diff: Any, theta: Theta, rule: str | NoiseRule = "logit") -> tuple[Any, Any]:
    """Binary choice: (log P(1), log P(2)) for d = V1 - V2.

    logit: log_sigmoid(+-precision d); probit: log_ndtr(+-d / sigma); with a tremble
    log[(1 - eps) P + eps/2].
    """
    rule = noise_rule(rule)
    diff = jnp.asarray(diff, dtype=jnp.float64)
    if rule.base == "logit":
        z = jnp.asarray(theta["precision"], dtype=jnp.float64) * diff
        log_p, log_q = log_sigmoid_pair(z)
    else:
        z = diff / jnp.asarray(theta["sigma"], dtype=jnp.float64)
        log_p, log_q = log_ndtr(z), log_ndtr(-z)
    if rule.tremble:
        eps = jnp.asarray(theta["tremble"], dtype=jnp.float64)
        log_p, log_q = _mix_tremble(log_p, eps, 2.0), _mix_tremble(log_q, eps, 2.0)
    return log_p, log_q


def _apply_mask(scaled: Any, mask: Any) -> Any:
    """Options outside ``mask`` get a scaled value _MASK_GAP below the worst option in it."""
    if mask is None:
        return scaled
    lowest = jnp.min(jnp.where(mask, scaled, jnp.inf), axis=-1, keepdims=True)
    return jnp.where(mask, scaled, jax.lax.stop_gradient(lowest) - _MASK_GAP)


def stable_log_softmax(scaled: Any) -> Any:
    """log_softmax over the last axis: s = min(x - max x, 0); s - log sum exp(s).

    The clamp at 0 is exact mathematically; it keeps exp() from overflowing when a compiled
    program recomputes huge values (|x| ~ 1e90) with rounding differences.
    """
    shifted = scaled - jax.lax.stop_gradient(jnp.max(scaled, axis=-1, keepdims=True))
    shifted = jnp.where(shifted > 0, 0.0, shifted)
    return shifted - jnp.log(jnp.sum(jnp.exp(shifted), axis=-1, keepdims=True))


def _probit_log_probs(scaled: Any) -> Any:
    """log E_e[prod_{k != j} Phi(a_j - a_k + e)] over the last axis, by Gauss-Hermite.

    The nodes are centred at m_j = (max_k a_k - a_j)/2, where the integrand of an option far
    below the best one has its mass: E_e[f(e)] = E_x[exp(-m x - m^2/2) f(x + m)], x ~ N(0, 1).
    """
    gaps = scaled[..., :, None] - scaled[..., None, :]  # a_j - a_k
    size = scaled.shape[-1]
    off_diagonal = ~jnp.eye(size, dtype=bool)
    shift = 0.5 * (jnp.max(scaled, axis=-1, keepdims=True) - scaled)  # m_j

    @jax.checkpoint
    def node_term(x_node: Any, log_w: Any) -> Any:
        x = math.sqrt(2.0) * x_node  # standard normal node
        terms = jnp.where(off_diagonal, log_ndtr(gaps + (x + shift)[..., :, None]), 0.0)
        return log_w - shift * x - 0.5 * shift**2 + jnp.sum(terms, axis=-1)

    def body(acc: Any, node: tuple[Any, Any]) -> tuple[Any, None]:
        return jnp.logaddexp(acc, node_term(*node)), None

    start = jnp.full(scaled.shape, -jnp.inf)
    nodes = (jnp.asarray(_HERMITE_X), jnp.asarray(_LOG_HERMITE_W))
    total, _ = jax.lax.scan(body, start, nodes)
    return jnp.where(total > 0, 0.0, total)  # rounding can put log P of a sure choice at +1e-16


def log_choice_probs(
    values: Any,
    theta: Theta,
    rule: str | NoiseRule = "logit",
    axis: int = -1,
    mask: Any = None,
) -> Any:
    """log P(choose j) among the values along ``axis`` (see the module docstring).

    logit: log_softmax(precision v); probit: Gauss-Hermite form of
    E_e[prod_{k != j} Phi((v_j - v_k) sqrt(2)/sigma + e)]; tremble: log[(1-eps) P + eps/n].
    """
    rule = noise_rule(rule)
    values = jnp.asarray(values, dtype=jnp.float64)
    if mask is not None:
        mask = jnp.moveaxis(jnp.broadcast_to(jnp.asarray(mask, bool), values.shape), axis, -1)
    values = jnp.moveaxis(values, axis, -1)
    if rule.base == "logit":
        scaled = _apply_mask(jnp.asarray(theta["precision"], jnp.float64) * values, mask)
        log_p = stable_log_softmax(scaled)
    else:
        factor = math.sqrt(2.0) / jnp.asarray(theta["sigma"], jnp.float64)
        log_p = _probit_log_probs(_apply_mask(factor * values, mask))
    if rule.tremble:
        eps = jnp.asarray(theta["tremble"], dtype=jnp.float64)
        n_options = values.shape[-1] if mask is None else jnp.sum(mask, axis=-1, keepdims=True)
        mixed = _mix_tremble(log_p, eps, n_options)
        log_p = mixed if mask is None else jnp.where(mask, mixed, jnp.log1p(-eps) + log_p)
    return jnp.moveaxis(log_p, -1, axis)


def contextual_divisor(u_best: Any, u_worst: Any) -> Any:
    """Wilcox (2011) context: u(best outcome) - u(worst outcome), 1 where the range is 0."""
    spread = jnp.asarray(u_best, jnp.float64) - jnp.asarray(u_worst, jnp.float64)
    return jnp.where(spread > 0, spread, 1.0)
