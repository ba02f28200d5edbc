"""Checks on a data file as a file: what kind of file it is, whether it can be read, and
where (on which line of the file) a byte or a quote breaks it.

These run before or after the CSV parser: the parser reports positions in its own terms
("row 9", "position 141703"), and the researcher needs the line of the file (header =
line 1), which these helpers find by reading the file in blocks.
"""

from __future__ import annotations

import codecs
import os
import re
import stat
from pathlib import Path

from .errors import StopwiseInputError

_BLOCK = 1 << 20
_QUOTES = re.compile(rb'"')

_KIND_OF_MODE = (
    (stat.S_ISFIFO, "a named pipe"),
    (stat.S_ISCHR, "a character device"),
    (stat.S_ISBLK, "a block device"),
    (stat.S_ISSOCK, "a socket"),
)


def require_regular_file(path: Path, name: str) -> None:
    """Refuse, without opening it, anything but an existing regular file (a named pipe
    would block the reader forever; a device could be endless)."""
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise StopwiseInputError(f"{name}: no such file") from None
    except OSError as exc:
        raise StopwiseInputError(f"{name}: cannot be read ({exc.strerror or exc})") from None
    if stat.S_ISDIR(mode):
        raise StopwiseInputError(f"{name}: is a folder; expected a CSV or Parquet file")
    if not stat.S_ISREG(mode):
        kind = next((what for test, what in _KIND_OF_MODE if test(mode)), "not a regular file")
        raise StopwiseInputError(
            f"{name}: is {kind}; expected a regular CSV or Parquet file (save the data to a "
            "file first)"
        )


def read_head(path: Path, name: str, size: int) -> bytes:
    """The first ``size`` bytes; an unreadable file (permissions, I/O error) is bad input."""
    try:
        with open(path, "rb") as fh:
            return fh.read(size)
    except OSError as exc:
        raise StopwiseInputError(
            f"{name}: cannot be read ({exc.strerror or exc}); expected a file you may read"
        ) from None


def line_at_offset(path: Path, offset: int) -> int:
    """The file line (1-based) holding byte ``offset``: 1 + newlines before it."""
    newlines = 0
    done = 0
    with open(path, "rb") as fh:
        while done < offset and (block := fh.read(min(_BLOCK, offset - done))):
            newlines += block.count(b"\n")
            done += len(block)
    return newlines + 1


def first_undecodable_byte(path: Path) -> tuple[int, int] | None:
    """(offset, byte value) of the first byte that is not valid UTF-8, or None."""
    decoder = codecs.getincrementaldecoder("utf-8")()
    done = 0
    with open(path, "rb") as fh:
        while True:
            block = fh.read(_BLOCK)
            final = not block
            try:
                decoder.decode(block, final=final)
            except UnicodeDecodeError as exc:
                # the decoder may hold up to 3 bytes of an unfinished character from before
                pending = len(exc.object) - len(block)
                offset = done - pending + exc.start
                return offset, exc.object[exc.start]
            if final:
                return None
            done += len(block)


def unclosed_quote_line(path: Path) -> int | None:
    """The line on which a double-quoted field opens and never closes, or None.

    A CSV quote toggles the quoted state (a doubled quote inside a field toggles twice), so
    the state at the end of the file is open exactly when the last opening quote has no
    partner; its line is 1 + the newlines before it.
    """
    inside = False
    opened_line = 0
    line = 1
    with open(path, "rb") as fh:
        while block := fh.read(_BLOCK):
            position = 0
            for match in _QUOTES.finditer(block):
                line += block.count(b"\n", position, match.start())
                position = match.start()
                inside = not inside
                if inside:
                    opened_line = line
            line += block.count(b"\n", position)
    return opened_line if inside else None
