"""Reading for the fast path of clean decision-level Parquet parts (``arrow_screen``): a part
with its seams as one Arrow table, and its columns as numpy codes and values, without pandas.

Only parts whose columns and types the screen models are read here (``schema_covered``:
the decision-level columns, optional bank/start/bust_keep and covariates of scalar types);
anything else, or a part pyarrow cannot read, gives ``None`` and goes to the full validator.
Seams follow ``partitioned.part_batch``: part k drops its leading rows that continue the last
trial of part k-1 and takes over the leading rows of later parts that continue its own last
trial; keys are compared as pandas compares them, and seams whose keys mix types (text in one
part, integers in the next) are left to the validator.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from . import columns as C
from .checks_sequential import SEQUENTIAL_COLUMNS
from .checks_stopping import EXACT_ID
from .partitioned import TRIAL_KEY, edge_key

FAST_COLUMNS = (*C.DECISION_REQUIRED, "bank", "start", "bust_keep")
TEXT_COLUMNS = ("subject", "action", "outcome")
# Columns the validator checks beyond the fast set: their presence sends a part to it.
OTHER_KNOWN = frozenset(
    (
        *C.TRIAL_REQUIRED,
        *C.OPTIONAL_STOPPING,
        *C.LOTTERY_REQUIRED,
        *SEQUENTIAL_COLUMNS,
        C.CENSORED,
    )
) - set(FAST_COLUMNS)


def is_text(kind: pa.DataType) -> bool:
    """Plain or dictionary-encoded UTF-8 text (what pandas turns into str labels)."""
    if pa.types.is_dictionary(kind):
        kind = kind.value_type
    return pa.types.is_string(kind) or pa.types.is_large_string(kind)


def is_scalar(kind: pa.DataType) -> bool:
    """Types whose cells pandas reads as single values (the validator's nested-cell check
    cannot fire on them)."""
    return (
        is_text(kind)
        or pa.types.is_integer(kind)
        or pa.types.is_floating(kind)
        or pa.types.is_boolean(kind)
        or pa.types.is_temporal(kind)
        or pa.types.is_binary(kind)
        or pa.types.is_large_binary(kind)
        or pa.types.is_decimal(kind)
    )


def is_number(kind: pa.DataType) -> bool:
    return pa.types.is_integer(kind) or pa.types.is_floating(kind)


def fast_type(name: str, kind: pa.DataType) -> bool:
    """The Arrow type the screen reads a fast column as."""
    if name == "subject":
        return is_text(kind) or pa.types.is_integer(kind)
    if name in ("action", "outcome"):
        return is_text(kind)
    return is_number(kind)


def stored_index(schema: pa.Schema) -> bool:
    """True when pandas stored an index in a column (it would read that column as the index)."""
    meta = schema.pandas_metadata or {}
    return any(isinstance(i, str) for i in meta.get("index_columns", []))


def schema_covered(schema: pa.Schema, kind: str | None) -> bool:
    """The part's columns are ones the screen models (module docstring)."""
    names = list(schema.names)
    if [n.strip() for n in names] != names or len(set(names)) != len(names):
        return False
    if kind not in (None, "stopping", C.DECISIONS) or C.detect_format(names) != C.DECISIONS:
        return False
    if not set(C.DECISION_REQUIRED) <= set(names) or set(names) & OTHER_KNOWN:
        return False
    if stored_index(schema) or not all(is_scalar(f.type) for f in schema):
        return False
    return all(fast_type(f.name, f.type) for f in schema if f.name in FAST_COLUMNS)


def open_part(path: str, kind: str | None) -> pq.ParquetFile | None:
    """The part opened with its text key columns read dictionary-encoded; None when
    unreadable or outside the screen's cover."""
    try:
        schema = pq.read_schema(path)
        if not schema_covered(schema, kind):
            return None
        text = [n for n in TEXT_COLUMNS if not pa.types.is_dictionary(schema.field(n).type)]
        return pq.ParquetFile(path, read_dictionary=text)
    except Exception:  # pyarrow raises many types for corrupt files; the validator reports
        return None


def single_chunk(table: pa.Table) -> pa.Table:
    """The table with one chunk per column and one dictionary per text column."""
    return table.unify_dictionaries().combine_chunks()


def column_array(table: pa.Table, name: str) -> pa.Array:
    """A column of a single-chunk table as one Arrow array."""
    column = table.column(name)
    return column.chunk(0) if column.num_chunks == 1 else column.combine_chunks()


def text_codes(array: pa.Array, labels: Sequence[str], missing: int) -> np.ndarray:
    """Per row the position of its text in ``labels``; ``missing`` for a null and -1 for any
    other text (unknown or blank labels: the validator judges those). A dictionary that lists
    a text twice maps both entries alike."""
    if not pa.types.is_dictionary(array.type):
        array = array.dictionary_encode()
    entries = array.dictionary.to_pylist()
    lookup = np.array([labels.index(v) if v in labels else -1 for v in entries] + [missing])
    indices = pc.fill_null(array.indices, -1).to_numpy(zero_copy_only=False)
    return lookup.astype(np.int8)[indices]


def subject_codes(array: pa.Array) -> tuple[np.ndarray, np.ndarray] | None:
    """(code per row, label per code) of the subject column; None when a subject is missing,
    blank or its labels repeat in the dictionary (the validator judges those)."""
    if array.null_count:
        return None
    if pa.types.is_integer(array.type):
        codes, labels = pd.factorize(array.to_numpy())
        return np.asarray(codes, dtype=np.int64), np.asarray(labels)
    if not pa.types.is_dictionary(array.type):
        array = array.dictionary_encode()
    labels = np.asarray(array.dictionary.to_pylist(), dtype=object)
    codes = array.indices.to_numpy(zero_copy_only=False).astype(np.int64)
    used = labels[np.bincount(codes, minlength=len(labels)) > 0]
    if len(set(labels.tolist())) != len(labels) or any(not str(u).strip() for u in used):
        return None
    return codes, labels


def column_values(array: pa.Array) -> np.ndarray:
    """A numeric column as numpy: integers as they are, floats as float64, and a column
    with nulls as float64 with NaN there (as pandas reads it for the validator)."""
    values = array.to_numpy(zero_copy_only=False)
    if values.dtype.kind == "f":
        return np.asarray(values, dtype=np.float64)
    return values


def key_match(table: pa.Table, key: tuple[Any, Any] | None) -> np.ndarray | None:
    """Per row of a single-chunk table: does (subject, trial) equal ``key``, as pandas
    compares them? None when the screen does not compare such keys (mixed types, a trial
    beyond 2^53): the validator decides that seam."""
    if key is None or table.num_rows == 0:
        return np.zeros(table.num_rows, dtype=bool)
    subject, trial = key
    if isinstance(trial, bool) or not isinstance(trial, (int, float)) or abs(trial) >= EXACT_ID:
        return None
    array = column_array(table, "subject")
    if is_text(array.type) and isinstance(subject, str):
        if not pa.types.is_dictionary(array.type):
            array = array.dictionary_encode()
        hits = [i for i, v in enumerate(array.dictionary.to_pylist()) if v == subject]
        indices = pc.fill_null(array.indices, -1).to_numpy(zero_copy_only=False)
        same = np.isin(indices, hits)
    elif pa.types.is_integer(array.type) and type(subject) is int and abs(subject) < 2**63:
        same = array.to_numpy(zero_copy_only=False) == subject
    else:
        return None
    trials = column_array(table, "trial").to_numpy(zero_copy_only=False)
    return np.asarray(same, dtype=bool) & (trials == trial)


def lead_length(match: np.ndarray) -> int:
    """How many leading rows matched."""
    return int(np.argmin(match)) if not match.all() else len(match)


def continued_rows(
    path: str, key: tuple[Any, Any], kind: str | None
) -> tuple[list[pa.Table], bool] | None:
    """(the leading rows of a later part that continue ``key``, True if that is the whole
    part); None when the screen cannot read or compare them."""
    handle = open_part(path, kind)
    if handle is None:
        return None
    pieces = []
    try:
        for g in range(handle.num_row_groups):
            group = single_chunk(handle.read_row_group(g))
            match = key_match(group, key)
            if match is None:
                return None
            stop = lead_length(match)
            pieces.append(group.slice(0, stop))
            if stop < group.num_rows:
                return pieces, False
    except Exception:  # unreadable: that part's own check reports it
        return None
    return pieces, True


def batch_table(parts: Sequence[str], k: int, kind: str | None) -> pa.Table | None:
    """Part k's rows with its seams (module docstring) as one single-chunk table; None when
    the screen leaves the part to the validator (also when no row is left)."""
    handle = open_part(parts[k], kind)
    if handle is None:
        return None
    try:
        own = single_chunk(handle.read())
    except Exception:  # unreadable: the validator reports it
        return None
    match = key_match(own, edge_key(parts[k - 1], last=True) if k > 0 else None)
    if match is None or lead_length(match) == own.num_rows:
        return None
    own = own.slice(lead_length(match))
    pieces = [own]
    last = tuple(column_array(own, c)[own.num_rows - 1].as_py() for c in TRIAL_KEY)
    for j in range(k + 1, len(parts)):
        if edge_key(parts[j], last=False) != last:
            break
        found = continued_rows(parts[j], last, kind)
        if found is None:
            return None
        rows, whole = found
        if any(not r.schema.equals(own.schema) for r in rows):
            return None  # the parts differ in columns or types: the validator compares them
        pieces += rows
        if not whole:
            break
    return single_chunk(pa.concat_tables(pieces)) if len(pieces) > 1 else own
