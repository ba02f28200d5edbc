"""Expected Fisher information of a planned design, exact over the model's decision paths.

Stopping trials. A trial under condition c (survival chance p) is a path of decisions: at
step s the participant draws with probability d_s(theta) (the model's own table, read from
``loglik_obs`` on a probe of draw rows and stop rows), a draw survives with the known chance
p. The log-likelihood of a trial is the sum of its decisions' log-probabilities (a bust
carries no information about theta), so its score is a sum of martingale differences and

    I_c(theta) = sum_{s < H} R_s [ d_s g_s g_s' + (1 - d_s) h_s h_s' ],
    R_0 = 1,  R_{s+1} = R_s d_s p,

with g_s = grad log d_s, h_s = grad log (1 - d_s) (exact JAX derivatives, natural scale).
The sum stops at the cap H chosen so that R_H <= p^H <= ``tolerance``; the mass R_H left out
is reported per condition. Lottery items: I_item = P(B) g_B g_B' + P(A) g_A g_A'.

A participant playing T trials over the conditions (trial t uses condition t mod k, as
``stopwise simulate`` lays them out) carries I_1 = sum_c n_c I_c; N participants pooled carry
N I_1. Expected standard errors are sqrt(diag((N I_1)^-1)), for one participant
sqrt(diag(I_1^-1)); the expected correlation of the estimates is read off I_1^-1.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import StoppingData
from stopwise.data_schemas.bundle import to_lottery_data
from stopwise.models.base import Model

DEFAULT_TOLERANCE = 1e-10
MAX_STEPS = 5000
IDENTIFICATION_RCOND = 1e-10


@dataclass(frozen=True)
class PathTables:
    """Per parameter point, condition and step (m, n_cond, H): log P(draw), log P(stop),
    their gradients (m, n_cond, H, k) in the natural-scale parameters, log P(reach step)."""

    log_draw: np.ndarray
    log_stop: np.ndarray
    grad_draw: np.ndarray
    grad_stop: np.ndarray
    log_reach: np.ndarray
    truncated_mass: np.ndarray  # (m, n_cond) P(reach step H)


def cap_steps(p_survive: Sequence[float], tolerance: float = DEFAULT_TOLERANCE) -> int:
    """H = ceil(log(tolerance) / log(max p)): then P(reach H) <= p^H <= tolerance."""
    largest = float(np.max(p_survive))
    steps = math.ceil(math.log(tolerance) / math.log(largest))
    return int(min(max(steps, 1), MAX_STEPS))


def condition_probe(
    p_survive: Sequence[float],
    gain: float | Sequence[float],
    start: float,
    n_steps: int,
) -> StoppingData:
    """Rows (action, condition, step < n_steps): first every draw row, then every stop row.
    ``gain`` is one gain for every condition or one per condition."""
    ps = np.asarray(p_survive, dtype=np.float64)
    n_cond = len(ps)
    n = n_cond * n_steps
    return StoppingData(
        subject=np.zeros(2 * n, np.int32),
        trial=np.zeros(2 * n, np.int32),
        step=np.tile(np.arange(n_steps), 2 * n_cond).astype(np.int32),
        draw=np.repeat([1.0, 0.0], n),
        bust=np.zeros(2 * n),
        cond=np.tile(np.repeat(np.arange(n_cond), n_steps), 2).astype(np.int32),
        group=np.full(2 * n, -1, np.int32),
        cond_p_survive=ps,
        cond_gain=np.broadcast_to(np.asarray(gain, dtype=np.float64), (n_cond,)).copy(),
        cond_start=np.full(n_cond, float(start)),
        cond_bust_keep=np.zeros(n_cond),
        cond_contest=np.zeros(n_cond),
        cond_n_players=np.ones(n_cond),
        cond_prize=np.zeros(n_cond),
        cond_keep_bank=np.ones(n_cond),
        horizon=n_steps,
    )


@partial(jax.jit, static_argnums=0)
def _values_and_jacobians(model: Model, thetas: Any, data: Any) -> tuple[Any, Any]:
    """vmap over the rows of ``thetas`` of (loglik_obs, its Jacobian); compiled once per
    model and data shape (the data are an argument, not a constant)."""
    names = model.param_names

    def loglik(vector: Any) -> Any:
        return model.loglik_obs({n: vector[i] for i, n in enumerate(names)}, data)

    return jax.vmap(lambda v: (loglik(v), jax.jacfwd(loglik)(v)))(thetas)


def values_and_gradients(
    model: Model, thetas: np.ndarray, data: Any
) -> tuple[np.ndarray, np.ndarray]:
    """For each row of ``thetas`` (m, k; natural scale, the model's parameter order):
    loglik_obs(theta, data), shape (m, n_obs), and its Jacobian, (m, n_obs, k); exact JAX
    derivatives. The model's ``prepare`` sizes its static caps from the concrete data first
    (the probe's horizon H fixes them: equal shapes, equal caps)."""
    prepare = model.options.get("prepare")
    if prepare is not None:
        prepare(data)
    thetas = jnp.asarray(np.atleast_2d(thetas), dtype=jnp.float64)
    values, grads = _values_and_jacobians(model, thetas, data)
    return np.asarray(values), np.asarray(grads)


def theta_matrix(model: Model, thetas: Sequence[Mapping[str, float]]) -> np.ndarray:
    """Parameter dicts -> (m, k) matrix in the model's parameter order."""
    return np.array([[float(t[n]) for n in model.param_names] for t in thetas], dtype=np.float64)


def path_tables(
    model: Model,
    thetas: Sequence[Mapping[str, float]],
    p_survive: Sequence[float],
    gain: float | Sequence[float] = 1.0,
    start: float = 0.0,
    tolerance: float = DEFAULT_TOLERANCE,
) -> PathTables:
    """Decision probabilities, their exact gradients and reach probabilities (module doc),
    each with a leading axis over the parameter points ``thetas``."""
    n_steps = cap_steps(p_survive, tolerance)
    probe = condition_probe(p_survive, gain, start, n_steps)
    return probe_tables(model, thetas, p_survive, probe, n_steps)


def probe_tables(
    model: Model,
    thetas: Sequence[Mapping[str, float]],
    p_survive: Sequence[float],
    probe: StoppingData,
    n_steps: int,
) -> PathTables:
    """PathTables from a probe laid out as ``condition_probe`` lays it out (draw rows, then
    stop rows, per condition steps 0..n_steps-1); R_(s+1) = R_s d_s p (module doc)."""
    n_points = len(thetas)
    shape = (n_points, 2, len(p_survive), n_steps)
    values, grads = values_and_gradients(model, theta_matrix(model, thetas), probe)
    values = values.reshape(shape)
    grads = grads.reshape((*shape, len(model.param_names)))
    log_draw, log_stop = values[:, 0], values[:, 1]
    grad_draw, grad_stop = grads[:, 0], grads[:, 1]
    log_p = np.log(np.asarray(p_survive, dtype=np.float64))[None, :, None]
    steps_taken = np.cumsum(np.nan_to_num(log_draw, nan=-np.inf) + log_p, axis=2)
    first = np.zeros((n_points, len(p_survive), 1))
    log_reach = np.concatenate([first, steps_taken[:, :, :-1]], axis=2)
    return PathTables(
        log_draw, log_stop, grad_draw, grad_stop, log_reach, np.exp(steps_taken[:, :, -1])
    )


def condition_information(tables: PathTables) -> np.ndarray:
    """I_c = sum_s R_s [d_s g_s g_s' + (1 - d_s) h_s h_s'], shape (m, n_cond, k, k)."""
    w_draw, g_draw = reached(tables.log_reach, tables.log_draw, tables.grad_draw)
    w_stop, g_stop = reached(tables.log_reach, tables.log_stop, tables.grad_stop)
    draw_part = np.einsum("mcs,mcsi,mcsj->mcij", w_draw, g_draw, g_draw)
    stop_part = np.einsum("mcs,mcsi,mcsj->mcij", w_stop, g_stop, g_stop)
    return draw_part + stop_part


def reached(log_reach: np.ndarray, log_prob: np.ndarray, grad: np.ndarray) -> tuple[Any, Any]:
    """Weights R_s P(action at s) and gradients, zero where the action has probability 0
    or the step cannot be reached (a target distribution with no mass beyond some step
    leaves undefined log-ratios there, which carry no weight)."""
    log_w = log_reach + log_prob
    ok = np.isfinite(log_w)
    weight = np.where(ok, np.exp(np.where(ok, log_w, -np.inf)), 0.0)
    safe = np.where((weight > 0)[..., None] & np.isfinite(grad), grad, 0.0)
    return weight, safe


def trial_counts(n_conditions: int, trials: int) -> np.ndarray:
    """Trials per condition when trial t uses condition t mod k (first ones get the rest)."""
    return np.bincount(np.arange(trials) % n_conditions, minlength=n_conditions).astype(float)


def lottery_information(
    model: Model, thetas: Sequence[Mapping[str, float]], items: pd.DataFrame
) -> np.ndarray:
    """Per point and item (m, n_items, k, k): P(B) g_B g_B' + P(A) g_A g_A', with
    g = grad log P(choice)."""
    parts = []
    for choice in ("B", "A"):
        frame = items.assign(subject=0, choice=choice)
        if "item" not in frame:
            frame = frame.assign(item=np.arange(1, len(frame) + 1))
        data = to_lottery_data(frame)
        log_prob, grad = values_and_gradients(model, theta_matrix(model, thetas), data)
        parts.append(np.exp(log_prob)[..., None, None] * np.einsum("mni,mnj->mnij", grad, grad))
    return parts[0] + parts[1]


@dataclass(frozen=True)
class Precision:
    """Expected standard errors and correlations from an information matrix, with checks."""

    names: tuple[str, ...]
    information: np.ndarray  # per participant
    se_one: np.ndarray  # one participant (per-subject fit)
    correlation: np.ndarray
    min_eigenvalue: float
    condition_number: float
    identified: bool

    def se_pooled(self, subjects: int) -> np.ndarray:
        """SE(N) = SE(1) / sqrt(N): N independent participants carry N I_1."""
        return self.se_one / math.sqrt(subjects)


def precision_from_information(names: tuple[str, ...], info: np.ndarray) -> Precision:
    """SE = sqrt(diag(I^-1)), corr_ij = V_ij / sqrt(V_ii V_jj), V = I^-1. The matrix is
    refused (SEs NaN, identified False) when its smallest eigenvalue is below
    IDENTIFICATION_RCOND times its largest: some direction of the parameters is not
    identified by this design."""
    info = 0.5 * (info + info.T)
    eig = np.linalg.eigvalsh(info)
    largest = float(eig[-1]) if eig.size else 0.0
    smallest = float(eig[0]) if eig.size else 0.0
    identified = largest > 0 and smallest > IDENTIFICATION_RCOND * largest
    if identified:
        cov = np.linalg.inv(info)
        se = np.sqrt(np.diag(cov))
        corr = cov / np.outer(se, se)
    else:
        se = np.full(len(names), np.nan)
        corr = np.full((len(names), len(names)), np.nan)
    condition = largest / smallest if smallest > 0 else math.inf
    return Precision(names, info, se, corr, smallest, condition, identified)
