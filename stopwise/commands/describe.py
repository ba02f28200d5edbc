"""``stopwise describe DATA [--json FILE]``: the descriptive summary table."""

from __future__ import annotations

import argparse
from typing import Any

from stopwise._io import write_json


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "describe",
        help="summary table per condition with the risk-neutral benchmark",
        description="Per condition (p_survive, gain, task, prize, keep_bank): subjects, "
        "trials, draws attempted, final bank, bust rate, stop steps and the risk-neutral "
        "optimal target with its expected bank. Lottery data: choice shares per item and "
        "switching per subject.",
    )
    parser.add_argument("data", metavar="DATA", help="CSV or Parquet file")
    parser.add_argument(
        "--json",
        metavar="FILE",
        default=None,
        help="also write the tables as JSON to FILE ('-' for stdout)",
    )
    parser.add_argument(
        "--allow-censored",
        action="store_true",
        help="accept trials that end without a stop or a bust (censored)",
    )
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.data_schemas.load import load
    from stopwise.describe import describe

    description = describe(load(args.data, allow_censored=args.allow_censored))
    if args.json == "-":
        write_json("-", description.to_dict())
        return 0
    print(description)
    if args.json:
        write_json(args.json, description.to_dict())
    return 0
