"""Binary lottery choice: P(choose B) under EU, RDU or CPT with a noise rule (pure JAX).

Each option is a lottery over K outcomes (padded with probability 0). Its value is

- EU (no weighting, utility other than ``pt``): V = sum_k p_k u(wealth + x_k);
- RDU (a weighting with a utility other than ``pt``): V = sum_i [w(c_i) - w(c_{i-1})] u_i,
  outcomes ranked from best (Quiggin 1982);
- CPT (``pt``, optionally weighted): gains and losses around the reference (model option
  ``reference``, default 0 for lottery data) weighted apart (Tversky & Kahneman 1992);

and P(B) = noise(V_B - V_A). With ``contextual=True`` the difference is divided by
u(best outcome) - u(worst outcome) over both options (Wilcox 2011).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import jax.numpy as jnp

from stopwise.models.noise import contextual_divisor, log_p_choose
from stopwise.models.stopping import RiskParts
from stopwise.models.weighting import (
    cumulative_prospect_value,
    expected_value,
    rank_dependent_value,
    weight_functions,
)

Theta = Mapping[str, Any]


def outcome_utilities(parts: RiskParts, theta: Theta, outcomes: Any) -> Any:
    """u(wealth + x), or v(x - reference) for prospect theory, elementwise."""
    x = parts.wealth + jnp.asarray(outcomes, jnp.float64)
    if not parts.utility.uses_reference:
        return parts.utility.fn(x, theta)
    ref = 0.0 if parts.reference == "start" else float(parts.reference)
    return parts.utility.fn(x, theta, parts.wealth + ref)


def lottery_value(parts: RiskParts, theta: Theta, utilities: Any, probs: Any) -> Any:
    """Value of lotteries along the last axis (EU, RDU or CPT, see the module docstring)."""
    w_gain, w_loss = weight_functions(parts.weighting, theta)
    if parts.sign_dependent:
        return cumulative_prospect_value(utilities, probs, w_gain, w_loss)
    if parts.weighting is None:
        return expected_value(utilities, probs)
    return rank_dependent_value(utilities, probs, w_gain)


def value_difference(parts: RiskParts, theta: Theta, data: Any) -> Any:
    """V_B - V_A per row (divided by the utility range of both options when contextual)."""
    u_a = outcome_utilities(parts, theta, data.a_x)
    u_b = outcome_utilities(parts, theta, data.b_x)
    diff = lottery_value(parts, theta, u_b, data.b_p) - lottery_value(parts, theta, u_a, data.a_p)
    if not parts.contextual:
        return diff
    best = jnp.maximum(jnp.max(u_a, axis=-1), jnp.max(u_b, axis=-1))
    worst = jnp.minimum(jnp.min(u_a, axis=-1), jnp.min(u_b, axis=-1))
    return diff / contextual_divisor(best, worst)


def lottery_log_probs(parts: RiskParts, theta: Theta, data: Any) -> tuple[Any, Any]:
    """(log P(choose B), log P(choose A)) per row."""
    return log_p_choose(value_difference(parts, theta, data), theta, parts.noise)


def lottery_loglik(parts: RiskParts, theta: Theta, data: Any) -> Any:
    """Per row: log P(B) where choice_b = 1, else log P(A)."""
    log_b, log_a = lottery_log_probs(parts, theta, data)
    return jnp.where(jnp.asarray(data.choice_b) > 0.5, log_b, log_a)


def lottery_predict(parts: RiskParts, theta: Theta, data: Any) -> Any:
    """P(choose B) per row."""
    return jnp.exp(lottery_log_probs(parts, theta, data)[0])
