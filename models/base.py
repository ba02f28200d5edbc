"""The model contract every engine relies on.

A model is a value: its parameter specs, a pure JAX function giving the log-likelihood of
each observation, and a simulator. Engines (maximum likelihood, Bayes, comparison, recovery)
see nothing else, so a user-written model gets every engine for free.

    loglik_obs(theta, data) -> jnp.ndarray of shape (n_obs,)
        theta: mapping parameter name -> scalar (natural scale, float64)
        data:  a StoppingData or LotteryData bundle (see stopwise.data_schemas.arrays)
    simulate(theta, design, key) -> pandas.DataFrame in the data format of DESIGN.md
        design: a DataFrame with one row per trial (stopping: subject, trial, p_survive,
        gain and optional columns) or per lottery item (lottery: subject, item, a_x1, ...)
        key: a jax.random key
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

import jax.numpy as jnp

Theta = Mapping[str, Any]
DataKind = Literal["stopping", "lottery", "contest"]


@dataclass(frozen=True)
class ParamSpec:
    """One parameter: its name, bounds (open interval), start value and unconstrained map.

    Transform to the unconstrained scale z, by the bounds (lo, hi):
      both finite:  x = lo + (hi - lo) * sigmoid(z)
      lo only:      x = lo + exp(z)
      hi only:      x = hi - exp(z)
      neither:      x = z
    """

    name: str
    lower: float = -math.inf
    upper: float = math.inf
    start: float = 0.0
    description: str = ""

    def __post_init__(self) -> None:
        if not self.lower < self.upper:
            raise ValueError(f"parameter {self.name}: lower bound must be below upper bound")
        if not self.lower < self.start < self.upper:
            raise ValueError(
                f"parameter {self.name}: start {self.start} must lie strictly inside "
                f"({self.lower}, {self.upper})"
            )

    @property
    def transform(self) -> str:
        lo, hi = math.isfinite(self.lower), math.isfinite(self.upper)
        return {(True, True): "logit", (True, False): "log", (False, True): "neglog"}.get(
            (lo, hi), "identity"
        )

    def to_natural(self, z: Any, xp: Any = jnp) -> Any:
        """Map an unconstrained value z to the natural scale (see the class docstring);
        ``xp`` is the array module (jax.numpy by default, numpy for host-side reporting)."""
        kind = self.transform
        if kind == "logit":
            return self.lower + (self.upper - self.lower) * xp.exp(-xp.logaddexp(0.0, -z))
        if kind == "log":
            return self.lower + xp.exp(z)
        if kind == "neglog":
            return self.upper - xp.exp(z)
        return z

    def to_unconstrained(self, x: Any) -> Any:
        """Inverse of :meth:`to_natural`."""
        kind = self.transform
        if kind == "logit":
            u = (x - self.lower) / (self.upper - self.lower)
            return jnp.log(u) - jnp.log1p(-u)
        if kind == "log":
            return jnp.log(x - self.lower)
        if kind == "neglog":
            return jnp.log(self.upper - x)
        return x

    def log_abs_det_jacobian(self, z: Any) -> Any:
        """log |dx/dz| at unconstrained z (used by samplers for priors on the natural scale)."""
        kind = self.transform
        if kind == "logit":
            return jnp.log(self.upper - self.lower) - jnp.logaddexp(0.0, -z) - jnp.logaddexp(0.0, z)
        if kind in ("log", "neglog"):
            return z
        return jnp.zeros_like(z)


@dataclass(frozen=True)
class Model:
    """A fitted-or-simulated model: parameter specs, per-observation log-likelihood, simulator.

    ``predict`` (optional) maps (theta, data) to the probability of the modelled response per
    observation (P(draw) for stopping rows, P(choose B) for lottery rows).
    ``options`` records fixed, non-estimated settings (reference point, horizon, ...).
    """

    name: str
    params: tuple[ParamSpec, ...]
    loglik_obs: Callable[[Theta, Any], Any]
    simulate: Callable[[Theta, Any, Any], Any]
    data_kind: DataKind
    predict: Callable[[Theta, Any], Any] | None = None
    options: Mapping[str, Any] = field(default_factory=dict)
    description: str = ""

    @property
    def param_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.params)

    def start_theta(self) -> dict[str, float]:
        return {p.name: p.start for p in self.params}

    def spec(self, name: str) -> ParamSpec:
        for p in self.params:
            if p.name == name:
                return p
        raise KeyError(f"model {self.name} has no parameter {name!r}; it has {self.param_names}")

    def __hash__(self) -> int:  # models are used as static arguments of jitted functions
        return id(self)

    def __eq__(self, other: object) -> bool:
        return self is other
