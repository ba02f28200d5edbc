"""Read a data source (CSV, Parquet or DataFrame) into a raw DataFrame, untouched in meaning.

Line numbers: row ``i`` of the returned frame (its index label) sits on file line ``i + 2``
(header = line 1); blank lines are read as empty rows and then dropped, so the index keeps
counting them and line numbers stay exact. A DataFrame or Parquet row at position ``i`` is
reported as line ``i + 2``, the line it would have in a CSV with a header.
"""

from __future__ import annotations

import codecs
import os
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .checks_file import (
    first_undecodable_byte,
    line_at_offset,
    read_head,
    require_regular_file,
    unclosed_quote_line,
)
from .checks_structure import duplicate_column, header_fields, nested_cell
from .errors import StopwiseInputError

PARQUET_SUFFIXES = (".parquet", ".pq")
COMPRESSED_SUFFIXES = (".gz", ".bz2", ".zip", ".xz", ".zst")
SPREADSHEET_SUFFIXES = (".xlsx", ".xls", ".ods", ".json", ".feather", ".pkl", ".pickle")
_SNIFF_BYTES = 65536
_PARSER_LINE = re.compile(r"line (\d+)")


@dataclass(frozen=True)
class RawTable:
    """A read table (None when unreadable) and, if so, why: (problem kind, message, line),
    with the column concerned and the expectation when the message alone does not say."""

    frame: pd.DataFrame | None
    source: str
    failure: tuple[str, str, int | None] | None = None
    failure_column: str | None = None
    failure_expected: str | None = None


def source_name(source: object) -> str:
    if isinstance(source, pd.DataFrame):
        return "<DataFrame>"
    return str(source)


def read_table(source: str | os.PathLike[str] | pd.DataFrame) -> RawTable:
    """Read ``source``; the frame's index counts data rows from 0 (line = index + 2)."""
    if isinstance(source, pd.DataFrame):
        frame = source.reset_index(drop=True)
        return _checked_shape(frame, "<DataFrame>", list(frame.columns))
    if not isinstance(source, (str, os.PathLike)):
        raise StopwiseInputError(
            f"cannot read data from a {type(source).__name__}: expected a file path "
            "(CSV or Parquet) or a pandas DataFrame"
        )
    path = Path(source)
    name = str(source)
    require_regular_file(path, name)
    suffix = path.suffix.lower()
    head = read_head(path, name, _SNIFF_BYTES)
    if suffix in PARQUET_SUFFIXES or head.startswith(b"PAR1"):
        return _read_parquet(path, name)
    if suffix in SPREADSHEET_SUFFIXES:
        return RawTable(
            None, name, ("not_a_table", f"a {suffix} file; save the data as CSV or Parquet", None)
        )
    compressed = suffix in COMPRESSED_SUFFIXES
    if not compressed:
        if not head.strip():
            return RawTable(None, name, ("empty_file", "an empty file", None))
        why = _not_text(head)
        if why:
            line = _line_of_bad_byte(path) if "UTF-8" in why else None
            return RawTable(None, name, ("not_a_table", why, line))
    return _read_csv(path, name, head if not compressed else b"")


def _not_text(head: bytes) -> str:
    """Why these leading bytes are not a UTF-8 text table ('' when they look fine)."""
    if b"\x00" in head:
        return "binary data (NUL bytes)"
    try:
        codecs.getincrementaldecoder("utf-8")().decode(head, final=False)
    except UnicodeDecodeError as exc:
        return f"not UTF-8 text (undecodable byte at offset {exc.start})"
    text = head.decode("utf-8", errors="ignore")
    controls = sum(1 for ch in text if ord(ch) < 32 and ch not in "\r\n\t\f")
    if controls > max(2, len(text) // 100):
        return "binary data (control characters)"
    return ""


def _guess_separator(head: bytes) -> str:
    """',' unless the header line clearly uses ';' or a tab."""
    first = head.split(b"\n", 1)[0]
    counts = {",": first.count(b","), ";": first.count(b";"), "\t": first.count(b"\t")}
    best = max(counts, key=lambda k: counts[k])
    return best if counts[best] > counts[","] else ","


LABEL_COLUMNS = ("action", "outcome", "task", "choice")


def _header_names(head: bytes, sep: str) -> list[str]:
    first = head.split(b"\n", 1)[0].decode("utf-8", errors="ignore").lstrip("\ufeff")
    return [name.strip().strip('"') for name in first.rstrip("\r").split(sep)]


def _has_blank_lines(path: Path) -> bool:
    """True when the file holds an empty line (read in 16 MiB blocks)."""
    tail = b""
    with open(path, "rb") as fh:
        while block := fh.read(1 << 24):
            chunk = tail + block
            if b"\n\n" in chunk or b"\n\r\n" in chunk:
                return True
            tail = chunk[-2:]
    return False


def _read_csv(path: Path, name: str, head: bytes) -> RawTable:
    """Read with pandas' C parser. Blank lines are kept as empty rows (then dropped) only
    when the file has any, so that line numbers stay exact; label columns are read as
    categoricals, which is faster and smaller than text."""
    sep = _guess_separator(head) if head else ","
    options: dict = {"sep": sep}
    if not head or _has_blank_lines(path):
        options["skip_blank_lines"] = False
    if head.startswith(b"\xef\xbb\xbf") or not head:
        options["encoding"] = "utf-8-sig"
    labels = [c for c in _header_names(head, sep) if c in LABEL_COLUMNS] if head else []
    if labels:
        options["dtype"] = dict.fromkeys(labels, "category")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", pd.errors.DtypeWarning)
            frame = pd.read_csv(path, **options)
    except pd.errors.EmptyDataError:
        return RawTable(None, name, ("empty_file", "an empty file", None))
    except pd.errors.ParserError as exc:
        return _parser_failure(path, name, str(exc))
    except UnicodeDecodeError:
        found = first_undecodable_byte(path)
        if found is None:
            return RawTable(None, name, ("not_a_table", "not UTF-8 text", None))
        offset, byte = found
        why = f"not UTF-8 text (undecodable byte 0x{byte:02x} at offset {offset})"
        return RawTable(None, name, ("not_a_table", why, line_at_offset(path, offset)))
    except (ValueError, OSError) as exc:
        return RawTable(None, name, ("not_a_table", f"unreadable as CSV ({exc})", None))
    if options.get("skip_blank_lines") is False and len(frame.columns):
        frame = _drop_blank_rows(frame)
    names = header_fields(_first_line(head), sep) if head else _raw_header(path, sep)
    return _checked_shape(frame, name, names)


def _raw_header(path: Path, sep: str) -> list:
    """The header of a compressed CSV as written (pandas renames a repeated 'gain' to
    'gain.1' when it reads the table, so repeats are looked for here)."""
    return pd.read_csv(path, sep=sep, header=None, nrows=1, dtype=str).iloc[0].tolist()


def _first_line(head: bytes) -> str:
    return head.split(b"\n", 1)[0].decode("utf-8", errors="replace").rstrip("\r")


def _line_of_bad_byte(path: Path) -> int | None:
    found = first_undecodable_byte(path)
    return None if found is None else line_at_offset(path, found[0])


def _parser_failure(path: Path, name: str, text: str) -> RawTable:
    """The parser's complaint on the file's own line (it counts rows, not lines, when a
    quoted field is left open)."""
    if "EOF inside string" in text:
        line = unclosed_quote_line(path)
        what = "a closing quote for the quoted field that opens on this line"
        return RawTable(None, name, ("bad_row", what, line))
    match = _PARSER_LINE.search(text)
    line = int(match.group(1)) if match else None
    return RawTable(None, name, ("bad_row", _parser_message(text), line))


def _checked_shape(frame: pd.DataFrame, name: str, header: list) -> RawTable:
    """The frame with stripped column names, unless a name repeats (pandas would rename
    the second 'gain' to 'gain.1' and read it as a covariate) or a cell holds a list."""
    repeated = duplicate_column(header)
    if repeated is not None:
        found = (
            f"'{repeated.name}' again as column {repeated.again} (first as column {repeated.first})"
        )
        return RawTable(
            None,
            name,
            ("duplicate_column", found, 1),
            failure_column=repeated.name,
            failure_expected="each column name once (names are compared without the "
            "spaces around them)",
        )
    frame.columns = [str(c).strip() for c in frame.columns]
    nested = nested_cell(frame)
    if nested is not None:
        return RawTable(
            None,
            name,
            ("wrong_type", f"a {nested.type_name} of values", nested.row + 2),
            failure_column=nested.column,
            failure_expected="one value per cell (a number or a label, not a list)",
        )
    return RawTable(frame, name)


def _drop_blank_rows(frame: pd.DataFrame) -> pd.DataFrame:
    """Drop rows that are empty in every column (blank lines), keeping the index."""
    candidates = np.flatnonzero(frame.iloc[:, 0].isna().to_numpy())
    if len(candidates) == 0:
        return frame
    blank = frame.iloc[candidates].isna().all(axis=1).to_numpy()
    if not blank.any():
        return frame
    return frame.drop(index=frame.index[candidates[blank]])


def _parser_message(text: str) -> str:
    match = re.search(r"Expected (\d+) fields in line (\d+), saw (\d+)", text)
    if match:
        return f"{match.group(1)} fields as in the header (found {match.group(3)})"
    return f"a well-formed CSV row ({text.strip().splitlines()[-1]})"


def _read_parquet(path: Path, name: str) -> RawTable:
    try:
        frame = pd.read_parquet(path)
    except Exception as exc:  # pyarrow raises many types for corrupt files
        return RawTable(None, name, ("not_a_table", f"unreadable as Parquet ({exc})", None))
    frame = frame.reset_index(drop=True)
    return _checked_shape(frame, name, list(frame.columns))
