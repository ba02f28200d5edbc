"""The outcome domain of power utilities, checked on the concrete data before a fit.

``crra`` and ``expo`` are defined for wealth + outcome >= 0 (models.utility); an outcome
below zero gets the floor utility -1e100, so any option that may lose is "infinitely bad"
and a fit drives the noise parameter to zero (issue 22: log-likelihood -5.4e88 with
precision 4.6e-14 on the demo's lottery list). Such data are refused with the fix named.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError

POWER_UTILITIES = ("crra", "expo")


def lowest_outcome(data: Any) -> float | None:
    """The smallest amount a utility is evaluated at, before wealth: a lottery outcome
    with positive probability, or a stopping trial's start bank (banks only grow from it,
    and what is kept on a bust is a share of a bank). None when the data hold no amounts."""
    if hasattr(data, "a_x"):
        amounts = [
            np.asarray(x)[np.asarray(p) > 0]
            for x, p in ((data.a_x, data.a_p), (data.b_x, data.b_p))
        ]
    else:
        start = getattr(data, "cond_start", None)
        amounts = [] if start is None else [np.minimum(np.asarray(start), 0.0)]
    values = [a for a in amounts if a.size]
    return float(min(np.min(a) for a in values)) if values else None


def check_outcome_domain(model_name: str, utility: str, wealth: float, data: Any) -> None:
    """Refuse data with wealth + outcome < 0 under a power utility (see the module
    docstring), naming the wealth that would fix it and the alternative."""
    if utility not in POWER_UTILITIES:
        return
    lowest = lowest_outcome(data)
    if lowest is None or wealth + lowest >= 0:
        return
    need = -lowest
    raise StopwiseInputError(
        f"the data have outcomes down to {lowest:g}, below zero for {utility} utility, which "
        f"is defined for wealth + outcome >= 0 (model {model_name}, wealth {wealth:g}): give "
        f"a wealth of at least {need:g} (command line: --wealth {need:g}; Python: "
        f"stopwise.model('{model_name}', wealth={need:g})), or use pt for gains and losses"
    )
