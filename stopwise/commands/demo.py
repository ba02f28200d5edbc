"""``stopwise demo [--out DIR]``: write, validate and describe the invented demo data."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "demo",
        help="run the main job on the built-in demo data",
        description="Write the demo data set (an invented salvage-diving study generated "
        "by our own simulator) into DIR, validate it and print the descriptive summary.",
    )
    parser.add_argument(
        "--out", metavar="DIR", default="demo_output", help="output folder (default: demo_output)"
    )
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.demo import run_demo

    run_demo(Path(args.out))
    return 0
