"""``--workers N`` and ``--scheduler ADDRESS`` for commands that run a study of independent
tasks (stopwise.estimation.distributed decides where they run)."""

from __future__ import annotations

import argparse
from typing import Any

# The environment variable naming an existing cluster; equal to
# stopwise.estimation.distributed.SCHEDULER_ENV (tests/test_startup.py checks it). Written here
# so that the light commands (validate, describe) do not import the estimation package.
SCHEDULER_ENV = "STOPWISE_SCHEDULER"


def non_negative_int(text: str) -> int:
    """argparse type: a whole number >= 0."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 0, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 0, got {value}")
    return value


def add_cluster_options(parser: argparse.ArgumentParser) -> None:
    """``--workers N`` and ``--scheduler ADDRESS``."""
    parser.add_argument(
        "--workers",
        type=non_negative_int,
        default=None,
        metavar="N",
        help="run the tasks on a Dask LocalCluster of N worker processes on 127.0.0.1; 0 runs "
        "them in-process (default: a cluster sized to the machine for studies of 16 tasks "
        "or more once the tasks run in-process show 20 s of work or more left, else "
        f"in-process; ${SCHEDULER_ENV} names an existing cluster instead)",
    )
    parser.add_argument(
        "--scheduler",
        default=None,
        metavar="ADDRESS",
        help=f"run the tasks on an existing Dask cluster, e.g. tcp://scheduler.example.org:8786 (overrides "
        f"--workers and ${SCHEDULER_ENV})",
    )


def cluster_kwargs(args: argparse.Namespace) -> dict[str, Any]:
    """The engine keywords for the parsed options."""
    return {"workers": args.workers, "scheduler": args.scheduler}
