"""The documented parameter box (README, "Limits") on which every log-likelihood and its
gradient are finite (tests/test_models_finite.py checks it over random points by hypothesis).

- A parameter with finite bounds (lo, hi) ranges over [lo + 1e-6, hi - 1e-6]: e.g. ``a`` in
  [-4.999999, 4.999999], ``r`` (crra) in [-2.999999, 4.999999].
- Noise parameters, whose bounds are open to infinity: ``precision`` and ``sigma`` in
  [1e-8, 1e8], ``tremble`` in [1e-8, 1 - 1e-8].
- Amounts: lottery outcomes, gains and start banks up to ``STAKE_LIMIT`` = 1e6 in size
  (with wealth + outcome >= 0 for crra and expo, models.domain), ``p_survive`` in
  [0.01, 0.99] for stopping data.

Finite by construction: utilities are clipped to [-1e100, 1e100] (models.utility), noise
rules work in log space (models.noise), so value differences up to 2e100 times a precision
of 1e8 or over a sigma of 1e-8 stay near 1e108 and their squares near 1e216.
"""

from __future__ import annotations

import math

from stopwise.models.base import ParamSpec

EDGE = 1e-6
NOISE_BOX: dict[str, tuple[float, float]] = {
    "precision": (1e-8, 1e8),
    "sigma": (1e-8, 1e8),
    "tremble": (1e-8, 1.0 - 1e-8),
}
STAKE_LIMIT = 1e6
P_SURVIVE_BOX = (0.01, 0.99)


def parameter_box(spec: ParamSpec) -> tuple[float, float]:
    """[lo, hi] of the documented box for one parameter (see the module docstring)."""
    if spec.name in NOISE_BOX:
        return NOISE_BOX[spec.name]
    if not (math.isfinite(spec.lower) and math.isfinite(spec.upper)):
        raise ValueError(f"parameter {spec.name} has no documented box")
    return spec.lower + EDGE, spec.upper - EDGE
