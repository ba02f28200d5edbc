"""``stopwise describe DATA [--json FILE]``: the descriptive summary table."""

from __future__ import annotations

import argparse
from typing import Any

from stopwise._io import write_json
from stopwise.commands import _args, _cluster


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "describe",
        help="summary table per condition with the risk-neutral benchmark",
        description="Per condition (p_survive, gain, task, prize, keep_bank; and per value "
        "of --by COLUMN): subjects, "
        "trials, draws attempted, final bank, bust rate, stop steps and the risk-neutral "
        "optimal target with its expected bank. Lottery data: choice shares per item and "
        "switching per subject.",
    )
    _args.add_data(parser)
    _args.add_json_file(parser, help_text="also write the tables as JSON to FILE ('-' for stdout)")
    _args.add_allow_censored(parser)
    parser.add_argument(
        "--by",
        default=None,
        metavar="COLUMN",
        help="also split every table by COLUMN: a covariate (e.g. treatment) or subject",
    )
    _cluster.add_cluster_options(parser)  # the parts of a Parquet folder, one task each
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.data_schemas.load import load
    from stopwise.data_schemas.partitioned import is_partitioned
    from stopwise.describe import describe

    data = args.data
    if is_partitioned(data):  # a folder or glob of Parquet files, one part at a time
        from stopwise.describe_parts import describe_parts

        description = describe_parts(
            data, args.by, args.allow_censored, **_cluster.cluster_kwargs(args)
        )
    else:
        description = describe(load(data, allow_censored=args.allow_censored), by=args.by)
    if args.json == "-":
        write_json("-", description.to_dict())
        return 0
    print(description)
    if args.json:
        write_json(args.json, description.to_dict())
    return 0
