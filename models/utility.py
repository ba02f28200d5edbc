"""Utility (value) families: pure, elementwise JAX functions of an outcome.

Every family is a :class:`UtilityFamily` with ``fn(x, theta, ref=0.0) -> u`` (elementwise in
``x``; ``theta`` maps parameter names to scalars). Models evaluate utilities over
``wealth + payoff`` (model option ``wealth``, default 0); only ``pt`` uses ``ref``.

Families (parameters in brackets):

- ``linear`` []: u(x) = x.
- ``crra`` [r]: u(x) = (x^(1-r) - 1) / (1-r), = log x at r = 1. This differs from the textbook
  x^(1-r)/(1-r) only by the constant 1/(1-r), which no choice probability depends on, and it is
  continuous through r = 1 (computed as expm1((1-r) log x)/(1-r), with a series near r = 1).
- ``cara`` [a]: u(x) = (1 - exp(-a x)) / a, = x in the limit a -> 0 (computed as
  -expm1(-a x)/a, with a series near a = 0).
- ``expo`` [r, a]: expo-power (Saha 1993, in the form of Holt & Laury 2002):
  u(x) = (1 - exp(-a x^(1-r))) / a, = x^(1-r) in the limit a -> 0; r < 1.
  r = 0 gives CARA, a -> 0 gives power utility.
- ``pt`` [alpha, beta, loss_aversion]: prospect-theory value around the reference ``ref``
  (Tversky & Kahneman 1992): v = z^alpha for z = x - ref >= 0, v = -loss_aversion (-z)^beta
  for z < 0.

Convention at the edge of the domain (power families ``crra`` and ``expo``): utilities are
defined for x >= 0. For r >= 1, u(0) = -inf; an argument below 0 is outside the domain. Both
are represented by the finite floor ``UTILITY_FLOOR`` (-1e100, "minus infinity for practical
purposes"), so that choice probabilities and their gradients stay finite and NaN-free: a sure
zero is then worse than any gamble that may avoid it. Data with outcomes below zero are
refused before a fit (models.domain); give a positive ``wealth`` to avoid the edge.

Finite by construction on the documented parameter box (README, "Limits"): every family's
value lies in [UTILITY_FLOOR, UTILITY_CEILING] = [-1e100, 1e100] (clipped; the gradient is 0
where a value is clipped, so no NaN or inf can come from it), and exponents of ``crra``,
``cara`` and ``expo`` are clipped at 200 before exp (e^200 = 7e86, so even divided by the
smallest |a| outside the series band, 1e-4, a value stays below 1e100). A noise rule then
sees differences below 2e100 in size: times a precision up to 1e8 or divided by a sigma down
to 1e-8 they stay near 1e108, whose square (log_ndtr) is about 1e216 < 1.8e308. Clipping
only changes values for extreme risk-loving parameters at large stakes (cara/expo with
a x^(1-r) < -200), where the true utility exceeds every float anyway.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp

from stopwise.models.base import ParamSpec

UTILITY_FLOOR = -1e100
UTILITY_CEILING = 1e100
_SERIES_BAND = 1e-4  # use the series within this distance of the removable singularity
_MAX_EXPONENT = 200.0

Theta = Mapping[str, Any]


@dataclass(frozen=True)
class UtilityFamily:
    """A utility family: name, parameter specs and ``fn(x, theta, ref=0.0) -> u``."""

    name: str
    params: tuple[ParamSpec, ...]
    fn: Callable[..., Any]
    description: str = ""
    uses_reference: bool = False


def _floor_outside(valid: Any, value: Any) -> Any:
    """Where ``valid`` is false, the floor utility; keeps gradients finite (double where)."""
    return jnp.where(valid, bounded(value), UTILITY_FLOOR)


def bounded(u: Any) -> Any:
    """u clipped to [UTILITY_FLOOR, UTILITY_CEILING] (gradient 0 where clipped)."""
    return jnp.clip(u, UTILITY_FLOOR, UTILITY_CEILING)


def linear_utility(x: Any, theta: Theta, ref: Any = 0.0) -> Any:
    """u(x) = x."""
    return jnp.asarray(x, dtype=jnp.float64)


def power_index(log_x: Any, c: Any) -> Any:
    """(exp(c * log_x) - 1) / c, continuous at c = 0 where it is log_x.

    Near c = 0 the Taylor series log_x + c log_x^2 / 2 + c^2 log_x^3 / 6 is used (double where,
    so neither branch produces NaN in value or gradient). ``log_x`` must be finite.
    """
    near = jnp.abs(c) < _SERIES_BAND
    safe_c = jnp.where(near, 1.0, c)
    exponent = jnp.minimum(safe_c * log_x, _MAX_EXPONENT)
    exact = jnp.expm1(exponent) / safe_c
    series = log_x + c * log_x**2 / 2.0 + c**2 * log_x**3 / 6.0
    return jnp.where(near, series, exact)


def crra_utility(x: Any, theta: Theta, ref: Any = 0.0) -> Any:
    """u(x) = (x^(1-r) - 1)/(1-r), log x at r = 1; u(0) = -1/(1-r) for r < 1, floor for r >= 1."""
    x = jnp.asarray(x, dtype=jnp.float64)
    r = jnp.asarray(theta["r"], dtype=jnp.float64)
    c = 1.0 - r
    positive = x > 0
    log_x = jnp.log(jnp.where(positive, x, 1.0))
    u_positive = power_index(log_x, c)
    safe_c = jnp.where(c > 0, c, 1.0)
    u_zero = jnp.where(c > 0, -1.0 / safe_c, UTILITY_FLOOR)
    u = jnp.where(positive, u_positive, jnp.where(x == 0, u_zero, UTILITY_FLOOR))
    return bounded(u)


def exponential_index(x: Any, a: Any) -> Any:
    """(1 - exp(-a x)) / a, = x at a = 0 (series x - a x^2/2 + a^2 x^3/6 near a = 0)."""
    near = jnp.abs(a) < _SERIES_BAND
    safe_a = jnp.where(near, 1.0, a)
    exponent = jnp.minimum(-safe_a * x, _MAX_EXPONENT)
    exact = -jnp.expm1(exponent) / safe_a
    series = x - a * x**2 / 2.0 + a**2 * x**3 / 6.0
    return jnp.where(near, series, exact)


def cara_utility(x: Any, theta: Theta, ref: Any = 0.0) -> Any:
    """u(x) = (1 - exp(-a x))/a, the linear u = x in the limit a -> 0."""
    x = jnp.asarray(x, dtype=jnp.float64)
    return bounded(exponential_index(x, jnp.asarray(theta["a"], dtype=jnp.float64)))


def expo_power_utility(x: Any, theta: Theta, ref: Any = 0.0) -> Any:
    """u(x) = (1 - exp(-a x^(1-r)))/a (Saha 1993; Holt & Laury 2002), x >= 0, r < 1."""
    x = jnp.asarray(x, dtype=jnp.float64)
    r = jnp.asarray(theta["r"], dtype=jnp.float64)
    a = jnp.asarray(theta["a"], dtype=jnp.float64)
    positive = x > 0
    safe_x = jnp.where(positive, x, 1.0)
    powered = jnp.where(
        positive, jnp.exp(jnp.minimum((1.0 - r) * jnp.log(safe_x), _MAX_EXPONENT)), 0.0
    )
    u = exponential_index(powered, a)
    return _floor_outside(x >= 0, u)


def prospect_value(x: Any, theta: Theta, ref: Any = 0.0) -> Any:
    """v(z) = z^alpha (z >= 0), -loss_aversion (-z)^beta (z < 0), with z = x - ref."""
    z = jnp.asarray(x, dtype=jnp.float64) - jnp.asarray(ref, dtype=jnp.float64)
    alpha = jnp.asarray(theta["alpha"], dtype=jnp.float64)
    beta = jnp.asarray(theta["beta"], dtype=jnp.float64)
    lam = jnp.asarray(theta["loss_aversion"], dtype=jnp.float64)
    gain, loss = z > 0, z < 0
    safe_gain = jnp.where(gain, z, 1.0)
    safe_loss = jnp.where(loss, -z, 1.0)
    v_gain = jnp.exp(alpha * jnp.log(safe_gain))
    v_loss = -lam * jnp.exp(beta * jnp.log(safe_loss))
    return bounded(jnp.where(gain, v_gain, jnp.where(loss, v_loss, 0.0)))


R_SPEC = ParamSpec("r", -3.0, 5.0, 0.3, "CRRA curvature (0 risk neutral, > 0 risk averse)")
A_SPEC = ParamSpec("a", -5.0, 5.0, 0.05, "CARA coefficient (0 risk neutral, > 0 risk averse)")
EXPO_R_SPEC = ParamSpec("r", -3.0, 1.0, 0.3, "expo-power: power part, u ~ x^(1-r)")
EXPO_A_SPEC = ParamSpec("a", -5.0, 5.0, 0.05, "expo-power: exponential part")
ALPHA_SPEC = ParamSpec("alpha", 0.05, 2.5, 0.8, "prospect theory: curvature of gains")
BETA_SPEC = ParamSpec("beta", 0.05, 2.5, 0.8, "prospect theory: curvature of losses")
LOSS_AVERSION_SPEC = ParamSpec("loss_aversion", 0.1, 10.0, 1.5, "prospect theory: loss aversion")

UTILITIES: dict[str, UtilityFamily] = {
    "linear": UtilityFamily("linear", (), linear_utility, "risk neutral: u(x) = x"),
    "crra": UtilityFamily("crra", (R_SPEC,), crra_utility, "constant relative risk aversion"),
    "cara": UtilityFamily("cara", (A_SPEC,), cara_utility, "constant absolute risk aversion"),
    "expo": UtilityFamily(
        "expo", (EXPO_R_SPEC, EXPO_A_SPEC), expo_power_utility, "expo-power (Saha 1993)"
    ),
    "pt": UtilityFamily(
        "pt",
        (ALPHA_SPEC, BETA_SPEC, LOSS_AVERSION_SPEC),
        prospect_value,
        "prospect-theory value around a reference point",
        uses_reference=True,
    ),
}


def utility(name: str) -> UtilityFamily:
    """The utility family called ``name`` (KeyError listing the known ones otherwise)."""
    try:
        return UTILITIES[name]
    except KeyError:
        raise KeyError(f"unknown utility {name!r}; known: {', '.join(UTILITIES)}") from None
