"""Memory of a stopping model's largest table, estimated before anything is allocated.

Every stopping policy works on per-condition tables (models.stopping). Their largest one has

- ``myopic``: 2 x n_cond x (n_steps + 1) values (both actions' tables, an upper bound);
- ``planner``: n_cond x (H + 1), H the planner cap (``Caps.planner_cap``);
- ``target`` with logit noise: n_cond x K, K the number of targets (``Caps.n_targets``);
- ``target`` with probit noise: n_cond x K x K (every pair of targets is compared inside
  the Gauss-Hermite average, models.noise).

The estimate is WORKING_COPIES x 8 bytes x that count: a gradient holds the table, its
cotangent and a few intermediates of the same shape. Six copies is an assumption, not a
measurement (the issue's 12 GB for crra+target+probit at p_survive 0.999 would be six
copies of the 2 GB table of three such conditions; the data behind that report are not
known here). Beyond MAX_TABLE_BYTES (data_schemas.limits) the model is refused
with the cap that would fit.
"""

from __future__ import annotations

import math

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.limits import MAX_TABLE_BYTES
from stopwise.models.stopping import Caps

WORKING_COPIES = 6
_BYTES = 8


def largest_table_values(
    policy: str, noise_base: str, n_cond: int, n_steps: int, caps: Caps
) -> int:
    """Values in the largest table the policy builds (see the module docstring)."""
    if policy == "myopic":
        return 2 * n_cond * (n_steps + 1)
    if policy == "planner":
        return n_cond * (caps.planner_cap(n_steps) + 1)
    n_targets = caps.n_targets(n_steps)
    pairs = n_targets * (n_targets if noise_base == "probit" else 1)
    # the survival chance of every step 0..n_targets (stopping.step_chances) is one longer
    # than a logit target table
    return n_cond * max(pairs, n_targets + 1)


def estimated_bytes(policy: str, noise_base: str, n_cond: int, n_steps: int, caps: Caps) -> int:
    """WORKING_COPIES x 8 bytes x the largest table's values."""
    return WORKING_COPIES * _BYTES * largest_table_values(policy, noise_base, n_cond, n_steps, caps)


def largest_fitting_cap(policy: str, noise_base: str, n_cond: int) -> int:
    """The largest max_target whose estimate stays within MAX_TABLE_BYTES (0 if none)."""
    values = MAX_TABLE_BYTES // (WORKING_COPIES * _BYTES * max(n_cond, 1))
    per_condition = math.isqrt(values) if policy == "target" and noise_base == "probit" else values
    return max(per_condition - 1, 0)


def check_table_size(
    model_name: str, policy: str, noise_base: str, n_cond: int, n_steps: int, caps: Caps
) -> None:
    """Refuse a model whose estimated table memory exceeds MAX_TABLE_BYTES."""
    need = estimated_bytes(policy, noise_base, n_cond, n_steps, caps)
    if need <= MAX_TABLE_BYTES:
        return
    fitting = largest_fitting_cap(policy, noise_base, n_cond)
    fix = (
        f"give a smaller --max-target (at most {fitting} for these {n_cond} conditions)"
        if fitting >= max(n_steps, 1)
        else "split the data by condition"
    )
    extra = (
        "; or use logit noise, whose target table grows linearly"
        if noise_base == "probit" and policy == "target"
        else ""
    )
    raise StopwiseInputError(
        f"model {model_name} on these data needs about {need / 2**30:.1f} GiB for its "
        f"largest table ({n_cond} condition(s), p_survive up to {caps.p_bound:g}), beyond the "
        f"documented limit of {MAX_TABLE_BYTES / 2**30:g} GiB (README, 'Limits'): {fix}{extra}"
    )
