"""``write_report``: build the content once and write it as HTML or Markdown (+ PNGs),
every file atomically."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from stopwise._io import write_atomic
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.report.content import build_content
from stopwise.report.html import render_html
from stopwise.report.markdown import figure_files, figure_folder_for, render_markdown

FORMATS = ("html", "md")


def write_report(
    out: str | os.PathLike[str],
    data: Any = None,
    results: Sequence[Any] = (),
    *,
    file_format: str = "html",
    title: str = "stopwise report",
    argv: Sequence[str] | None = None,
    call: str | None = None,
) -> Path:
    """Write the report of ``data`` (a file, frame or None) and ``results`` (result JSON
    paths or result objects) to ``out``; Markdown puts its PNG files in
    ``<out stem>_figures/``. ``argv``: the command line (recorded); ``call``: a description
    of the Python call for the record otherwise. Returns ``out``."""
    if file_format not in FORMATS:
        raise StopwiseInputError(f"format must be one of {', '.join(FORMATS)}, not {file_format!r}")
    if data is None and not results:
        raise StopwiseInputError("a report needs a data file, result JSON files, or both")
    if call is None and argv is None:
        call = f"stopwise.write_report({os.fspath(out)!r}, data={_short(data)}, results={[_short(r) for r in results]})"
    content = build_content(data, results, title=title, argv=argv, call=call)
    out = Path(out)
    if file_format == "html":
        write_atomic(out, render_html(content))
        return out
    folder = figure_folder_for(out)
    for name, png in figure_files(content).items():
        write_atomic(folder / name, png)
    write_atomic(out, render_markdown(content, folder.name))
    return out


def _short(value: Any) -> str:
    if value is None or isinstance(value, (str, os.PathLike)):
        return repr(None if value is None else os.fspath(value))
    return f"<{type(value).__name__}>"
