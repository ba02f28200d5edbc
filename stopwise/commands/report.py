"""``stopwise report [DATA] [RESULT.json ...] --out report.html [--format html|md]``."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from stopwise.data_schemas.errors import StopwiseInputError


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "report",
        help="write one self-contained HTML (or Markdown) report of data and results",
        description="Write a report from a data file and/or result JSON files (from fit "
        "--json, compare --json, fit --by subject --json, sweep --out FILE.json): the data "
        "summary, each fit's table, the comparison, figures of stopping behaviour, lottery "
        "choices, subjects and contests against the fitted models, sweeps, warnings, and a reproducibility record (versions, seeds, this "
        "command, SHA-256 of each input, date, machine). HTML embeds its figures and "
        "fetches nothing; Markdown writes its PNG figures to OUT_STEM_figures/.",
    )
    parser.add_argument(
        "data",
        nargs="+",
        metavar="FILE",
        help="at most one data file (CSV or Parquet) and any number of result .json files",
    )
    parser.add_argument("--out", metavar="FILE", required=True, help="the report file to write")
    parser.add_argument(
        "--format",
        choices=("html", "md"),
        default=None,
        help="html (default; also from an .html ending) or md (Markdown)",
    )
    parser.add_argument("--title", default="stopwise report", help="the report's title")
    parser.set_defaults(func=run)
    return parser


def split_inputs(paths: list[str]) -> tuple[str | None, list[str]]:
    """(the data file or None, the result files): results end in .json."""
    results = [p for p in paths if Path(p).suffix.lower() == ".json"]
    data = [p for p in paths if Path(p).suffix.lower() != ".json"]
    if len(data) > 1:
        raise StopwiseInputError(
            f"report takes at most one data file; got {', '.join(data)} (results end in .json)"
        )
    return (data[0] if data else None), results


def report_format(out: str, chosen: str | None) -> str:
    if chosen is not None:
        return chosen
    return "md" if Path(out).suffix.lower() in (".md", ".markdown") else "html"


def run(args: argparse.Namespace) -> int:
    from stopwise.report.markdown import figure_folder_for
    from stopwise.report.write import write_report

    data, results = split_inputs(args.data)
    file_format = report_format(args.out, args.format)
    folder = figure_folder_for(Path(args.out))
    if file_format == "md" and folder.exists() and not folder.is_dir():
        raise StopwiseInputError(
            f"{folder} exists and is not a folder (the report's figures go there)"
        )
    out = write_report(
        args.out, data, results, file_format=file_format, title=args.title, argv=args.argv
    )
    print(f"wrote {out}")
    return 0
