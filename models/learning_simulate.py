"""Simulating Bayesian learners (models.learning): trials are played in the order of their
ids within each learning stream (subject and true p_survive), because what a participant has
seen shapes the next trial. Round r plays every stream's r-th trial at once: the policy's
tables come from the learner's predictive chances, the outcomes from the true p_survive (or
pool), and each stream's counts S (successful draws) and F (busts) are updated afterwards."""

from __future__ import annotations

from collections.abc import Callable, Mapping
from types import SimpleNamespace
from typing import Any

import jax
import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.learning import learner_conditions, learning_stream_ranks
from stopwise.models.simulate import (
    expand_trials,
    sample_trial_ends,
    simulation_steps,
    stopping_design_arrays,
)
from stopwise.models.stopping import Caps, Conditions, step_chances

TablesFn = Callable[[Mapping[str, float], Conditions, int, Caps], tuple[Any, Any]]


def _take(cond: Conditions, index: np.ndarray) -> Conditions:
    """The conditions at ``index`` (urn fields too, when present)."""
    pick = lambda a: None if a is None else np.asarray(a)[index]  # noqa: E731
    return Conditions(
        pick(cond.p_survive),
        pick(cond.gain),
        pick(cond.start),
        pick(cond.bust_keep),
        pick(cond.urn_good),
        pick(cond.urn_total),
        pick(cond.urn_drift),
    )


def _untold(design: pd.DataFrame) -> np.ndarray:
    if "odds_known" not in design.columns:
        return np.zeros(len(design), dtype=bool)
    known = pd.to_numeric(design["odds_known"], errors="coerce").to_numpy(dtype=np.float64)
    bad = np.flatnonzero(~np.isin(known, (0.0, 1.0)))
    if bad.size:
        row = int(bad[0])
        raise StopwiseInputError(
            f"design row {row}, column 'odds_known': expected 0 or 1, got "
            f"{design['odds_known'].iloc[row]!r}"
        )
    return known == 0.0


def simulate_learners(
    policy: str,
    caps: Caps,
    theta: Mapping[str, Any],
    design: pd.DataFrame,
    key: Any,
    tables_fn: TablesFn,
) -> pd.DataFrame:
    """Decision-level data of Bayesian learners over a per-trial design (module docstring)."""
    design = design.reset_index(drop=True)
    true_cond, cond = stopping_design_arrays(design)
    untold = _untold(design)
    if true_cond.urn_drift is not None and np.any(
        untold & (np.asarray(true_cond.urn_drift)[cond] != 0)
    ):
        raise StopwiseInputError(
            "design: a pool trial with odds_known = 0; learning about a pool's composition "
            "is not modelled"
        )
    caps = caps.sized_for(true_cond.p_survive)
    n_steps = simulation_steps(policy, caps, float(np.max(true_cond.p_survive)))
    subject = pd.factorize(design["subject"])[0]
    trial = pd.to_numeric(design["trial"], errors="coerce").to_numpy(dtype=np.float64)
    stream_p = pd.factorize(np.asarray(true_cond.p_survive)[cond])[0]
    stream = pd.MultiIndex.from_arrays([subject, stream_p]).factorize()[0]
    ranks = learning_stream_ranks(subject, trial, stream_p)
    seen = np.zeros((stream.max() + 1 if len(stream) else 0, 2))
    end_step = np.zeros(len(design), dtype=np.int64)
    busted = np.zeros(len(design), dtype=bool)
    theta = {k: float(v) for k, v in theta.items()}
    round_keys = jax.random.split(key, int(ranks.max()) + 1 if len(ranks) else 1)
    for r in range(int(ranks.max()) + 1 if len(ranks) else 0):
        rows = np.flatnonzero(ranks == r)
        truth = _take(true_cond, cond[rows])
        counts = np.where(untold[rows, None], seen[stream[rows]], 0.0)
        beliefs = SimpleNamespace(
            cond_odds_known=np.where(untold[rows], 0.0, 1.0),
            cond_seen_success=counts[:, 0],
            cond_seen_fail=counts[:, 1],
        )
        log_draw, log_stop = tables_fn(
            theta, learner_conditions(truth, beliefs, theta), n_steps, caps
        )
        chances = np.asarray(step_chances(truth, n_steps))
        ends, bust = sample_trial_ends(
            np.asarray(log_draw), np.asarray(log_stop), chances, np.arange(len(rows)), round_keys[r]
        )
        end_step[rows], busted[rows] = ends, bust
        np.add.at(seen, (stream[rows[untold[rows]]], 0), ends[untold[rows]])
        np.add.at(seen, (stream[rows[untold[rows]]], 1), bust[untold[rows]])
    return expand_trials(design, end_step, busted)
