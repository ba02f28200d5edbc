"""Stopping policies: P(draw | condition, step) tables for the "draw again or stop" task.

A trial starts with bank b_0 = start; each draw succeeds with probability p (adding ``gain`` g
to the bank) or busts, ending the trial with bust_keep * b_s (the share kept of the bank held
before the draw). A stop ends the trial with the bank. Utilities are over wealth + amount
(model option ``wealth``); prospect-theory values are around the reference point (model
option ``reference``: "start" = the bank at the start of the trial, or a fixed amount).

Every policy computes, for each condition c and step s < n_steps, the pair
(log P(draw | c, s), log P(stop | c, s)); models gather rows from these tables, so the
likelihood of a row never runs a dynamic programme of its own.

- ``myopic``: compare the bank with one more draw followed by a stop:
  d(s) = W[u(b_{s+1}) w.p. p; u(k b_s) otherwise] - u(b_s), P(draw) = noise(d).
- ``planner``: backward induction with the noise inside (the participant anticipates their
  own future noise): V(H) = u(b_H);
  Q(s) = W[V(s+1) w.p. p; u(k b_s) otherwise], P(s) = noise(Q(s) - u(b_s)),
  V(s) = u(b_s) + P(s) (Q(s) - u(b_s)).
  W is the expected value, or the rank-dependent / cumulative value of the two-outcome gamble
  when a weighting is named (the continuation value ranks as an outcome).
  The cap H is a numerical truncation: H = horizon + ceil(log(1e-15) / log(max_p_survive))
  (max_p_survive: the model option, or by default the data's largest p_survive when the data
  are concrete, else 0.99, i.e. 3,437 extra steps), so reaching the cap from any observed
  step has probability below 1e-15; a model option ``max_target`` replaces it by a task cap
  max(horizon, max_target).
- ``target``: a target T in {0..cap_c} is chosen once per trial by the noise rule over
  V_T = pi_bank(T) u(b_T) + sum_{k<T} pi_k u(k b_k)  (the lottery "reach T, else bust at k"),
  with decision weights from the decumulative probabilities P(X >= b_T) = p^T,
  P(X >= k b_k) = p^k (EU: pi_k = p^k (1-p)); then the participant draws until T.
  Row factorisation by the hazard: P(draw at s) = P(T > s) / P(T >= s),
  P(stop at s) = P(T = s) / P(T >= s) (log space, cumulative log-sum-exp), so a bust after k
  successes contributes P(T > k) only. The set of targets is part of the model (with logit
  every extra target takes probability mass): cap_c = max(horizon, ceil(log(tol)/log p_c)),
  i.e. up to the first target whose chance of success p^T falls to tol (``target_tolerance``,
  default 1e-4) or below, extended to the longest observed trial (the data horizon), within a
  static bound computed with max_p_survive;
  ``max_target`` fixes cap_c = max(horizon, max_target) instead.

Contextual utility (Wilcox 2011, option ``contextual``): value differences are divided by the
utility range of the outcomes of the one-step gamble, u(b_{s+1}) - u(k b_s) (target: at s = 0).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.models.noise import NoiseRule, contextual_divisor, log_p_choose
from stopwise.models.noise import log_choice_probs as noise_log_choice_probs
from stopwise.models.utility import UtilityFamily
from stopwise.models.weighting import WeightingFamily, two_outcome_value, weight_functions

Theta = Mapping[str, Any]
POLICIES = ("target", "myopic", "planner")
PLANNER_TOLERANCE = 1e-15


@dataclass(frozen=True)
class RiskParts:
    """The risk-preference parts of a model and its fixed options."""

    utility: UtilityFamily
    weighting: WeightingFamily | None
    noise: NoiseRule
    wealth: float = 0.0
    reference: str | float = "start"
    contextual: bool = False

    @property
    def sign_dependent(self) -> bool:
        """True for prospect-theory values (cumulative weighting of gains and losses)."""
        return self.utility.uses_reference


@dataclass(frozen=True)
class Conditions:
    """Per-condition arrays (n_cond,): survival chance, gain, start bank, share kept on bust,
    and optionally an urn that makes the survival chance depend on the step s:
        p(c, s) = (urn_good + urn_drift s) / (urn_total + urn_drift s)  (0 once <= 0),
    drift -1 for draws without replacement (good items G of N), +1 for a Beta-posterior
    learner (models.learning), 0 (or no urn) for a constant p_survive."""

    p_survive: Any
    gain: Any
    start: Any
    bust_keep: Any
    urn_good: Any = None
    urn_total: Any = None
    urn_drift: Any = None

    @classmethod
    def from_data(cls, data: Any) -> Conditions:
        """The data's conditions; pool conditions (cond_pool_size > 0) get their urn."""
        base = cls(data.cond_p_survive, data.cond_gain, data.cond_start, data.cond_bust_keep)
        size = getattr(data, "cond_pool_size", None)
        if size is None:
            return base
        return with_pool_urn(base, size, data.cond_pool_bad)


def with_pool_urn(cond: Conditions, pool_size: Any, pool_bad: Any) -> Conditions:
    """Urn (G, N, -1) where pool_size N > 0 (G = N - pool_bad); (p, 1, 0) elsewhere."""
    size = jnp.asarray(pool_size, jnp.float64)
    pool = size > 0
    p = jnp.asarray(cond.p_survive, jnp.float64)
    return replace(
        cond,
        urn_good=jnp.where(pool, size - jnp.asarray(pool_bad, jnp.float64), p),
        urn_total=jnp.where(pool, size, 1.0),
        urn_drift=jnp.where(pool, -1.0, 0.0),
    )


jax.tree_util.register_dataclass(
    Conditions,
    data_fields=["p_survive", "gain", "start", "bust_keep", "urn_good", "urn_total", "urn_drift"],
    meta_fields=[],
)


def step_chances(cond: Conditions, n: int) -> Any:
    """p(c, s) for s = 0..n-1, shape (n_cond, n) (see Conditions); exactly p_survive where
    there is no urn or its drift is 0."""
    p = jnp.asarray(cond.p_survive, jnp.float64)[:, None]
    if cond.urn_drift is None:
        return jnp.broadcast_to(p, (p.shape[0], n))
    steps = jnp.arange(n, dtype=jnp.float64)[None, :]
    drift = jnp.asarray(cond.urn_drift, jnp.float64)[:, None]
    good = jnp.asarray(cond.urn_good, jnp.float64)[:, None] + drift * steps
    total = jnp.asarray(cond.urn_total, jnp.float64)[:, None] + drift * steps
    alive = (good > 0) & (total > 0)
    chance = jnp.where(alive, good / jnp.where(alive, total, 1.0), 0.0)
    return jnp.where(drift == 0, p, chance)


def force_stop_where_no_chance(log_draw: Any, log_stop: Any, chances: Any) -> tuple[Any, Any]:
    """Steps with survival chance 0 (a pool without good items) end the trial: P(stop) = 1."""
    dead = chances <= 0.0
    return jnp.where(dead, -jnp.inf, log_draw), jnp.where(dead, 0.0, log_stop)


FALLBACK_MAX_P_SURVIVE = 0.99
LARGEST_MAX_P_SURVIVE = 0.999


@dataclass(frozen=True)
class Caps:
    """Static sizes: planner cap H and number of targets considered.

    ``max_p_survive`` None (the default) sizes the caps from the data when their survival
    chances are concrete (numpy arrays, e.g. data closed over by a jitted objective), and
    from 0.99 when they are traced. Both give the same target set (the per-condition mask
    decides it) and planner tables equal within 1e-9 (the planner cap test).
    """

    max_p_survive: float | None = None
    target_tolerance: float = 1e-4
    max_target: int | None = None

    @property
    def p_bound(self) -> float:
        """The survival chance the static sizes are computed for."""
        return FALLBACK_MAX_P_SURVIVE if self.max_p_survive is None else self.max_p_survive

    def sized_for(self, p_survive: Any) -> Caps:
        """These caps with max_p_survive taken from concrete survival chances (if unset)."""
        if self.max_p_survive is not None or isinstance(p_survive, jax.core.Tracer):
            return self
        values = np.asarray(p_survive, dtype=np.float64)
        if values.size == 0:
            return self
        bound = float(np.clip(np.max(values), 0.5, LARGEST_MAX_P_SURVIVE))
        return replace(self, max_p_survive=bound)

    def planner_cap(self, n_steps: int) -> int:
        """H = n_steps + ceil(log(1e-15)/log(max_p_survive)), or max(n_steps, max_target)."""
        if self.max_target is not None:
            return max(n_steps, self.max_target)
        return n_steps + tolerance_steps(self.p_bound, PLANNER_TOLERANCE)

    def n_targets(self, n_steps: int) -> int:
        """Static count of targets 0..K-1: K - 1 = max(n_steps, cap at max_p_survive)."""
        if self.max_target is not None:
            return max(n_steps, self.max_target) + 1
        return max(n_steps, tolerance_steps(self.p_bound, self.target_tolerance)) + 1


def tolerance_steps(p_survive: float, tolerance: float) -> int:
    """Smallest n with p_survive^n <= tolerance: ceil(log(tolerance) / log(p_survive))."""
    return max(1, math.ceil(math.log(tolerance) / math.log(p_survive)))


def outcome_utility(parts: RiskParts, theta: Theta, amount: Any, start: Any) -> Any:
    """u(wealth + amount); prospect values around wealth + reference (start or fixed)."""
    x = parts.wealth + amount
    if not parts.utility.uses_reference:
        return parts.utility.fn(x, theta)
    ref_amount = start if parts.reference == "start" else float(parts.reference)
    return parts.utility.fn(x, theta, parts.wealth + ref_amount)


def _bank_utilities(parts: RiskParts, theta: Theta, cond: Conditions, n: int) -> tuple[Any, Any]:
    """u(b_s) and u(k b_s) for s = 0..n-1, each (n_cond, n), with b_s = start + s gain."""
    steps = jnp.arange(n, dtype=jnp.float64)
    start = jnp.asarray(cond.start, jnp.float64)[:, None]
    bank = start + steps[None, :] * jnp.asarray(cond.gain, jnp.float64)[:, None]
    keep = jnp.asarray(cond.bust_keep, jnp.float64)[:, None]
    return (
        outcome_utility(parts, theta, bank, start),
        outcome_utility(parts, theta, keep * bank, start),
    )


def _gamble_value(parts: RiskParts, theta: Theta, v_success: Any, p: Any, v_bust: Any) -> Any:
    """W[v_success w.p. p; v_bust otherwise] (expected, rank-dependent or cumulative)."""
    if parts.weighting is None and not parts.sign_dependent:
        return p * v_success + (1.0 - p) * v_bust
    w_gain, w_loss = weight_functions(parts.weighting, theta)
    return two_outcome_value(v_success, p, v_bust, w_gain, w_loss, parts.sign_dependent)


def _scaled_difference(parts: RiskParts, diff: Any, u_best: Any, u_worst: Any) -> Any:
    return diff / contextual_divisor(u_best, u_worst) if parts.contextual else diff


def myopic_tables(
    parts: RiskParts, theta: Theta, cond: Conditions, n_steps: int
) -> tuple[Any, Any]:
    """(log P(draw), log P(stop)), (n_cond, n_steps): one draw then stop vs stop now."""
    u_bank, u_bust = _bank_utilities(parts, theta, cond, n_steps + 1)
    p = step_chances(cond, n_steps)
    now, after, bust = u_bank[:, :-1], u_bank[:, 1:], u_bust[:, :-1]
    diff = _gamble_value(parts, theta, after, p, bust) - now
    log_draw, log_stop = log_p_choose(
        _scaled_difference(parts, diff, after, bust), theta, parts.noise
    )
    return force_stop_where_no_chance(log_draw, log_stop, p)


def planner_tables(
    parts: RiskParts, theta: Theta, cond: Conditions, n_steps: int, cap: int
) -> tuple[Any, Any]:
    """(log P(draw), log P(stop)), (n_cond, n_steps), by noisy backward induction to ``cap``."""
    cap = max(cap, n_steps)
    u_bank, u_bust = _bank_utilities(parts, theta, cond, cap + 1)
    chances = step_chances(cond, cap)

    def step(v_next: Any, xs: tuple[Any, Any, Any, Any]) -> tuple[Any, tuple[Any, Any]]:
        u_now, u_after, u_lost, p = xs
        q_draw = _gamble_value(parts, theta, v_next, p, u_lost)
        diff = q_draw - u_now
        log_draw, log_stop = log_p_choose(
            _scaled_difference(parts, diff, u_after, u_lost), theta, parts.noise
        )
        log_draw, log_stop = force_stop_where_no_chance(log_draw, log_stop, p)
        return u_now + jnp.exp(log_draw) * diff, (log_draw, log_stop)

    xs = (u_bank[:, :-1].T, u_bank[:, 1:].T, u_bust[:, :-1].T, chances.T)
    _, (log_draw, log_stop) = jax.lax.scan(step, u_bank[:, -1], xs, reverse=True)
    return log_draw[:n_steps].T, log_stop[:n_steps].T


def target_values(parts: RiskParts, theta: Theta, cond: Conditions, n_targets: int) -> Any:
    """V_T for T = 0..n_targets-1, shape (n_cond, n_targets) (see the module docstring)."""
    u_bank, u_bust = _bank_utilities(parts, theta, cond, n_targets)
    log_reach = log_reach_probabilities(cond, n_targets + 1)
    reach = jnp.exp(log_reach[:, :-1])  # P(X >= b_T) = prod_{j<T} p(j)  (p^T)
    reach_next = jnp.exp(log_reach[:, 1:])
    w_gain, w_loss = weight_functions(parts.weighting, theta)
    bank_weight = w_gain(reach)
    bust_weight = w_gain(reach) - w_gain(reach_next)
    if parts.sign_dependent:
        bank_weight = jnp.where(u_bank >= 0, bank_weight, 1.0 - w_loss(1.0 - reach))
        loss_weight = w_loss(1.0 - reach_next) - w_loss(1.0 - reach)
        bust_weight = jnp.where(u_bust >= 0, bust_weight, loss_weight)
    bust_terms = bust_weight * u_bust
    before = jnp.cumsum(bust_terms, axis=-1) - bust_terms  # sum over k < T
    return bank_weight * u_bank + before


def log_reach_probabilities(cond: Conditions, n: int) -> Any:
    """log P(the first t draws all succeed) = sum_{j<t} log p(c, j), t = 0..n-1, (n_cond, n);
    t log p_survive exactly where the chance is constant (no urn or drift 0)."""
    steps = jnp.arange(n, dtype=jnp.float64)[None, :]
    log_p = jnp.log(jnp.asarray(cond.p_survive, jnp.float64))[:, None]
    constant = steps * log_p
    if cond.urn_drift is None:
        return constant
    log_chances = jnp.log(step_chances(cond, n - 1))
    zero = jnp.zeros((log_p.shape[0], 1))
    varying = jnp.concatenate([zero, jnp.cumsum(log_chances, axis=1)], axis=1)
    return jnp.where(jnp.asarray(cond.urn_drift)[:, None] == 0, constant, varying)


def target_caps(cond: Conditions, observed: int, n_targets: int, caps: Caps) -> Any:
    """cap_c per condition (n_cond,), at least ``observed`` (see the module docstring); with a
    step-dependent chance, the first target whose chance of success falls to the tolerance."""
    if caps.max_target is not None:
        return jnp.full(jnp.shape(cond.p_survive), n_targets - 1)
    log_p = jnp.log(jnp.asarray(cond.p_survive, jnp.float64))
    by_tolerance = jnp.ceil(math.log(caps.target_tolerance) / log_p)
    if cond.urn_drift is not None:
        log_reach = log_reach_probabilities(cond, n_targets)[:, 1:]
        above = jnp.sum(log_reach > math.log(caps.target_tolerance), axis=1) + 1.0
        by_tolerance = jnp.where(jnp.asarray(cond.urn_drift) == 0, by_tolerance, above)
    return jnp.clip(jnp.maximum(by_tolerance, observed), 1, n_targets - 1)


def target_log_probs(
    parts: RiskParts, theta: Theta, cond: Conditions, observed: int, caps: Caps
) -> Any:
    """log P(T = t), shape (n_cond, K) with K = caps.n_targets(observed); 0 beyond cap_c."""
    n_targets = caps.n_targets(observed)
    values = target_values(parts, theta, cond, n_targets)
    if parts.contextual:
        u_bank, u_bust = _bank_utilities(parts, theta, cond, 2)
        values = values / contextual_divisor(u_bank[:, 1:2], u_bust[:, 0:1])
    cap = target_caps(cond, observed, n_targets, caps)
    mask = jnp.arange(n_targets)[None, :] <= cap[:, None]
    return noise_log_choice_probs(values, theta, parts.noise, axis=-1, mask=mask)


def reverse_cumulative_logsumexp(log_values: Any) -> Any:
    """out[:, t] = log sum_{j >= t} exp(log_values[:, j]), by a sequential scan (logaddexp).

    A scan rather than lax.cumlogsumexp: its gradient compiles in a fraction of the time.
    """

    def step(acc: Any, column: Any) -> tuple[Any, Any]:
        total = jnp.logaddexp(acc, column)
        return total, total

    start = jnp.full(log_values.shape[:-1], -jnp.inf)
    _, totals = jax.lax.scan(step, start, jnp.moveaxis(log_values, -1, 0), reverse=True)
    return jnp.moveaxis(totals, 0, -1)


def target_tables(
    parts: RiskParts,
    theta: Theta,
    cond: Conditions,
    n_steps: int,
    caps: Caps,
    observed: int | None = None,
) -> tuple[Any, Any]:
    """(log P(draw), log P(stop)), (n_cond, n_steps), from the hazard of the target.

    ``observed`` (default n_steps) is the data horizon the target caps are extended to;
    n_steps may be at most caps.n_targets(observed) - 1.
    """
    observed = n_steps if observed is None else observed
    log_target = target_log_probs(parts, theta, cond, observed, caps)
    log_at_least = reverse_cumulative_logsumexp(log_target)  # log P(T >= t)
    log_draw = log_at_least[:, 1 : n_steps + 1] - log_at_least[:, :n_steps]
    log_stop = log_target[:, :n_steps] - log_at_least[:, :n_steps]
    return force_stop_where_no_chance(log_draw, log_stop, step_chances(cond, n_steps))


def policy_tables(
    policy: str,
    parts: RiskParts,
    theta: Theta,
    cond: Conditions,
    n_steps: int,
    caps: Caps,
    observed: int | None = None,
) -> tuple[Any, Any]:
    """Dispatch to the named policy's tables (log P(draw), log P(stop)), (n_cond, n_steps).

    ``observed`` (default n_steps) is the data horizon: the planner's cap is
    caps.planner_cap(observed) and the target caps extend to it (simulators pass 0).
    """
    observed = n_steps if observed is None else observed
    if policy == "myopic":
        return myopic_tables(parts, theta, cond, n_steps)
    if policy == "planner":
        return planner_tables(parts, theta, cond, n_steps, caps.planner_cap(observed))
    if policy == "target":
        return target_tables(parts, theta, cond, n_steps, caps, observed)
    raise ValueError(f"unknown stopping policy {policy!r}; known: {', '.join(POLICIES)}")


def gather_rows(log_draw: Any, log_stop: Any, data: Any) -> Any:
    """Per row: log P(draw | cond, step) where draw = 1, else log P(stop | cond, step)."""
    n_steps = log_draw.shape[-1]
    table = computed_once(jnp.stack([log_stop, log_draw], axis=-1).reshape(-1), data.cond_gain)
    index = (jnp.asarray(data.cond) * n_steps + jnp.asarray(data.step)) * 2
    return table[index + (jnp.asarray(data.draw) > 0.5).astype(index.dtype)]


def computed_once(table: Any, anchor: Any) -> Any:
    """``table`` unchanged (bit for bit), computed once rather than once per gathered row.

    XLA fuses the elementwise operations that build a small (n_cond, n_steps) table into the
    gather that reads it, so each row recomputes its entry, and under forward-mode
    derivatives its tangents too (the myopic value, gradient and Hessian cost ~150 ns per
    row on 2 cores, 2026-12-02; XLA's CPU compiler drops ``jax.lax.optimization_barrier``
    before fusion). A conditional is a fusion boundary. Its predicate ``all(anchor ==
    anchor)`` depends on the data (true unless the anchor holds NaN) so XLA cannot fold it,
    and both branches return the table's values.
    """
    anchor = jnp.asarray(anchor)
    return jax.lax.cond(jnp.all(anchor == anchor), lambda t: t, lambda t: t + 0.0, table)
