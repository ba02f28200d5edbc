"""Immutable array bundles handed to the models: one per data format.

Both bundles are JAX pytrees (arrays are leaves, ``horizon`` and covariate names are static),
so they pass through ``jit``/``vmap``/``grad`` unchanged. This module does not import JAX
(commands that only read data start without it): it registers the bundles itself when JAX
is loaded already, and stopwise/_jax_setup.py calls ``register_pytrees`` when JAX is
imported later. Labels (subject ids, trial ids)
are kept on the bundle for reporting but dropped inside JAX transformations (they come back
as ``None`` after a tree round trip).

Stopping rows are decisions. Per-row fields are numpy/JAX arrays of length n_obs; the
condition table (``cond_*``, length n_cond) holds each distinct trial configuration, and
``cond[i]`` points row i at its condition, so models compute one table per condition
(n_cond x horizon) and gather, instead of repeating work per row.

Task variants (DESIGN.md) are part of the condition: a pool (``cond_pool_size``,
``cond_pool_bad``; 0 for constant odds) and, for trials whose odds were not told
(``cond_odds_known`` 0), what the participant had seen before the trial: own successful
draws and busts on earlier trials of the same learning stream (same subject and true
p_survive, trials in the order of their ids). So every such trial has its own condition.
"""

from __future__ import annotations

import sys
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from types import ModuleType
from typing import Any

import numpy as np

STOPPING_ROW_FIELDS = (
    "subject",  # int32, 0..n_subjects-1
    "trial",  # int32, 0..n_trials-1 (global trial index)
    "step",  # int32 >= 0, successful draws so far
    "draw",  # float64, 1.0 = draw, 0.0 = stop
    "bust",  # float64, 1.0 = this draw busted (only where draw = 1)
    "cond",  # int32 index into the condition table
    "group",  # int32 contest group index (-1 for solo rows)
)
STOPPING_COND_FIELDS = (
    "cond_p_survive",
    "cond_gain",
    "cond_start",
    "cond_bust_keep",
    "cond_contest",  # 1.0 contest, 0.0 solo
    "cond_n_players",  # 1.0 for solo
    "cond_prize",  # 0.0 for solo
    "cond_keep_bank",  # 1.0 for solo (the player keeps the bank)
    "cond_pool_size",  # items in the pool (0.0: constant odds)
    "cond_pool_bad",  # bad items in the pool (0.0: constant odds)
    "cond_odds_known",  # 1.0 told, 0.0 not told (learning)
    "cond_seen_success",  # not told: own successful draws on earlier trials of the stream
    "cond_seen_fail",  # not told: own busts on earlier trials of the stream
    "cond_order",  # sequential contests: 1 moves first, 2 second, ...; 0 simultaneous
    "cond_seen_best",  # later movers: best final bank of the earlier movers (-1: none/unknown)
    "cond_seen_tied",  # later movers: earlier movers at that bank (0 first mover, -1 unknown)
)


@dataclass(frozen=True)
class StoppingData:
    """Decision-level stopping data as arrays (see module docstring for the layout)."""

    subject: Any
    trial: Any
    step: Any
    draw: Any
    bust: Any
    cond: Any
    group: Any
    cond_p_survive: Any
    cond_gain: Any
    cond_start: Any
    cond_bust_keep: Any
    cond_contest: Any
    cond_n_players: Any
    cond_prize: Any
    cond_keep_bank: Any
    cond_pool_size: Any = None  # None (bundles built by hand): constant odds, told
    cond_pool_bad: Any = None
    cond_odds_known: Any = None
    cond_seen_success: Any = None
    cond_seen_fail: Any = None
    cond_order: Any = None  # None (bundles built by hand): no sequential contests
    cond_seen_best: Any = None
    cond_seen_tied: Any = None
    covariates: Mapping[str, Any] = field(default_factory=dict)
    horizon: int = 0  # steps 0..horizon-1 exist in every model table; >= max(step) + 1
    subject_labels: Any = None  # numpy array of original subject ids (index -> label)
    trial_labels: Any = None  # numpy array of (subject, trial) labels per global trial

    @property
    def n_obs(self) -> int:
        return int(np.shape(self.step)[-1])

    @property
    def n_subjects(self) -> int:
        if self.subject_labels is not None:
            return len(self.subject_labels)
        return int(np.max(np.asarray(self.subject))) + 1

    @property
    def n_cond(self) -> int:
        return int(np.shape(self.cond_p_survive)[-1])

    # Per-row views of the condition table (cheap gathers).
    @property
    def p_survive(self) -> Any:
        return self.cond_p_survive[self.cond]

    @property
    def gain(self) -> Any:
        return self.cond_gain[self.cond]

    @property
    def start(self) -> Any:
        return self.cond_start[self.cond]

    @property
    def bank(self) -> Any:
        """Bank before the decision: start + step * gain."""
        return self.start + self.step * self.gain

    def condition_grid(self) -> StoppingData:
        """One row per (condition, step) for steps 0..H-1 (H = the horizon, at least the
        largest step + 1), each a draw without a bust and without covariates: the probe on
        which a model's P(draw | condition, step) table is read off."""
        horizon = int(max(self.horizon, int(np.max(np.asarray(self.step))) + 1))
        cond = np.repeat(np.arange(self.n_cond), horizon).astype(np.int32)
        n = len(cond)
        return replace(
            self,
            subject=np.zeros(n, np.int32),
            trial=np.zeros(n, np.int32),
            step=np.tile(np.arange(horizon), self.n_cond).astype(np.int32),
            draw=np.ones(n),
            bust=np.zeros(n),
            cond=cond,
            group=np.full(n, -1, np.int32),
            covariates={},
            horizon=horizon,
            subject_labels=None,
            trial_labels=None,
        )

    def take(self, rows: Any) -> StoppingData:
        """A bundle with only the given rows (condition table and labels kept whole)."""
        rows = np.asarray(rows)
        row_values = {name: np.asarray(getattr(self, name))[rows] for name in STOPPING_ROW_FIELDS}
        covs = {k: np.asarray(v)[rows] for k, v in self.covariates.items()}
        return replace(self, **row_values, covariates=covs)


@dataclass(frozen=True)
class LotteryData:
    """Binary lottery choices as arrays.

    Outcomes are padded to a common width K with probability 0 (padded outcome values repeat
    the option's first outcome), so rank-dependent sums are unchanged by the padding.
    """

    subject: Any  # int32 (n_obs,)
    choice_b: Any  # float64 (n_obs,), 1.0 = chose B
    a_x: Any  # float64 (n_obs, K)
    a_p: Any
    b_x: Any
    b_p: Any
    covariates: Mapping[str, Any] = field(default_factory=dict)
    subject_labels: Any = None
    item_labels: Any = None  # numpy array of item ids per row

    @property
    def n_obs(self) -> int:
        return int(np.shape(self.choice_b)[-1])

    @property
    def n_subjects(self) -> int:
        if self.subject_labels is not None:
            return len(self.subject_labels)
        return int(np.max(np.asarray(self.subject))) + 1

    def take(self, rows: Any) -> LotteryData:
        rows = np.asarray(rows)
        values = {
            name: np.asarray(getattr(self, name))[rows]
            for name in ("subject", "choice_b", "a_x", "a_p", "b_x", "b_p")
        }
        covs = {k: np.asarray(v)[rows] for k, v in self.covariates.items()}
        return replace(self, **values, covariates=covs, item_labels=None)


_LABEL_FIELDS = {"subject_labels", "trial_labels", "item_labels"}


def _register(tree_util: ModuleType, cls: type, static: tuple[str, ...]) -> None:
    array_fields = tuple(
        f.name
        for f in fields(cls)
        if f.name not in _LABEL_FIELDS and f.name not in static and f.name != "covariates"
    )

    def flatten(obj: Any) -> tuple[tuple[Any, ...], tuple[Any, ...]]:
        cov_names = tuple(sorted(obj.covariates))
        children = tuple(getattr(obj, n) for n in array_fields) + tuple(
            obj.covariates[n] for n in cov_names
        )
        aux = (cov_names, *(getattr(obj, n) for n in static))
        return children, aux

    def unflatten(aux: tuple[Any, ...], children: tuple[Any, ...]) -> Any:
        cov_names, *static_values = aux
        k = len(array_fields)
        kwargs = dict(zip(array_fields, children[:k]))
        kwargs["covariates"] = dict(zip(cov_names, children[k:]))
        kwargs.update(zip(static, static_values))
        return cls(**kwargs)

    tree_util.register_pytree_node(cls, flatten, unflatten)


_REGISTERED: list[ModuleType] = []


def register_pytrees(tree_util: ModuleType) -> None:
    """Register StoppingData (``horizon`` static) and LotteryData with ``jax.tree_util``,
    once per process."""
    if _REGISTERED:
        return
    _register(tree_util, StoppingData, static=("horizon",))
    _register(tree_util, LotteryData, static=())
    _REGISTERED.append(tree_util)


if "jax" in sys.modules:  # JAX loaded first: register now (else stopwise/_jax_setup.py does)
    register_pytrees(sys.modules["jax"].tree_util)
