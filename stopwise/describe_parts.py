"""Describe a folder (or glob) of Parquet parts without holding its decision rows in memory.

Every statistic of the stopping description (stopwise/describe.py) is a function of the
trials: subjects, trial counts, quartiles of draws attempted and of the final bank, bust
rate, mean stop step and the stop-step counts per condition. So each part is validated with
its seams (data_schemas/partitioned.py: a trial belongs to the part holding its first row)
and reduced to one row per trial (``trial_summary``) as one task of the study runner
(estimation/distributed.py); only the stacked per-trial rows meet in the client, and the
tables come out exactly as for the same rows in one file. Parts in another format
(trial-level rows, lottery choices) are gathered in memory and described as one data set.

This module imports neither JAX nor the estimation engines (``stopwise describe`` starts
without them).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import Any

import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.load import load
from stopwise.data_schemas.partitioned import (
    PartCheck,
    check_part,
    is_partitioned,
    list_parts,
    load_parts,
    merge_checks,
    part_columns,
    refuse_invalid,
)
from stopwise.describe import Description, describe_trials, trial_summary
from stopwise.describe import describe as describe_one
from stopwise.validate_parts import run_over_parts


def summarise_part(
    parts: Sequence[str], index: int, allow_censored: bool, by: str | None
) -> tuple[PartCheck, pd.DataFrame | None, str | None]:
    """One task: validate part ``index`` with its seams and, if it is clean decision-level
    data, its trials (``trial_summary``); the third item is a refusal of the ``by`` column
    (it changes within a trial), naming the part."""
    check, clean = check_part(parts, index, None, allow_censored)
    if clean is None or check.data_format != "decisions":
        return check, None, None
    try:
        return check, trial_summary(clean, by), None
    except StopwiseInputError as exc:
        return check, None, f"{parts[index]} (rows of this part and its seam): {exc}"


def describe_parts(
    source: str | os.PathLike[str],
    by: str | None = None,
    allow_censored: bool = False,
    *,
    workers: int | None = 0,
    scheduler: str | None = None,
) -> Description:
    """The description of every part together (module docstring)."""
    parts = list_parts(source)
    columns = [part_columns(p) for p in parts]
    for path, names in zip(parts, columns):
        if by is not None and names and by not in names:
            raise StopwiseInputError(
                f"{path}: no column {by!r} to split by; the part has {', '.join(names)}"
            )
    results = run_over_parts(  # in-process: the parts on threads, as validate and fit
        summarise_part,
        parts,
        {"allow_censored": allow_censored, "by": by},
        workers=workers,
        scheduler=scheduler,
        progress=False,
    )
    refuse_invalid(merge_checks(str(source), [check for check, _, _ in results], 20))
    refusals = [why for _, _, why in results if why]
    if refusals:
        raise StopwiseInputError(refusals[0])
    if {check.data_format for check, _, _ in results} - {"decisions", None}:
        frame = load_parts(source, allow_censored=allow_censored)
        return describe_one(load(frame, allow_censored=allow_censored), by=by)
    trials = pd.concat([t for _, t, _ in results if t is not None], ignore_index=True)
    present = set().union(*map(set, columns))
    return describe_trials(trials, str(source), present, by)


def describe(data: Any, by: str | None = None, **where: Any) -> Description:
    """``stopwise.describe``: a folder or glob part by part (``describe_parts``; ``where``:
    workers, scheduler), anything else as stopwise.describe.describe."""
    if is_partitioned(data):
        return describe_parts(data, by, **where)
    return describe_one(data, by)
