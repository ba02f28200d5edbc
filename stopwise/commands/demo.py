"""``stopwise demo [--out DIR] [--subjects N]``: the main job on the invented demo data."""

from __future__ import annotations

import argparse
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "demo",
        help="run the main job on the built-in demo data",
        description="Write the demo data set (an invented salvage-diving study generated "
        "by our own simulator) into DIR, validate and describe it, fit and compare solo, "
        "lottery and contest models, predict play under other bonus schemes and run a small "
        "hierarchical Bayesian fit with its diagnostics; tables and JSON results are written "
        "beside the data.",
    )
    parser.add_argument(
        "--out", metavar="DIR", default="demo_output", help="output folder (default: demo_output)"
    )
    parser.add_argument(
        "--subjects",
        metavar="N",
        type=int,
        default=120,
        help="number of invented participants (default: 120; at least 4)",
    )
    parser.set_defaults(func=run, output_folders=("out",))
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.data_schemas.errors import StopwiseInputError
    from stopwise.demo import run_demo

    if args.subjects < 4:
        raise StopwiseInputError(f"--subjects must be at least 4, got {args.subjects}")
    with quiet_library_warnings():
        run_demo(Path(args.out), n_subjects=args.subjects)
    return 0


@contextmanager
def quiet_library_warnings() -> Iterator[None]:
    """Hide FutureWarning and DeprecationWarning raised from other libraries' modules
    (deprecation banners are not the demo's business); stopwise's own warnings still show."""
    with warnings.catch_warnings():
        for category in (FutureWarning, DeprecationWarning):
            warnings.filterwarnings("ignore", category=category, module=r"^(?!stopwise)")
        yield
