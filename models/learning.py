"""Unknown odds: a Bayesian learner of the survival chance (spec part ``learn``).

On trials whose odds were not told (``odds_known`` 0) the participant holds a Beta prior over
the survival chance q, with mean m (``prior_mean``) and strength k (``prior_strength``):
q ~ Beta(m k, (1 - m) k). It is updated on every draw the participant has seen in the learning
stream (data_schemas.streams: own draws on earlier trials, in order, and the draws of the
current trial so far). Entering a trial after S successful draws and F busts, the predictive
chance that the draw at step s survives (s successes so far in this trial) is

    p(s) = (m k + S + s) / (k + S + F + s),

the Beta-Binomial predictive; the chance that the next j draws all succeed is
prod_{i<j} p(i) = BetaBinomial(j; j, m k + S, (1 - m) k + F). That is an urn with drift +1
(models.stopping.Conditions), so every policy (myopic, planner, target) runs on it unchanged:
the myopic rule uses today's predictive chance, the planner and the target rule also
anticipate the updating on the successes they plan. Told trials keep their constant chance
(or their pool). The plans are truncated at the model's static cap (models.stopping.Caps,
sized from the data's largest true p_survive, or ``max_target``): the predictive chance rises
towards 1 after long runs of successes, so set ``max_target`` to the task's real limit
where it has one. Learning about a pool's composition is not modelled (refused).
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.base import ParamSpec
from stopwise.models.stopping import Conditions

LEARNING_PART = "learn"
LEARNING_PARAMS = (
    ParamSpec("prior_mean", 0.0, 1.0, 0.7, "mean of the Beta prior over the survival chance"),
    ParamSpec("prior_strength", 0.0, 1000.0, 5.0, "strength (pseudo-draws) of the Beta prior"),
)


def beta_prior(prior_mean: Any, prior_strength: Any) -> tuple[Any, Any]:
    """(alpha, beta) = (m k, (1 - m) k)."""
    return prior_mean * prior_strength, (1.0 - prior_mean) * prior_strength


def predictive_chance(prior_mean: Any, prior_strength: Any, successes: Any, fails: Any) -> Any:
    """(m k + S) / (k + S + F): the predictive chance that the next draw survives."""
    alpha, _ = beta_prior(prior_mean, prior_strength)
    return (alpha + successes) / (prior_strength + successes + fails)


def learner_conditions(cond: Conditions, data: Any, theta: Any) -> Conditions:
    """``cond`` with the learner's urn (m k + S, k + S + F, +1) on untold conditions."""
    odds_known = getattr(data, "cond_odds_known", None)
    if odds_known is None:
        return cond
    untold = jnp.asarray(odds_known, jnp.float64) == 0.0
    seen_s = jnp.asarray(data.cond_seen_success, jnp.float64)
    seen_f = jnp.asarray(data.cond_seen_fail, jnp.float64)
    alpha, _ = beta_prior(theta["prior_mean"], theta["prior_strength"])
    p = jnp.asarray(cond.p_survive, jnp.float64)
    good = p if cond.urn_good is None else cond.urn_good
    total = jnp.ones_like(p) if cond.urn_total is None else cond.urn_total
    drift = jnp.zeros_like(p) if cond.urn_drift is None else cond.urn_drift
    return replace(
        cond,
        urn_good=jnp.where(untold, alpha + seen_s, good),
        urn_total=jnp.where(untold, theta["prior_strength"] + seen_s + seen_f, total),
        urn_drift=jnp.where(untold, 1.0, drift),
    )


def check_learning_data(name: str, data: Any) -> list[str]:
    """Refuse untold pool trials; warnings when no trial is untold (nothing to learn)."""
    odds_known = getattr(data, "cond_odds_known", None)
    if odds_known is None or not np.any(np.asarray(odds_known) == 0):
        return [
            f"{name}: no trial has odds_known = 0, so prior_mean and prior_strength are not "
            "identified by these data (the learning part changes nothing)"
        ]
    pool = np.asarray(getattr(data, "cond_pool_size", np.zeros(1)))
    if np.any((np.asarray(odds_known) == 0) & (pool > 0)):
        raise StopwiseInputError(
            f"{name}: trials with a pool (pool_size) and odds_known = 0 were found; learning "
            "about a pool's composition is not modelled: give those trials odds_known = 1 or "
            "fit a model without 'learn'"
        )
    return []


def learning_stream_ranks(subject: np.ndarray, trial: np.ndarray, stream: np.ndarray) -> Any:
    """Per design row: its position in its (subject, stream) sequence, trials by id."""
    order = np.lexsort((trial, stream, subject))
    keys = np.stack([subject, stream], axis=1)[order]
    new = np.ones(len(order), dtype=bool)
    new[1:] = np.any(keys[1:] != keys[:-1], axis=1)
    starts = np.maximum.accumulate(np.where(new, np.arange(len(order)), 0))
    ranks = np.empty(len(order), dtype=np.int64)
    ranks[order] = np.arange(len(order)) - starts
    return ranks
