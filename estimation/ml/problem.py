"""The estimation problem every engine shares: an unconstrained coefficient vector z, a pure
function giving the log-likelihood of each "row" (a decision, or a subject for mixtures),
row weights and row clusters.

    negll(z) = - sum_i w_i * ll_i(z)

Weights carry padding masks (w = 0), bootstrap resampling counts (w = number of times the
row's subject was drawn) and cross-validation folds (w = 0 for held-out subjects), so one
compiled function serves the fit, the bootstrap, the folds and the recovery replications.

Row functions are small frozen dataclasses (hashable, so they are static jit arguments); the
data they read is passed as an argument pytree, so a new data set of the same shape reuses
the compiled code.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.ml.optimize import value_grad_hess_forward
from stopwise.estimation.program_store import call_stored
from stopwise.models.base import Model, ParamSpec

# ---------------------------------------------------------------------------------------
# Parameter layout: how z maps to the model's parameters.


@dataclass(frozen=True)
class Layout:
    """Free parameters (each with ``n_coef`` coefficients: 1 without a formula) and the fixed
    ones. Equal layouts (same model object, same names) share compiled code."""

    model: Model
    free: tuple[str, ...]
    n_coef: tuple[int, ...]
    fixed: tuple[tuple[str, float], ...] = ()

    @property
    def size(self) -> int:
        return int(sum(self.n_coef))

    @property
    def offsets(self) -> tuple[int, ...]:
        return tuple(int(x) for x in np.cumsum((0, *self.n_coef))[:-1])

    def specs(self) -> tuple[ParamSpec, ...]:
        return tuple(self.model.spec(name) for name in self.free)


def make_layout(
    model: Model,
    fixed: Mapping[str, float] | None = None,
    n_coef: Mapping[str, int] | None = None,
) -> Layout:
    """Layout with every parameter free except ``fixed`` (checked against the specs)."""
    fixed = dict(fixed or {})
    n_coef = dict(n_coef or {})
    for name, value in fixed.items():
        if name not in model.param_names:
            raise StopwiseInputError(
                f"fixed parameter {name!r} is not a parameter of {model.name}; "
                f"it has {', '.join(model.param_names)}"
            )
        spec = model.spec(name)
        if not spec.lower < float(value) < spec.upper:
            raise StopwiseInputError(
                f"fixed value {name}={value} lies outside ({spec.lower}, {spec.upper})"
            )
    free = tuple(n for n in model.param_names if n not in fixed)
    if not free:
        raise StopwiseInputError(f"every parameter of {model.name} is fixed: nothing to fit")
    return Layout(
        model=model,
        free=free,
        n_coef=tuple(int(n_coef.get(n, 1)) for n in free),
        fixed=tuple(sorted((k, float(v)) for k, v in fixed.items())),
    )


def start_vector(layout: Layout) -> np.ndarray:
    """Spec start values on the unconstrained scale (intercepts), effects start at 0."""
    z = np.zeros(layout.size)
    for spec, off in zip(layout.specs(), layout.offsets):
        z[off] = unconstrained_np(spec, spec.start)
    return z


def unconstrained_np(spec: ParamSpec, x: float) -> float:
    """ParamSpec.to_unconstrained in numpy (host side: no small JAX program is compiled for
    a start value): logit: log(u) - log1p(-u), u = (x - lo) / (hi - lo); log: log(x - lo);
    neglog: log(hi - x); identity: x."""
    kind = spec.transform
    if kind == "logit":
        u = (float(x) - spec.lower) / (spec.upper - spec.lower)
        return float(np.log(u) - np.log1p(-u))
    if kind == "log":
        return float(np.log(float(x) - spec.lower))
    if kind == "neglog":
        return float(np.log(spec.upper - float(x)))
    return float(x)


def theta_scalars(layout: Layout, z: Any) -> dict[str, Any]:
    """theta_p = to_natural_p(z_p) for free parameters; fixed values as given."""
    theta: dict[str, Any] = {name: jnp.asarray(v) for name, v in layout.fixed}
    for spec, off in zip(layout.specs(), layout.offsets):
        theta[spec.name] = spec.to_natural(z[off])
    return theta


def theta_per_cell(layout: Layout, z: Any, designs: tuple[Any, ...]) -> dict[str, Any]:
    """theta_p[c] = to_natural_p(X_p[c] @ b_p): each parameter linear in its design matrix
    on the unconstrained scale (one row per cell)."""
    n_cells = designs[0].shape[0]
    theta: dict[str, Any] = {name: jnp.full(n_cells, v) for name, v in layout.fixed}
    for spec, off, n, x in zip(layout.specs(), layout.offsets, layout.n_coef, designs):
        theta[spec.name] = spec.to_natural(x @ z[off : off + n])
    return theta


# ---------------------------------------------------------------------------------------
# Row functions (static, hashable); ``args`` holds the arrays.


def layout_key(layout: Layout) -> str | None:
    """JSON text naming a layout's traced structure (the model's ``program_key`` option,
    free parameters, coefficients per parameter, fixed values), or None for a model without
    one (a user-written model: its programs are not stored across processes)."""
    describe = (layout.model.options or {}).get("program_key")
    if not callable(describe):
        return None
    parts = {"model": describe(), "free": layout.free, "n_coef": layout.n_coef}
    return json.dumps({**parts, "fixed": [[k, repr(v)] for k, v in layout.fixed]})


@dataclass(frozen=True)
class PooledRows:
    """ll_i(z) = loglik_obs(theta(z), data)_i; args = the (padded) bundle."""

    layout: Layout

    def __call__(self, z: Any, args: Any) -> Any:
        return self.layout.model.loglik_obs(theta_scalars(self.layout, z), args)

    def program_key(self) -> str | None:
        key = layout_key(self.layout)
        return None if key is None else f"PooledRows {key}"


@dataclass(frozen=True)
class CellRows:
    """Rows grouped in padded cells, each with its own parameters from design matrices;
    args = (cells-batched bundle, designs tuple). Output flattened to (n_cells * width,)."""

    layout: Layout

    def __call__(self, z: Any, args: Any) -> Any:
        data, designs = args
        theta = theta_per_cell(self.layout, z, designs)
        per_cell = jax.vmap(self.layout.model.loglik_obs)(theta, data)
        return per_cell.reshape(-1)

    def program_key(self) -> str | None:
        key = layout_key(self.layout)
        return None if key is None else f"CellRows {key}"


# ---------------------------------------------------------------------------------------
# Compiled objective pieces (one cache per row function + argument shapes).


def _negll(rows: Callable[..., Any], z: Any, args: Any, w: Any) -> Any:
    ll = rows(z, args)
    return -jnp.sum(jnp.where(w > 0, w * ll, 0.0))


# Every program below is compiled with XLA's full optimisation (JAX's defaults): a program
# runs many times per fit (one call per optimiser step, and again for every start, CV fold,
# bootstrap chunk, mixture and profile refit), so its run time, not its compile time, sets
# the pace, and the persistent compilation cache (stopwise/_compile_cache.py) keeps the
# compiled program for later processes. jax.jit keys each program by the static row
# function (model, layout), the argument shapes (padded data size) and the function itself
# (what is computed), so every refit of the same model on data of the same bucket reuses it.


@partial(jax.jit, static_argnums=0)
def value_grad_hess(rows: Callable[..., Any], z: Any, args: Any, w: Any) -> Any:
    """negll(z) = -sum_i w_i ll_i(z), its gradient and its Hessian, for one optimiser step.

    Forward mode only (value_grad_hess_forward): the gradient from k JVPs along the unit
    vectors, the Hessian as the forward-mode Jacobian of that gradient, symmetrised
    0.5 (H + H'). No per-row quantity leaves the program."""
    return value_grad_hess_forward(lambda zz: _negll(rows, zz, args, w), z)


@partial(jax.jit, static_argnums=0)
def row_scores(rows: Callable[..., Any], z: Any, args: Any) -> Any:
    """(ll_i(z), J) with J[i, j] = d ll_i / d z_j, from k JVPs of the row function along the
    unit vectors (the primal ll comes with them). Computed once per fit, where per-row or
    per-cluster scores are used (clustered sandwich, Vuong/Clarke, bootstrap)."""
    k = z.shape[0]
    lls, jac_t = jax.vmap(lambda v: jax.jvp(lambda a: rows(a, args), (z,), (v,)))(jnp.eye(k))
    return lls[0], jac_t.T


@partial(jax.jit, static_argnums=0)
def rows_loglik(rows: Callable[..., Any], z: Any, args: Any) -> Any:
    return rows(z, args)


# ---------------------------------------------------------------------------------------
# Reported quantities.


@dataclass(frozen=True)
class Reported:
    """One reported row: name, the coefficient it maps from, and that map.

    ``spec`` given: estimate = spec.to_natural(z[index]) (a parameter on its natural scale);
    ``spec`` None: estimate = z[index] (an effect on the unconstrained scale).
    """

    name: str
    index: int
    spec: ParamSpec | None = None
    scale: str = "natural"


def reported_rows(
    layout: Layout,
    coef_names: Mapping[str, tuple[str, ...]] | None = None,
    prefix: str = "",
    offset: int = 0,
) -> list[Reported]:
    """Reported rows for a layout: a parameter without a formula on its natural scale; with a
    formula its intercept on the natural scale (named after the parameter) and each effect
    ``param:column`` on the unconstrained scale."""
    coef_names = coef_names or {}
    out: list[Reported] = []
    for spec, off, n in zip(layout.specs(), layout.offsets, layout.n_coef):
        names = coef_names.get(spec.name, ("Intercept",) if n == 1 else ())
        for j in range(n):
            cname = names[j] if j < len(names) else f"x{j}"
            if cname == "Intercept":
                out.append(Reported(f"{prefix}{spec.name}", offset + off + j, spec))
            else:
                out.append(
                    Reported(
                        f"{prefix}{spec.name}:{cname}",
                        offset + off + j,
                        None,
                        scale=f"unconstrained ({spec.transform})",
                    )
                )
    return out


def natural_np(spec: ParamSpec, z: Any) -> np.ndarray:
    """ParamSpec.to_natural in numpy (fast for many values); overflow gives inf."""
    return spec.to_natural(np.clip(np.asarray(z, dtype=np.float64), -700.0, 700.0), xp=np)


def natural_derivative_np(spec: ParamSpec, z: Any) -> np.ndarray:
    """d to_natural / dz: (hi-lo) s(z)(1-s(z)), exp(z), -exp(z) or 1."""
    z = np.clip(np.asarray(z, dtype=np.float64), -700.0, 700.0)
    kind = spec.transform
    if kind == "logit":
        return (spec.upper - spec.lower) * np.exp(-np.logaddexp(0.0, -z) - np.logaddexp(0.0, z))
    if kind == "log":
        return np.exp(z)
    if kind == "neglog":
        return -np.exp(z)
    return np.ones_like(z)


def report_values(rows: list[Reported], z: np.ndarray) -> np.ndarray:
    return np.array(
        [
            float(natural_np(r.spec, z[r.index])) if r.spec is not None else float(z[r.index])
            for r in rows
        ]
    )


def report_derivatives(rows: list[Reported], z: np.ndarray) -> np.ndarray:
    """d estimate / d z[index] for each reported row (delta method)."""
    return np.array(
        [
            float(natural_derivative_np(r.spec, z[r.index])) if r.spec is not None else 1.0
            for r in rows
        ]
    )


# ---------------------------------------------------------------------------------------
# Data helpers.


def check_kind(model: Model, data: Any) -> None:
    """A model of one data kind refuses data of another."""
    want = {"stopping": StoppingData, "contest": StoppingData, "lottery": LotteryData}.get(
        model.data_kind
    )
    if want is not None and not isinstance(data, want):
        got = (
            "lottery"
            if isinstance(data, LotteryData)
            else ("stopping" if isinstance(data, StoppingData) else type(data).__name__)
        )
        raise StopwiseInputError(
            f"model {model.name} is a {model.data_kind} model but the data are {got} data; "
            f"choose a {got} model (e.g. {'crra+logit' if got == 'lottery' else 'crra+planner+logit'})"
        )


def padded_size(n: int) -> int:
    """Round n up to a bucket (within 1/8) so data sets of similar size share compiled code."""
    if n <= 64:
        return 64
    step = 2 ** max(math.floor(math.log2(n)) - 3, 0)
    return int(math.ceil(n / step) * step)


def pad_rows(data: Any, size: int) -> Any:
    """The bundle with rows 0..n-1 followed by copies of row 0 up to ``size`` rows."""
    n = data.n_obs
    if size == n:
        return data
    idx = np.concatenate([np.arange(n), np.zeros(size - n, dtype=np.int64)])
    padded = data.take(idx)
    if isinstance(padded, LotteryData):
        padded = replace(padded, item_labels=None)
    return padded


def subject_index(data: Any) -> np.ndarray:
    return np.asarray(data.subject).astype(np.int64)


@dataclass
class Problem:
    """Everything the generic engines need; see the module docstring."""

    rows: Callable[..., Any]
    args: Any
    weights: np.ndarray  # (n_rows,) base weights (padding mask)
    cluster: np.ndarray  # (n_rows,) cluster index of each row (0 for padding rows)
    n_clusters: int
    n_obs: int
    z0: np.ndarray
    reported: list[Reported]
    coef_names: list[str]

    @property
    def k(self) -> int:
        return len(self.z0)

    def second_order(self, z: np.ndarray, w: np.ndarray | None = None) -> tuple[Any, ...]:
        """(negll, gradient, Hessian) at z (value_grad_hess), cached for the last (z, w): the
        optimiser asks for the value, the gradient and the Hessian at the same point."""
        z = np.asarray(z, dtype=np.float64)
        key = self._second_order_key(z, w)
        cache = self.__dict__.setdefault("_cache", {})
        if cache.get("key") != key:
            args, base_weights = self.on_device()
            weights = base_weights if w is None else jax.device_put(w)
            out = call_stored("value_grad_hess", value_grad_hess, self.rows, z, args, weights)
            cache["key"], cache["value"] = key, tuple(np.asarray(a) for a in out)
        return cache["value"]

    @staticmethod
    def _second_order_key(z: np.ndarray, w: np.ndarray | None) -> tuple[bytes, bytes | None]:
        return z.tobytes(), None if w is None else np.asarray(w, dtype=np.float64).tobytes()

    def remember_second_order(
        self, z: np.ndarray, w: np.ndarray | None, value: Any, grad: Any, hess: Any
    ) -> None:
        """Keep (negll, gradient, Hessian) at (z, w) computed elsewhere by the same
        derivatives (the compiled multistart's last step), as if second_order had run."""
        z = np.asarray(z, dtype=np.float64)
        cache = self.__dict__.setdefault("_cache", {})
        cache["key"] = self._second_order_key(z, w)
        cache["value"] = (np.asarray(value), np.asarray(grad), np.asarray(hess))

    def on_device(self) -> tuple[Any, Any]:
        """(args, weights) as device arrays, transferred once per Problem rather than at
        every optimiser step."""
        if "_device" not in self.__dict__:
            self.__dict__["_device"] = (jax.device_put(self.args), jax.device_put(self.weights))
        return self.__dict__["_device"]

    def evaluate(self, z: np.ndarray, w: np.ndarray | None = None) -> tuple[Any, ...]:
        """(negll, gradient, Hessian, row Jacobian J[i, j] = d ll_i / dz_j) at z: the
        second-order triple and row_scores' Jacobian (two compiled programs)."""
        value, grad, hess = self.second_order(z, w)
        return value, grad, hess, self.row_jacobian(z)

    def value(self, z: np.ndarray, w: np.ndarray | None = None) -> float:
        return float(self.second_order(z, w)[0])

    def grad(self, z: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
        return self.second_order(z, w)[1]

    def hess(self, z: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
        return self.second_order(z, w)[2]

    def row_jacobian(self, z: np.ndarray) -> np.ndarray:
        """J[i, j] = d ll_i / dz_j at z (row_scores), kept for the last z."""
        z = np.asarray(z, dtype=np.float64)
        cache = self.__dict__.setdefault("_scores", {})
        if cache.get("key") != z.tobytes():
            _, jac = call_stored("row_scores", row_scores, self.rows, z, self.on_device()[0])
            cache["key"], cache["value"] = z.tobytes(), np.asarray(jac)
        return cache["value"]

    def row_loglik(self, z: np.ndarray) -> np.ndarray:
        args = self.on_device()[0]
        return np.asarray(call_stored("rows_loglik", rows_loglik, self.rows, z, args))

    def cluster_loglik(self, z: np.ndarray) -> np.ndarray:
        """Sum of weighted row log-likelihoods per cluster (subject), shape (n_clusters,)."""
        ll = np.where(self.weights > 0, self.weights * self.row_loglik(z), 0.0)
        return np.bincount(self.cluster, weights=ll, minlength=self.n_clusters)

    def cluster_scores(self, z: np.ndarray) -> np.ndarray:
        """Per-cluster score s_g = sum_{i in g} w_i d ll_i / dz, shape (n_clusters, k)."""
        jac = self.row_jacobian(z)
        jac = np.where(self.weights[:, None] > 0, jac * self.weights[:, None], 0.0)
        out = np.zeros((self.n_clusters, jac.shape[1]))
        for j in range(jac.shape[1]):  # bincount adds in row order, as np.add.at did
            out[:, j] = np.bincount(self.cluster, weights=jac[:, j], minlength=self.n_clusters)
        return out

    def cluster_weights(self, counts: np.ndarray) -> np.ndarray:
        """Row weights for cluster multiplicities ``counts`` (bootstrap draw, CV fold)."""
        return self.weights * np.asarray(counts, dtype=np.float64)[self.cluster]
