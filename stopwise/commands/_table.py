"""``--table FILE.tex|.md|.csv`` of fit and compare: the paper table (estimation/tables.py)."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from stopwise._io import write_atomic
from stopwise.data_schemas.errors import StopwiseInputError

# The endings estimation/tables.py renders (tests/test_paper_tables.py checks they agree);
# kept here so that building the command-line parser imports no estimation module.
TABLE_SUFFIXES = (".tex", ".md", ".csv")


def add_table_option(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--table",
        metavar="FILE",
        default=None,
        help="also write a paper table (estimates with SEs, n, log-likelihood, AIC, BIC; "
        "models side by side) as LaTeX (.tex), Markdown (.md) or CSV (.csv)",
    )
    parser.add_argument(
        "--table-interval",
        choices=("se", "ci"),
        default="se",
        help="beneath each estimate: its standard error (se, default) or 95%% interval (ci)",
    )


def check_table_path(path: str | None) -> None:
    """Refuse an unknown ending before anything is computed."""
    if path is not None and Path(path).suffix.lower() not in TABLE_SUFFIXES:
        raise StopwiseInputError(
            f"--table {path}: expected a file ending in {', '.join(TABLE_SUFFIXES)}"
        )


def table_fits(result: Any) -> list[Any]:
    """The fits a result puts side by side: a comparison's fits, else the result itself."""
    if getattr(result, "by", None) == "subject" or hasattr(result, "flags"):
        raise StopwiseInputError(
            "--table: per-subject fits have one row per subject; use --json (or the "
            "per-subject figure of `stopwise report`) instead"
        )
    fits = getattr(result, "fits", None)
    return list(fits) if isinstance(fits, list) and fits else [result]


def write_paper_table(path: str | None, result: Any, interval: str = "se") -> None:
    if path is None:
        return
    from stopwise.estimation.tables import render_table  # lazy: start-up of light commands

    write_atomic(path, render_table(table_fits(result), Path(path).suffix, interval))
