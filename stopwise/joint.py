"""The public joint fit: several data sets of the same subjects (e.g. a lottery list and a
stopping task), each with its own model, in one likelihood with parameters shared by name:

    ln L(z) = sum_d sum_{i in d} ll_d,i(theta_d(z))

(engine: stopwise.estimation.ml.joint.fit_joint). Subjects are matched across data sets by
their labels; the clustered sandwich treats all of a subject's rows as one cluster.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from typing import Any

import numpy as np

from stopwise.api import prepare_model, resolve_data, resolve_model, select_data
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.cells import subject_labels
from stopwise.estimation.ml.joint import fit_joint as run_joint
from stopwise.estimation.ml.results import Fit


def subject_overlap_note(bundles: Sequence[Any]) -> str:
    """How many subjects appear in every data set (the ones that tie the parts together)."""
    sets = [set(map(str, subject_labels(b))) for b in bundles]
    common = set.intersection(*sets)
    total = len(set.union(*sets))
    return (
        f"subjects in every data set: {len(common)} of {total} (matched by label; a "
        "subject in one data set only informs the shared parameters through that set)"
    )


def fit_joint(parts: Sequence[tuple[Any, Any]], *, max_target: int | None = None, **kw: Any) -> Fit:
    """Fit [(model, data), ...] jointly, parameters shared by name (module docstring).
    ``model``: a spec or a Model; ``data``: a path, DataFrame, Dataset or array bundle.
    Other keywords go to the engine (se, starts, seed, fixed, bootstrap_reps, progress)."""
    if len(parts) < 2:
        raise StopwiseInputError("a joint fit needs at least two (model, data) parts")
    prepared, notes, warned = [], [], []
    for model, data in parts:
        the_model = resolve_model(model, max_target)
        bundle, frame = resolve_data(data)
        bundle, _, selection = select_data(the_model, bundle, frame)
        warned += prepare_model(the_model, bundle)
        notes += selection
        prepared.append((the_model, bundle))
    counts = Counter(n for m, _ in prepared for n in set(m.param_names))
    if max(counts.values(), default=0) < 2:
        names = "; ".join(f"{m.name}: {', '.join(m.param_names)}" for m, _ in prepared)
        raise StopwiseInputError(
            f"the models share no parameter, so a joint fit equals separate fits ({names})"
        )
    fit = run_joint(prepared, **kw)
    fit.notes += [*notes, subject_overlap_note([b for _, b in prepared])]
    fit.warnings += [w for w in dict.fromkeys(warned) if w not in fit.warnings]
    if not np.isfinite(fit.loglik):
        fit.warnings.append("the joint log-likelihood is not finite")
    return fit
