"""Partitioned Parquet data: a folder (or a glob) of Parquet files, checked file by file.

Parts are the folder's ``*.parquet``/``*.pq`` files (names starting with "." or "_" are
skipped) or the glob's matches, in sorted name order. Part k is checked on its own
(``check_part``), so parts can be checked on different workers, with the seams handled:

- a trial belongs to the part holding its first row: part k drops its leading rows whose
  (subject, trial) equals the last key of part k-1, and takes over the leading rows of
  part k+1 (k+2, ...) that continue its own last trial;
- messages name the file the row sits in and its line (row position + 2, as for a single
  Parquet file: header = line 1).

Rows of one trial must be contiguous in part order; a trial whose rows reappear later in
another part is reported by the usual checks (its later rows do not start at step 0, or
its key repeats).
"""

from __future__ import annotations

import glob
import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .errors import StopwiseDataError, StopwiseInputError
from .reading import PARQUET_SUFFIXES
from .report import Problem, ValidationReport
from .validate import check_source

TRIAL_KEY = ("subject", "trial")
GLOB_CHARS = ("*", "?", "[")


def is_partitioned(source: object) -> bool:
    """True for a folder or a glob pattern (a path naming no single file)."""
    if not isinstance(source, (str, os.PathLike)):
        return False
    text = str(source)
    return Path(text).is_dir() or (any(c in text for c in GLOB_CHARS) and not Path(text).exists())


def list_parts(source: str | os.PathLike[str]) -> list[str]:
    """The Parquet files of a folder or glob, sorted by name (module docstring)."""
    text = str(source)
    if Path(text).is_dir():
        found = [
            str(p)
            for p in Path(text).iterdir()
            if p.is_file()
            and p.suffix.lower() in PARQUET_SUFFIXES
            and not p.name.startswith((".", "_"))
        ]
    else:
        found = [p for p in glob.glob(text) if Path(p).is_file()]
    if not found:
        raise StopwiseInputError(
            f"{text}: no Parquet files found (expected a folder of *.parquet or *.pq files, "
            "or a glob that matches some)"
        )
    return sorted(found)


def edge_key(path: str, last: bool) -> tuple[Any, Any] | None:
    """(subject, trial) of a part's first or last row; None if unreadable or keyless."""
    try:
        meta = pq.ParquetFile(path)
        if meta.metadata.num_rows == 0 or not set(TRIAL_KEY) <= set(meta.schema_arrow.names):
            return None
        groups = range(meta.num_row_groups - 1, -1, -1) if last else range(meta.num_row_groups)
        for g in groups:
            table = meta.read_row_group(g, columns=list(TRIAL_KEY))
            if table.num_rows:
                row = table.num_rows - 1 if last else 0
                return tuple(table.column(c)[row].as_py() for c in TRIAL_KEY)
    except Exception:  # an unreadable part is reported by its own check
        return None
    return None


def _leading_rows(path: str, key: tuple[Any, Any]) -> tuple[pd.DataFrame, bool]:
    """(the part's leading rows with this key, True if that is the whole part)."""
    meta = pq.ParquetFile(path)
    pieces, whole = [], True
    for g in range(meta.num_row_groups):
        frame = meta.read_row_group(g).to_pandas()
        frame.columns = [str(c).strip() for c in frame.columns]  # as the part's own rows
        same = (frame["subject"] == key[0]).to_numpy() & (frame["trial"] == key[1]).to_numpy()
        stop = int(np.argmin(same)) if not same.all() else len(frame)
        pieces.append(frame.iloc[:stop])
        if stop < len(frame):
            whole = False
            break
    return pd.concat(pieces, ignore_index=True), whole


def _lead_length(frame: pd.DataFrame, key: tuple[Any, Any] | None) -> int:
    """How many leading rows of ``frame`` carry ``key`` (they belong to the previous part)."""
    if key is None or not set(TRIAL_KEY) <= set(frame.columns) or len(frame) == 0:
        return 0
    same = (frame["subject"] == key[0]).to_numpy() & (frame["trial"] == key[1]).to_numpy()
    return int(np.argmin(same)) if not same.all() else len(frame)


@dataclass
class PartBatch:
    """The rows checked for part k, with each row's file and row position in that file."""

    frame: pd.DataFrame | None
    files: list[str]
    file_of_row: np.ndarray
    row_in_file: np.ndarray
    failure: str | None = None


def part_batch(parts: Sequence[str], k: int) -> PartBatch:
    """Part k's own rows plus the rows of later parts that continue its last trial."""
    path = parts[k]
    try:
        own = pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises many types for corrupt files
        return PartBatch(None, [path], np.zeros(0, int), np.zeros(0, int), str(exc))
    own.columns = [str(c).strip() for c in own.columns]
    skip = _lead_length(own, edge_key(parts[k - 1], last=True) if k > 0 else None)
    frames = [own.iloc[skip:]]
    files = [path]
    file_of_row = [np.zeros(len(own) - skip, dtype=np.int64)]
    row_in_file = [np.arange(skip, len(own))]
    last = tuple(own[c].iloc[-1] for c in TRIAL_KEY) if len(own) > skip else None
    if last is not None and set(TRIAL_KEY) <= set(own.columns):
        for j in range(k + 1, len(parts)):
            if edge_key(parts[j], last=False) != last:
                break
            rows, whole = _leading_rows(parts[j], last)
            files.append(parts[j])
            frames.append(rows)
            file_of_row.append(np.full(len(rows), len(files) - 1, dtype=np.int64))
            row_in_file.append(np.arange(len(rows)))
            if not whole:
                break
    frame = pd.concat(frames, ignore_index=True)
    return PartBatch(frame, files, np.concatenate(file_of_row), np.concatenate(row_in_file))


@dataclass
class PartCheck:
    """The outcome of checking one part: problems (files and lines of the parts), counts,
    rows checked, format, subjects seen, trials and distinct values for the summary."""

    problems: list[Problem]
    counts: dict[str, int]
    n_rows: int
    data_format: str | None
    subjects: set[Any] = field(default_factory=set)
    trials: int = 0
    values: dict[str, set[float]] = field(default_factory=dict)


def check_part(
    parts: Sequence[str],
    k: int,
    kind: str | None = None,
    allow_censored: bool = False,
    max_per_kind: int = 20,
) -> tuple[PartCheck, pd.DataFrame | None]:
    """Validate part k (module docstring); the clean typed rows when it has no problem."""
    batch = part_batch(parts, k)
    if batch.frame is None:
        problem = Problem(
            "not_a_table", parts[k], None, None, "", f"readable Parquet ({batch.failure})"
        )
        return PartCheck([problem], {"not_a_table": 1}, 0, None), None
    if len(batch.frame) == 0:  # every row continues the previous part's last trial
        return PartCheck([], {}, 0, None), None
    report, clean = check_source(batch.frame, kind, allow_censored, max_per_kind)
    problems = [_relocate(p, batch) for p in report.problems]
    check = PartCheck(problems, dict(report.counts), report.n_rows, report.data_format)
    if clean is not None:
        check.subjects = set(clean["subject"].unique()) if "subject" in clean else set()
        check.trials = int(report.stats.get("trials", 0))
        for column in ("p_survive", "gain"):
            if column in clean:
                check.values[column] = set(np.unique(clean[column].to_numpy(float)).tolist())
    return check, clean


def _relocate(problem: Problem, batch: PartBatch) -> Problem:
    """The problem with the file and line of the part row it concerns."""
    if problem.line is None or problem.line < 2 or problem.line - 2 >= len(batch.file_of_row):
        return Problem(**{**problem.to_dict(), "file": batch.files[0]})
    i = problem.line - 2
    where = {"file": batch.files[batch.file_of_row[i]], "line": int(batch.row_in_file[i]) + 2}
    return Problem(**{**problem.to_dict(), **where})


def merge_checks(source: str, checks: Sequence[PartCheck], max_per_kind: int) -> ValidationReport:
    """One report for all parts: every problem counted, at most ``max_per_kind`` listed."""
    counts: dict[str, int] = {}
    problems: list[Problem] = []
    for check in checks:
        for p in check.problems:
            if sum(1 for q in problems if q.kind == p.kind) < max_per_kind:
                problems.append(p)
        for kind, n in check.counts.items():
            counts[kind] = counts.get(kind, 0) + n
    formats = {c.data_format for c in checks if c.data_format is not None}
    fmt = formats.pop() if len(formats) == 1 else None
    if len(formats) > 0:
        counts["wrong_format"] = counts.get("wrong_format", 0) + 1
        problems.append(
            Problem("wrong_format", source, None, None, "", "every part in one data format")
        )
    stats: dict[str, Any] = {}
    if not counts:
        subjects: set[Any] = set().union(*(c.subjects for c in checks))
        stats = {"parts": len(checks), "subjects": len(subjects)}
        stats["trials"] = sum(c.trials for c in checks)
        for column in ("p_survive", "gain"):
            values = set().union(*(c.values.get(column, set()) for c in checks))
            if values:
                stats[f"{column}_values"] = sorted(values)[:12]
    n_rows = sum(c.n_rows for c in checks)
    return ValidationReport(source, fmt, problems, counts, n_rows, max_per_kind, stats)


def refuse_invalid(report: ValidationReport) -> None:
    """StopwiseDataError listing every problem (file and line) unless the report is clean."""
    if not report.ok:
        raise StopwiseDataError(
            f"{report.source}: the data are not valid ({report.n_problems} problem(s))\n"
            f"{report.format()}",
            report,
        )


def load_parts(
    source: str | os.PathLike[str], kind: str | None = None, allow_censored: bool = False
) -> pd.DataFrame:
    """All parts as one validated DataFrame in memory (the rows fall-back)."""
    parts = list_parts(source)
    results = [check_part(parts, k, kind, allow_censored) for k in range(len(parts))]
    refuse_invalid(merge_checks(str(source), [c for c, _ in results], 20))
    return pd.concat([f for _, f in results if f is not None], ignore_index=True)


def part_head(path: str, n_rows: int) -> pd.DataFrame:
    """The first ``n_rows`` rows of a Parquet part (read row group by row group, no more),
    as pandas reads them."""
    handle = pq.ParquetFile(path)
    batch = next(handle.iter_batches(batch_size=n_rows), None)
    if batch is None:
        return handle.schema_arrow.empty_table().to_pandas()
    return pa.Table.from_batches([batch]).to_pandas()


def part_columns(path: str) -> list[str]:
    """The column names of a Parquet part (none if unreadable: its check reports it)."""
    try:
        return [str(c).strip() for c in pq.read_schema(path).names]
    except Exception:  # pyarrow raises many types for corrupt files
        return []
