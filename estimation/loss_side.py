"""Which parameters act only on losses, and whether the data hold any loss.

Shared by the ML identification report (estimation/ml/identification.py) and the Bayesian
pooled start (estimation/bayes/pooled_start.py): with no outcome below the reference point
the loss-side parameters never enter the likelihood.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from stopwise.data_schemas.arrays import LotteryData, StoppingData

LOSS_PARAMS = ("beta", "loss_aversion")


def data_has_losses(model: Any, data: Any) -> bool:
    """Whether any outcome lies below the reference point: a negative lottery outcome, or
    a stopping trial that starts with a bank above zero and keeps less than it on a bust
    (reference: the start bank, or the model's numeric reference point)."""
    if isinstance(data, LotteryData):
        outcomes = np.concatenate([np.ravel(data.a_x), np.ravel(data.b_x)])
        probs = np.concatenate([np.ravel(data.a_p), np.ravel(data.b_p)])
        return bool(np.any((outcomes < 0) & (probs > 0)))
    if isinstance(data, StoppingData):
        reference = (model.options or {}).get("reference", "start")
        start = np.asarray(data.cond_start, dtype=float)
        kept = np.asarray(data.cond_bust_keep, dtype=float) * start
        if reference == "start":
            return bool(np.any(kept < start))
        return bool(np.any(np.minimum(kept, start) < float(reference)))
    return True


def loss_parameters(model: Any) -> tuple[str, ...]:
    """Parameters that act only on losses: beta, loss_aversion, and delta of TK weighting."""
    names = set(LOSS_PARAMS)
    if "+tk" in f"+{model.name}":
        names.add("delta")
    return tuple(n for n in model.param_names if n in names)
