"""``stopwise validate DATA [--json]``: check a data file and list every problem.

Exit 0 with a one-screen summary when the data are clean; exit 2 with the problem list on
stderr when not. ``--json`` prints the report as JSON on stdout instead.
"""

from __future__ import annotations

import argparse
import sys
from functools import partial
from typing import Any

from stopwise._io import write_json
from stopwise.commands import _args, _cluster


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "validate",
        help="check a data file and list every problem",
        description="Check stopping data (decision or trial level) or lottery-choice data "
        "and report every problem at once, each with file, line, column, the value found "
        "and what was expected. Exit code 0 when clean, 2 when not.",
    )
    _args.add_data(parser)
    parser.add_argument("--json", action="store_true", help="print the report as JSON on stdout")
    _args.add_allow_censored(parser)
    parser.add_argument(
        "--kind",
        choices=("stopping", "lottery", "decisions", "trials"),
        default=None,
        help="the data format (default: told from the columns)",
    )
    parser.add_argument(
        "--max-per-kind",
        type=int,
        default=20,
        metavar="N",
        help="list at most N problems of each kind (all are counted)",
    )
    _cluster.add_cluster_options(parser)
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.data_schemas.partitioned import is_partitioned
    from stopwise.data_schemas.validate import validate

    check = validate
    if is_partitioned(args.data):  # a folder or glob of Parquet files, part by part
        from stopwise.validate_parts import validate_parts

        check = partial(validate_parts, **_cluster.cluster_kwargs(args))
    report = check(
        args.data,
        kind=args.kind,
        allow_censored=args.allow_censored,
        max_per_kind=args.max_per_kind,
    )
    if args.json:
        write_json("-", report.to_dict())
    elif report.ok:
        print(report.summary())
    else:
        print(report.format(), file=sys.stderr)
    return 0 if report.ok else 2
