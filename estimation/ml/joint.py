"""Joint estimation: several data sets (e.g. a lottery list and a stopping task played by
the same subjects), each with its own model, sharing parameters by name in one likelihood:

    ln L(z) = sum_d sum_{i in d} ll_d,i(theta_d(z)),   theta_d = the parameters of model d,

where a parameter name used by several models is one coefficient. Subjects are matched across
data sets by their labels, so the clustered sandwich treats all of a subject's rows (in every
data set) as one cluster.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.cells import subject_labels
from stopwise.estimation.ml.mle import run_fit, start_design
from stopwise.estimation.ml.problem import (
    Layout,
    Problem,
    Reported,
    check_kind,
    make_layout,
    pad_rows,
    padded_size,
    subject_index,
    theta_scalars,
)
from stopwise.estimation.ml.response import _strip
from stopwise.estimation.ml.results import Fit


@dataclass(frozen=True)
class JointRows:
    """Concatenated row log-likelihoods of several (model, data) parts; args = tuple of
    bundles; ``index[d]`` gives the positions in z of part d's free parameters."""

    layouts: tuple[Layout, ...]
    index: tuple[tuple[int, ...], ...]

    def __call__(self, z: Any, args: Any) -> Any:
        parts = []
        for lay, idx, data in zip(self.layouts, self.index, args):
            z_part = z[jnp.asarray(idx, dtype=jnp.int32)]
            parts.append(lay.model.loglik_obs(theta_scalars(lay, z_part), data))
        return jnp.concatenate(parts)


def fit_joint(
    parts: Sequence[tuple[Any, Any]],
    *,
    se: str | None = "auto",
    starts: int = 3,
    seed: int = 0,
    fixed: Mapping[str, float] | None = None,
    bootstrap_reps: int = 200,
    max_iter: int = 200,
    progress: bool = True,
) -> Fit:
    """Fit [(model, data), ...] jointly with parameters shared by name (module docstring)."""
    if len(parts) < 2:
        raise StopwiseInputError("joint estimation needs at least two (model, data) parts")
    fixed = dict(fixed or {})
    names: list[str] = []
    specs: dict[str, Any] = {}
    notes: list[str] = []
    layouts = []
    for model, data in parts:
        check_kind(model, data)
        lay = make_layout(model, {k: v for k, v in fixed.items() if k in model.param_names})
        layouts.append(lay)
        for spec in lay.specs():
            if spec.name not in specs:
                specs[spec.name] = spec
                names.append(spec.name)
            elif (spec.lower, spec.upper) != (specs[spec.name].lower, specs[spec.name].upper):
                notes.append(
                    f"{spec.name} has different bounds in {model.name}; the bounds "
                    f"of the first model that uses it apply"
                )
    unknown = [k for k in fixed if k not in specs and not any(k in m.param_names for m, _ in parts)]
    if unknown:
        raise StopwiseInputError(f"fixed parameter(s) {unknown} belong to none of the models")
    index = tuple(tuple(names.index(n) for n in lay.free) for lay in layouts)
    label_index: dict[Any, int] = {}
    args, weights, clusters = [], [], []
    n_obs = 0
    for _, data in parts:
        labels = subject_labels(data)
        codes = np.array([label_index.setdefault(lab, len(label_index)) for lab in labels])
        size = padded_size(data.n_obs)
        args.append(pad_rows(_strip(data), size))
        w = np.zeros(size)
        w[: data.n_obs] = 1.0
        c = np.zeros(size, dtype=np.int64)
        c[: data.n_obs] = codes[subject_index(data)]
        weights.append(w)
        clusters.append(c)
        n_obs += data.n_obs
    z0 = np.array([float(specs[n].to_unconstrained(specs[n].start)) for n in names])
    reported = [Reported(n, j, specs[n]) for j, n in enumerate(names)]
    rows = JointRows(tuple(layouts), index)
    problem = Problem(
        rows,
        tuple(args),
        np.concatenate(weights),
        np.concatenate(clusters),
        len(label_index),
        n_obs,
        z0,
        reported,
        list(names),
    )
    name = " & ".join(m.name for m, _ in parts)
    fit = run_fit(
        problem,
        name,
        len(label_index),
        se=se,
        starts=start_design(z0, starts, seed),
        seed=seed,
        max_iter=max_iter,
        bootstrap_reps=bootstrap_reps,
        progress=progress,
    )
    shared = [n for n in names if sum(n in lay.free for lay in layouts) > 1]
    fit.notes += [*notes, f"shared across data sets: {', '.join(shared) or 'none'}"]
    return fit
