"""Out-of-core data for the face: fit a folder or glob of Parquet files part by part
(data_schemas/partitioned.py), each part a task of the study runner (estimation/
distributed.py: in-process, a LocalCluster or an existing Dask cluster). Validation alone
lives in stopwise/validate_parts.py (no JAX), description in stopwise/describe_parts.py;
``validate`` and ``validate_parts`` are re-exported here.

A pooled maximum-likelihood fit of a solo stopping model without formulas is done on counts
(estimation/ml/counts.py): each part is validated and reduced to counts n_u on its worker, the
counts are summed, and the reduction is certified on the first part's rows
(``reduction_gap`` <= 1e-9 relative) before the fit. Every other fit, and a model that fails
the certificate, says why and falls back to rows: the clean parts are gathered into one
DataFrame in memory.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

from stopwise.data_schemas.partitioned import (
    check_part,
    is_partitioned,
    list_parts,
    load_parts,
    merge_checks,
    part_columns,
    part_head,
    refuse_invalid,
)
from stopwise.data_schemas.report import ValidationReport
from stopwise.data_schemas.validate import check_source
from stopwise.estimation.ml.counts import (
    EXACT_TOLERANCE,
    check_and_count_part,
    counts_bundle,
    counts_refusal,
    fit_counts,
    merge_counts,
    reduction_gap,
)
from stopwise.validate_parts import run_over_parts, validate, validate_parts

__all__ = [
    "count_parts",
    "fit_parts",
    "is_partitioned",
    "load_parts",
    "validate",
    "validate_parts",
]
CERTIFY_ROWS = 20_000  # rows of the first part used to certify the count reduction
FIT_OPTIONS = ("starts", "max_iter", "bootstrap_reps", "progress")


def count_parts(
    source: str | os.PathLike[str],
    *,
    workers: int | None = 0,
    scheduler: str | None = None,
    progress: bool = False,
    fast: bool = True,
    max_per_kind: int = 20,
) -> tuple[ValidationReport, list[pd.DataFrame]]:
    """The fit's data pass: validate every part as one task each and reduce the clean
    decision-level ones to counts n_u; the merged report and the parts' counts. ``fast``:
    clean parts go through the Arrow screen (estimation/ml/counts.py
    ``check_and_count_part``); False runs the full validator on every part."""
    results = run_over_parts(
        check_and_count_part,
        list_parts(source),
        {"max_per_kind": max_per_kind, "count": True, "fast": fast},
        workers=workers,
        scheduler=scheduler,
        progress=progress,
    )
    report = merge_checks(str(source), [c for c, _ in results], max_per_kind)
    return report, [n for _, n in results if n is not None]


@dataclass
class PartsFit:
    """A fit on counts, or (fit None) the rows to fit instead and why."""

    fit: Any = None
    rows: pd.DataFrame | None = None
    notes: list[str] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)


def _whole_trials(frame: pd.DataFrame) -> pd.DataFrame:
    """The rows without the last (subject, trial), which the cut may have split; all rows
    when they hold one trial only."""
    last = frame[["subject", "trial"]].iloc[-1]
    whole = (frame["subject"] != last["subject"]) | (frame["trial"] != last["trial"])
    return frame[whole] if whole.any() else frame


def _certify(model: Any, parts: Sequence[str], kind: str | None) -> float:
    """The count reduction's relative gap on (up to CERTIFY_ROWS of) the first part's rows:
    its head cut to whole trials and typed by the validator; the whole part's clean rows when
    the head alone is not clean (e.g. one trial longer than the head)."""
    head = part_head(parts[0], CERTIFY_ROWS)
    if len(head):
        _, clean = check_source(_whole_trials(head), kind)
        if clean is not None and len(clean):
            return reduction_gap(model, clean)
    _, clean = check_part(parts, 0, kind)
    if clean is None:
        return 0.0
    return reduction_gap(model, _whole_trials(clean.iloc[:CERTIFY_ROWS]))


def fit_parts(
    model: Any,
    source: str | os.PathLike[str],
    *,
    method: str,
    se: str | None,
    by: str | None,
    formulas: Sequence[str] | Mapping[str, str] | None,
    seed: int,
    kw: Mapping[str, Any],
    prepare: Callable[[Any, Any], list[str]],
    workers: int | None = 0,
    scheduler: str | None = None,
    fast: bool = True,
    shared: Callable[[Any], Any] | None = None,
) -> PartsFit:
    """A pooled fit on counts when the model and data allow it (module docstring); else the
    rows in memory with a note saying why (``fast``: see ``count_parts``). ``shared(bundle)``,
    when given, is the model to fit on the counts' bundle instead of ``model`` (one shared
    Model per spec string and data conditions, stopwise.api.model_for_data, so that a refit
    in the same process reuses its compiled programs). The model is prepared on the counts'
    bundle before the reduction is certified, so the certificate checks the model fitted."""
    parts = list_parts(source)
    header = part_columns(parts[0])
    why = counts_refusal(model, header, formulas)
    if why is None and (method != "mle" or by is not None or kw.get("types") is not None):
        why = "only a pooled maximum-likelihood fit uses counts"
    unknown = sorted(set(kw) - set(FIT_OPTIONS))
    if why is None and unknown:
        why = f"option(s) {', '.join(unknown)} need the rows"
    if why is not None:
        return PartsFit(rows=load_parts(source), notes=[f"fitted on rows, not counts: {why}"])
    progress = bool(kw.get("progress", False))
    report, pieces = count_parts(
        source, workers=workers, scheduler=scheduler, progress=progress, fast=fast
    )
    refuse_invalid(report)
    counts = merge_counts(pieces)
    bundle = counts_bundle(counts)
    model = model if shared is None else shared(bundle)
    warned = prepare(model, bundle)
    gap = _certify(model, parts, None)
    if gap > EXACT_TOLERANCE:
        why = (
            f"{model.name}'s log-likelihood differs between rows and counts on the first "
            f"part (relative gap {gap:.2g} > {EXACT_TOLERANCE:g})"
        )
        return PartsFit(rows=load_parts(source), notes=[f"fitted on rows, not counts: {why}"])
    options = {k: v for k, v in kw.items() if k in FIT_OPTIONS}
    fit = fit_counts(model, counts, se=se, seed=seed, bundle=bundle, **options)
    fit.notes.append(
        f"count reduction certified on the first part: |ll_rows - ll_counts| <= "
        f"{EXACT_TOLERANCE:g} x |ll| at 3 parameter points; {len(parts)} Parquet parts"
    )
    return PartsFit(fit=fit, warnings=warned)
