"""``stopwise simulate``: draw an invented data set from a model.

Stopping models: N subjects x T trials; trial t uses the (t mod k)-th value of the
comma-separated ``--p-survive`` and ``--gain`` lists. Lottery models: each subject makes T
choices cycling through the ten rows of the price list with the payoffs of Holt & Laury
(2002): A = 2.00 / 1.60, B = 3.85 / 0.10, the high payoff with chance row/10.
"""

from __future__ import annotations

import argparse
import math
import sys
from typing import Any

import numpy as np
import pandas as pd

from stopwise._io import write_table
from stopwise.commands import _args
from stopwise.data_schemas.errors import StopwiseInputError

PRICE_LIST_PAYOFFS = {"a_high": 2.00, "a_low": 1.60, "b_high": 3.85, "b_low": 0.10}


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "simulate",
        help="simulate decisions from a model (invented participants)",
        description="Simulate decision-level stopping data (or lottery choices) from a model "
        "spec with the parameter values given by --set; parameters not set take the model's "
        "start values. Output: CSV or Parquet (by the file ending).",
    )
    parser.add_argument("--model", required=True, metavar="SPEC", help="e.g. crra+planner+logit")
    parser.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        dest="assignments",
        help="a parameter value, e.g. --set r=0.4 (repeatable)",
    )
    parser.add_argument("--subjects", type=int, default=20, metavar="N", help="default 20")
    parser.add_argument("--trials", type=int, default=30, metavar="T", help="default 30")
    parser.add_argument(
        "--p-survive", default="0.8,0.9", metavar="P[,P...]", help="default 0.8,0.9"
    )
    parser.add_argument("--gain", default="1", metavar="G[,G...]", help="default 1")
    parser.add_argument("--start", type=float, default=0.0, help="bank at step 0 (default 0)")
    parser.add_argument(
        "--bust-keep", type=float, default=0.0, help="share of the bank kept on a bust"
    )
    _args.add_max_target(
        parser, "a task cap on the number of draws (default: none; see the model docs)"
    )
    _args.add_seed(parser, "default 0")
    parser.add_argument("--out", required=True, metavar="FILE", help=".csv or .parquet")
    parser.set_defaults(func=run)
    return parser


def parse_assignments(items: list[str]) -> dict[str, float]:
    """['r=0.4', 'precision=2'] -> {'r': 0.4, 'precision': 2.0} (float parsing only)."""
    values: dict[str, float] = {}
    for item in items:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name:
            raise StopwiseInputError(f"--set {item!r}: expected NAME=VALUE, e.g. --set r=0.4")
        try:
            value = float(text)
        except ValueError:
            raise StopwiseInputError(f"--set {item!r}: {text!r} is not a number") from None
        if not math.isfinite(value):
            raise StopwiseInputError(f"--set {item!r}: the value must be finite")
        values[name] = value
    return values


def parse_list(text: str, option: str) -> list[float]:
    """'0.8,0.9' -> [0.8, 0.9]."""
    try:
        values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise StopwiseInputError(
            f"{option} {text!r}: expected numbers separated by commas"
        ) from None
    if not values:
        raise StopwiseInputError(f"{option}: give at least one value")
    return values


def stopping_design(
    subjects: int,
    trials: int,
    p_survive: list[float],
    gain: list[float],
    start: float,
    bust_keep: float,
) -> pd.DataFrame:
    """One row per (subject, trial); trial t uses p_survive[t mod k] and gain[t mod m]."""
    trial = np.tile(np.arange(1, trials + 1), subjects)
    return pd.DataFrame(
        {
            "subject": np.repeat(np.arange(1, subjects + 1), trials),
            "trial": trial,
            "p_survive": np.asarray(p_survive)[(trial - 1) % len(p_survive)],
            "gain": np.asarray(gain)[(trial - 1) % len(gain)],
            "start": start,
            "bust_keep": bust_keep,
        }
    )


def price_list_design(subjects: int, choices: int) -> pd.DataFrame:
    """Each subject makes ``choices`` choices cycling through the ten price-list rows."""
    item = np.tile(np.arange(1, choices + 1), subjects)
    chance = ((item - 1) % 10 + 1) / 10.0
    pay = PRICE_LIST_PAYOFFS
    return pd.DataFrame(
        {
            "subject": np.repeat(np.arange(1, subjects + 1), choices),
            "item": item,
            "a_x1": pay["a_high"],
            "a_p1": chance,
            "a_x2": pay["a_low"],
            "a_p2": 1 - chance,
            "b_x1": pay["b_high"],
            "b_p1": chance,
            "b_x2": pay["b_low"],
            "b_p2": 1 - chance,
        }
    )


def run(args: argparse.Namespace) -> int:
    from stopwise.models.simulate import check_simulation_size, simulate
    from stopwise.models.spec import build_model

    if args.subjects < 1 or args.trials < 1:
        raise StopwiseInputError("--subjects and --trials must be at least 1")
    check_simulation_size(args.subjects * args.trials)
    options = {} if args.max_target is None else {"max_target": args.max_target}
    model = build_model(args.model, **options)
    given = parse_assignments(args.assignments)
    unknown = [n for n in given if n not in model.param_names]
    if unknown:
        raise StopwiseInputError(
            f"unknown parameter(s) {', '.join(unknown)} for model {model.name}; its parameters "
            f"are {', '.join(model.param_names) or 'none'}"
        )
    if model.data_kind not in ("stopping", "lottery"):
        raise StopwiseInputError(
            f"model {model.name} is a contest model; the simulate command draws solo stopping "
            "or lottery data (contest play: use `stopwise equilibrium`)"
        )
    missing = [n for n in model.param_names if n not in given]
    if missing:
        starts = ", ".join(f"{n}={model.spec(n).start:g}" for n in missing)
        print(f"note: not set, using start values: {starts}", file=sys.stderr)
    theta = {**model.start_theta(), **given}
    if model.data_kind == "stopping":
        design = stopping_design(
            args.subjects,
            args.trials,
            parse_list(args.p_survive, "--p-survive"),
            parse_list(args.gain, "--gain"),
            args.start,
            args.bust_keep,
        )
    else:
        design = price_list_design(args.subjects, args.trials)
    frame = simulate(model, theta, design, seed=args.seed)
    write_table(args.out, frame)
    print(f"wrote {len(frame)} rows ({args.subjects} subjects, model {model.name}) to {args.out}")
    return 0
