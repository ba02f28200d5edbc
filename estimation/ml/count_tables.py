"""Count tables as integer codes, and their merge across partitions.

A partition's counts n_u (estimation/ml/counts.py) are kept as code arrays per distinct key
u = (subject, condition, step, action, outcome) with small label tables beside them: the
partition's subject labels, and its conditions as rows (p_survive, gain, start, bust_keep).
Merging maps each partition's few labels to codes shared by all partitions, combines the
five codes of a key into one int64 and sums n over equal keys:

    n_u(all partitions) = sum over partitions k of n_u(k),

exact in integers. Only the label tables are hashed; the per-key work is integer arithmetic
and one ``np.bincount`` (or sort) per MERGE_CHUNK tables, so a merge of 200 partitions costs
a fraction of a groupby over their stacked label columns (benchmarks/RESULTS.md,
bench_parts: 2.97 s -> 0.25-0.45 s for 200 tables of 42,000 keys).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import pandas as pd

from stopwise.data_schemas import columns as C

KEY_COLUMNS = ("subject", "p_survive", "gain", "start", "bust_keep", "step", "action", "outcome")
DESIGN_COLUMNS = KEY_COLUMNS[1:5]
COUNT_COLUMN = "n"
ACTION_LABELS = np.asarray(C.ACTIONS, dtype=object)
OUTCOME_LABELS = np.asarray([*C.OUTCOMES, ""], dtype=object)  # by outcome code; "" = empty
MERGE_CHUNK = 16  # count tables summed at a time (merge_tables)
DENSE_CELLS_PER_ROW = 8  # sum by np.bincount while the key space is at most this x rows


@dataclass(frozen=True)
class CountTable:
    """n per distinct key of one partition, as codes: ``subject`` into ``subject_labels``,
    ``condition`` into the rows of ``design`` (p_survive, gain, start, bust_keep), ``action``
    into ACTION_LABELS, ``outcome`` into OUTCOME_LABELS; ``step`` as it is."""

    subject_labels: np.ndarray
    design: np.ndarray
    subject: np.ndarray
    condition: np.ndarray
    step: np.ndarray
    action: np.ndarray
    outcome: np.ndarray
    n: np.ndarray

    def __len__(self) -> int:
        return len(self.n)


def _label_codes(values: pd.Series, labels: np.ndarray) -> np.ndarray:
    """Code of each value in the fixed ``labels``; a value not among them is an error."""
    index = pd.Index(labels).get_indexer(values.to_numpy(dtype=object))
    if (index < 0).any():
        raise ValueError(f"unexpected label(s) {sorted(set(values[index < 0]))!r}")
    return index.astype(np.int64)


def table_from_frame(frame: pd.DataFrame) -> CountTable:
    """A count frame (KEY_COLUMNS and n, one row per distinct key) as a CountTable."""
    subject, subject_labels = pd.factorize(frame["subject"])
    design_rows = pd.MultiIndex.from_frame(frame[list(DESIGN_COLUMNS)].astype(np.float64))
    condition, distinct = design_rows.factorize()
    outcome = frame["outcome"].fillna("").astype(object)
    return CountTable(
        subject_labels=np.asarray(subject_labels),
        design=np.asarray(distinct.to_list(), dtype=np.float64).reshape(-1, 4),
        subject=np.asarray(subject, dtype=np.int64),
        condition=np.asarray(condition, dtype=np.int64),
        step=frame["step"].to_numpy(dtype=np.int64),
        action=_label_codes(frame["action"], ACTION_LABELS),
        outcome=_label_codes(outcome, OUTCOME_LABELS),
        n=frame[COUNT_COLUMN].to_numpy(dtype=np.int64),
    )


def table_frame(table: CountTable) -> pd.DataFrame:
    """The CountTable as a frame of labels (KEY_COLUMNS and n), sorted by key as a
    ``groupby(KEY_COLUMNS, sort=True)`` would sort it."""
    frame = pd.DataFrame({"subject": table.subject_labels[table.subject]})
    for i, column in enumerate(DESIGN_COLUMNS):
        frame[column] = table.design[table.condition, i]
    frame["step"] = table.step.astype(np.int64)
    frame["action"] = ACTION_LABELS[table.action]
    frame["outcome"] = OUTCOME_LABELS[table.outcome]
    frame[COUNT_COLUMN] = table.n.astype(np.int64)
    return frame.sort_values(list(KEY_COLUMNS), kind="stable").reset_index(drop=True)


class _SharedCodes:
    """Subject labels and condition rows seen so far, each with its shared code."""

    def __init__(self) -> None:
        self.subjects: pd.Index | None = None  # takes the first table's label dtype
        self.conditions: dict[tuple[float, ...], int] = {}

    def subject_codes(self, labels: np.ndarray) -> np.ndarray:
        if self.subjects is None:
            self.subjects = pd.Index(labels[:0])
        found = self.subjects.get_indexer(labels)
        if (found < 0).any():
            self.subjects = self.subjects.append(pd.Index(labels[found < 0]))
            found = self.subjects.get_indexer(labels)
        return found.astype(np.int64)

    def condition_codes(self, design: np.ndarray) -> np.ndarray:
        codes = [self.conditions.setdefault(tuple(row), len(self.conditions)) for row in design]
        return np.asarray(codes, dtype=np.int64)

    def design(self) -> np.ndarray:
        return np.asarray(list(self.conditions), dtype=np.float64).reshape(-1, 4)


def check_key_space(dims: tuple[int, ...]) -> None:
    """Refuse key columns whose combinations do not fit one int64 (product of ``dims``)."""
    if float(np.prod(np.asarray(dims, dtype=float))) >= 2.0**62:
        raise ValueError(f"too many distinct keys to combine in one int64: {dims}")


def sum_by_key(
    combined: np.ndarray, dims: tuple[int, ...], weights: np.ndarray | None = None
) -> tuple[np.ndarray, ...]:
    """The distinct keys (combined by ``np.ravel_multi_index`` over ``dims``), in order, as
    one code array per dimension, then per key the sum of ``weights`` (the number of rows
    when None), as int64: by ``np.bincount`` while the key space is at most
    DENSE_CELLS_PER_ROW x the rows (weighted: float sums of integers below 2^53, exact), else
    by sorting (``np.unique``, or a reduction at each new key)."""
    size = int(np.prod(dims))
    if size <= DENSE_CELLS_PER_ROW * max(len(combined), 1):
        totals = np.bincount(combined, weights=weights, minlength=size)
        distinct = np.flatnonzero(totals)
        summed = totals[distinct]
    elif weights is None:
        distinct, summed = np.unique(combined, return_counts=True)
    else:
        order = np.argsort(combined, kind="stable")
        ordered = combined[order]
        starts = np.flatnonzero(np.r_[True, ordered[1:] != ordered[:-1]]) if len(order) else order
        distinct = ordered[starts]
        summed = np.add.reduceat(weights[order], starts) if len(starts) else weights[:0]
    return (*np.unravel_index(distinct, dims), summed.astype(np.int64))


def _sum_equal_keys(codes: list[np.ndarray], n: np.ndarray) -> tuple[list[np.ndarray], np.ndarray]:
    """The distinct rows of the code columns and n summed over each: the five codes combined
    into one int64 by ``np.ravel_multi_index``, then ``sum_by_key`` (integer sums)."""
    dims = tuple(int(c.max()) + 1 if len(c) else 1 for c in codes)
    check_key_space(dims)
    *distinct, summed = sum_by_key(np.ravel_multi_index(tuple(codes), dims), dims, n)
    return distinct, summed


def merge_tables(parts: Iterable[CountTable | pd.DataFrame]) -> pd.DataFrame:
    """Sum the counts of several partitions (module docstring), MERGE_CHUNK tables at a time
    into a running total; a count frame is taken as ``table_from_frame`` of it. The result is
    a frame sorted by key (``table_frame``)."""
    shared = _SharedCodes()
    total: list[np.ndarray] = [np.zeros(0, dtype=np.int64) for _ in range(6)]
    waiting: list[list[np.ndarray]] = []

    def fold(columns: list[list[np.ndarray]]) -> list[np.ndarray]:
        stacked = [np.concatenate(c) for c in zip(*columns)]
        codes, n = _sum_equal_keys(stacked[:5], stacked[5])
        return [*codes, n]

    for part in parts:
        table = part if isinstance(part, CountTable) else table_from_frame(part)
        subject = shared.subject_codes(table.subject_labels)[table.subject]
        condition = shared.condition_codes(table.design)[table.condition]
        waiting.append([subject, condition, table.step, table.action, table.outcome, table.n])
        if len(waiting) == MERGE_CHUNK:
            total, waiting = fold([total, *waiting]), []
    if shared.subjects is None:
        raise ValueError("no count tables to merge")
    total = fold([total, *waiting])
    merged = CountTable(np.asarray(shared.subjects), shared.design(), *total[:5], total[5])
    return table_frame(merged)
