"""Checking a planner model's ``max_target`` truncation against the default cap.

The planner's backward induction stops at a cap H (models/stopping.py). By default H is
sized so that reaching it from any observed step has probability below 1e-15, which for
p_survive near 1 means hundreds of steps per evaluation; the model option ``max_target``
sets a shorter cap, which is exact only when the participant (at the parameter values in
question) would have stopped long before it. This module measures the difference

  delta(theta) = | sum_i loglik_obs(theta, data)_i [cap max_target]
                   - sum_i loglik_obs(theta, data)_i [default cap] |

at posterior draws, so a fit that uses a short cap says whether it was harmless. The check
covers the region the sampled posterior visits (as an importance-sampling diagnostic
would); the observed decisions all lie before the cap, so a difference can only enter
through the continuation values the planner computes for them.

Bayesian fits of a planner model without ``max_target`` use an automatic cap
(``planner_cap="auto"``, the default): H = data horizon + AUTO_EXTRA_STEPS. The check above
runs on the posterior draws; if any difference exceeds TRUNCATION_TOLERANCE the fit is run
again at the default cap (so the reported posterior is always either checked or exact).
``planner_cap="exact"`` samples at the default cap directly.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import replace
from typing import Any

import numpy as np

from stopwise.estimation.bayes.density import total_loglik
from stopwise.estimation.bayes.draws import flatten_chains, map_draws
from stopwise.models.base import Model
from stopwise.models.spec import DEFAULT_OPTIONS, build_model

PLANNER_CAPS = ("auto", "exact")
AUTO_EXTRA_STEPS = 30  # automatic cap: steps beyond the longest observed trial
TRUNCATION_TOLERANCE = 1e-6  # |delta| above this in any checked draw gives a warning
TRUNCATION_DRAWS = 100  # draws checked (evenly thinned over all chains)
CHUNK = 10  # draws evaluated together (memory: the default cap can be ~700 steps)


def is_planner(model: Model) -> bool:
    """A stopping model built from a spec with the planner policy."""
    return model.data_kind == "stopping" and (model.options or {}).get("policy") == "planner"


def with_planner_cap(model: Model, max_target: int | None) -> Model:
    """The same spec, options and parameter bounds, with ``max_target`` replaced (None: the
    default cap). The bounds are the given model's: a pooled fit may sample r on narrower
    ones (estimation/bayes/support.py), and its draws mean the same values in both models."""
    options = dict(model.options or {})
    kept = {k: options[k] for k in DEFAULT_OPTIONS if k in options and k != "max_target"}
    return replace(build_model(model.name, **kept, max_target=max_target), params=model.params)


def default_cap_reference(model: Model) -> Model | None:
    """The same stopping model with the default planner cap, when ``max_target`` truncates
    a planner; None otherwise (for the target policy ``max_target`` defines the choice set,
    a modelling choice rather than a numerical truncation)."""
    if not is_planner(model) or (model.options or {}).get("max_target") is None:
        return None
    return with_planner_cap(model, None)


def auto_capped(model: Model, data: Any) -> Model | None:
    """A planner model without ``max_target`` with the automatic cap
    max_target = horizon + AUTO_EXTRA_STEPS (horizon: steps 0..horizon-1 of the data);
    None for any other model."""
    if not is_planner(model) or (model.options or {}).get("max_target") is not None:
        return None
    horizon = int(getattr(data, "horizon", 0) or 0)
    return with_planner_cap(model, horizon + AUTO_EXTRA_STEPS)


def check_passed(check: Mapping[str, Any] | None) -> bool:
    """True when there was nothing to check or every difference is within the tolerance."""
    return not check or check["max_abs_loglik_difference"] <= check["tolerance"]


def thinned_draws(samples: Mapping[str, Any], n_draws: int) -> dict[str, np.ndarray]:
    """``n_draws`` draws evenly spaced over all chains, (n, ...) per site."""
    flat = flatten_chains(samples)
    total = next(iter(flat.values())).shape[0]
    index = np.unique(np.linspace(0, total - 1, min(n_draws, total)).round().astype(int))
    return {k: v[index] for k, v in flat.items()}


def truncation_check(
    setup: Any, args: Any, data: Any, samples: Mapping[str, Any], n_draws: int = TRUNCATION_DRAWS
) -> dict[str, Any] | None:
    """max over thinned posterior draws of delta (module docstring), or None when the
    model is not a truncated planner. ``setup``/``args`` as in estimation/bayes/prepare.py."""
    reference = default_cap_reference(setup.model)
    if reference is None:
        return None
    prepare = (reference.options or {}).get("prepare")
    if callable(prepare):
        prepare(data)
    ref_setup = replace(setup, model=reference)

    def difference(sites: Mapping[str, Any]) -> Any:
        return total_loglik(setup, sites, args) - total_loglik(ref_setup, sites, args)

    draws = thinned_draws(samples, n_draws)
    n = next(iter(draws.values())).shape[0]
    values = np.abs(map_draws(difference, draws, CHUNK))
    worst = float(np.max(values)) if np.all(np.isfinite(values)) else math.inf
    return {
        "max_target": int(setup.model.options["max_target"]),
        "draws_checked": int(n),
        "max_abs_loglik_difference": worst,
        "tolerance": TRUNCATION_TOLERANCE,
    }


def truncation_warnings(check: Mapping[str, Any] | None) -> list[str]:
    """A warning when the checked difference exceeds the tolerance."""
    if check_passed(check):
        return []
    return [
        f"the planner's cap max_target={check['max_target']} changes the summed "
        f"log-likelihood by up to {check['max_abs_loglik_difference']:.2g} at "
        f"{check['draws_checked']} posterior draws (tolerance {check['tolerance']:g}): the "
        "truncation is not harmless here; raise max_target or leave it unset (default cap)"
    ]
