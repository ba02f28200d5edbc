"""``stopwise simulate``: draw an invented data set from a model.

Stopping models: N subjects x T trials; trial t uses the (t mod k)-th value of the
comma-separated ``--p-survive`` and ``--gain`` lists. Contest models: the same trials played
in groups of ``--players`` subjects for ``--prize`` (``--keep-bank``: players keep their own
bank on top). Lottery models: each subject answers the ten rows of the price list with the
payoffs of Holt & Laury (2002): A = 2.00 / 1.60, B = 3.85 / 0.10, the high payoff with
chance row/10 (``--trials`` at most 10: the first T rows). Subjects may differ: a
``--params`` table, covariates and effects (stopwise/commands/_population.py).
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from stopwise._io import write_table
from stopwise.commands import _args, _options, _population
from stopwise.data_schemas.errors import StopwiseInputError

PRICE_LIST_PAYOFFS = {"a_high": 2.00, "a_low": 1.60, "b_high": 3.85, "b_low": 0.10}
PRICE_LIST_ROWS = 10
OUTPUT_SUFFIXES = (".csv", ".parquet", ".pq")
DEFAULT_SUBJECTS = 20
DEFAULT_TRIALS = 30


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "simulate",
        help="simulate decisions from a model (invented participants)",
        description="Simulate decision-level stopping data, contest play or lottery choices "
        "from a model spec with the parameter values given by --set (or per subject by "
        "--params, --covariate and --effect); parameters not set take the model's start "
        "values. Output: CSV or Parquet (by the file ending).",
    )
    _args.add_model_and_values(parser, "a parameter value, e.g. --set r=0.4 (repeatable)")
    parser.add_argument(
        "--params",
        default=None,
        metavar="FILE",
        help="CSV with one row per subject: a subject column and parameter columns (values "
        "for parameters it lacks come from --set); the subjects simulated are its rows",
    )
    parser.add_argument(
        "--covariate",
        action="append",
        default=[],
        metavar="NAME=V1,V2",
        help="a covariate column with the values given, assigned to subjects in turn over "
        "the combinations of all covariates (repeatable)",
    )
    parser.add_argument(
        "--effect",
        action="append",
        default=[],
        metavar="PARAM:COVARIATE=B",
        help="PARAM = its value + B x COVARIATE, on PARAM's natural scale, e.g. "
        "--effect r:treatment=0.1 (repeatable)",
    )
    _options.add_option(parser)
    parser.add_argument(
        "--subjects", type=int, default=None, metavar="N", help=f"default {DEFAULT_SUBJECTS}"
    )
    parser.add_argument(
        "--trials",
        type=int,
        default=None,
        metavar="T",
        help=f"default {DEFAULT_TRIALS}; lottery models: the first T of the {PRICE_LIST_ROWS} "
        f"price-list rows (default {PRICE_LIST_ROWS})",
    )
    parser.add_argument(
        "--p-survive", default="0.8,0.9", metavar="P[,P...]", help="default 0.8,0.9"
    )
    parser.add_argument("--gain", default="1", metavar="G[,G...]", help="default 1")
    parser.add_argument("--start", type=float, default=0.0, help="bank at step 0 (default 0)")
    parser.add_argument(
        "--bust-keep", type=float, default=0.0, help="share of the bank kept on a bust"
    )
    parser.add_argument(
        "--pool",
        default=None,
        metavar="N:B",
        help="solo models: draw without replacement from N items of which B are bad "
        "(replaces --p-survive)",
    )
    parser.add_argument(
        "--odds-unknown",
        action="store_true",
        help="solo models: odds_known = 0 on every trial (the participant is not told "
        "--p-survive; simulate learners with a 'learn' model)",
    )
    parser.add_argument(
        "--players", type=int, default=2, metavar="N", help="contest models: group size (default 2)"
    )
    parser.add_argument(
        "--prize", type=float, default=10.0, metavar="X", help="contest models: prize (default 10)"
    )
    parser.add_argument(
        "--keep-bank",
        action="store_true",
        help="contest models: players keep their own bank on top of the prize",
    )
    parser.add_argument(
        "--sequential",
        action="store_true",
        help="contest models: players move one after another (order 1..N in each group), "
        "each seeing the best bank already banked (columns order, rival_bank)",
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
    subjects: list[Any],
    trials: int,
    p_survive: list[float],
    gain: list[float],
    start: float,
    bust_keep: float,
) -> pd.DataFrame:
    """One row per (subject, trial); trial t uses p_survive[t mod k] and gain[t mod m]."""
    trial = np.tile(np.arange(1, trials + 1), len(subjects))
    return pd.DataFrame(
        {
            "subject": np.repeat(np.asarray(subjects, dtype=object), trials),
            "trial": trial,
            "p_survive": np.asarray(p_survive)[(trial - 1) % len(p_survive)],
            "gain": np.asarray(gain)[(trial - 1) % len(gain)],
            "start": start,
            "bust_keep": bust_keep,
        }
    )


def contest_design(
    base: pd.DataFrame, players: int, prize: float, keep_bank: bool, sequential: bool = False
) -> pd.DataFrame:
    """The stopping design played as contests: in each trial, subjects 1..n form group 1,
    n+1..2n group 2, ... (group ids "t<trial>-g<k>"); every row carries the contest fields;
    ``sequential``: the group's subjects move in that order (an ``order`` column)."""
    n_subjects = base["subject"].nunique()
    position = base.groupby("trial", sort=False).cumcount().to_numpy()
    design = base.copy()
    design["task"] = "contest"
    design["group"] = [f"t{t}-g{p // players + 1}" for t, p in zip(design["trial"], position)]
    design["n_players"] = players
    design["prize"] = prize
    design["keep_bank"] = int(keep_bank)
    if sequential:
        design["order"] = position % players + 1
    if n_subjects % players:
        raise StopwiseInputError(
            f"--subjects {n_subjects} cannot be split into groups of --players {players}; "
            "give a multiple of the group size"
        )
    return design


def price_list_design(subjects: list[Any], choices: int) -> pd.DataFrame:
    """Each subject answers the first ``choices`` of the ten price-list rows, once each."""
    if not 1 <= choices <= PRICE_LIST_ROWS:
        raise StopwiseInputError(
            f"--trials {choices}: the price list has {PRICE_LIST_ROWS} rows and each subject "
            f"answers each row once; give --trials between 1 and {PRICE_LIST_ROWS}"
        )
    item = np.tile(np.arange(1, choices + 1), len(subjects))
    chance = item / 10.0
    pay = PRICE_LIST_PAYOFFS
    return pd.DataFrame(
        {
            "subject": np.repeat(np.asarray(subjects, dtype=object), choices),
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


def check_output_path(path: str) -> None:
    """Only the documented formats: a CSV or Parquet file, told by its ending."""
    if Path(path).suffix.lower() not in OUTPUT_SUFFIXES:
        raise StopwiseInputError(
            f"--out {path}: expected a file ending in .csv or .parquet (the format is told "
            "from the ending)"
        )


def check_parameters(model: Any, given: dict[str, float]) -> None:
    unknown = [n for n in given if n not in model.param_names]
    if unknown:
        raise StopwiseInputError(
            f"unknown parameter(s) {', '.join(unknown)} for model {model.name}; its parameters "
            f"are {', '.join(model.param_names) or 'none'}"
        )


def subject_ids(args: argparse.Namespace, per_subject: pd.DataFrame | None) -> list[Any]:
    """1..N, or the subjects of the --params file (then --subjects, if given, must agree)."""
    if per_subject is None:
        n = DEFAULT_SUBJECTS if args.subjects is None else args.subjects
        if n < 1:
            raise StopwiseInputError("--subjects must be at least 1")
        return list(range(1, n + 1))
    ids = per_subject["subject"].tolist()
    if args.subjects is not None and args.subjects != len(ids):
        raise StopwiseInputError(
            f"--subjects {args.subjects} disagrees with the {len(ids)} rows of --params "
            f"{args.params}; leave --subjects out"
        )
    return ids


def with_task_variant(design: pd.DataFrame, pool: str | None, unknown: bool) -> pd.DataFrame:
    """Add pool_size/pool_bad (``--pool N:B``) and odds_known = 0 (``--odds-unknown``)."""
    design = design.copy()
    if pool is not None:
        size, _, bad = pool.partition(":")
        try:
            n_items, n_bad = int(size), int(bad)
        except ValueError:
            n_items = n_bad = 0
        if not 1 <= n_bad < n_items:
            raise StopwiseInputError(
                f"--pool: expected N:B with whole numbers 1 <= B < N (e.g. 20:3), got {pool!r}"
            )
        design["pool_size"], design["pool_bad"] = n_items, n_bad
        design["p_survive"] = (n_items - n_bad) / n_items
    if unknown:
        design["odds_known"] = 0
    return design


def make_design(model: Any, args: argparse.Namespace, subjects: list[Any]) -> pd.DataFrame:
    """The per-trial (per-item) design for the model's kind of data."""
    if model.data_kind == "lottery":
        return price_list_design(subjects, PRICE_LIST_ROWS if args.trials is None else args.trials)
    trials = DEFAULT_TRIALS if args.trials is None else args.trials
    if trials < 1:
        raise StopwiseInputError("--trials must be at least 1")
    design = stopping_design(
        subjects,
        trials,
        parse_list(args.p_survive, "--p-survive"),
        parse_list(args.gain, "--gain"),
        args.start,
        args.bust_keep,
    )
    if model.data_kind != "contest":
        if args.sequential:
            raise StopwiseInputError("--sequential is for contest models (e.g. crra+qre)")
        return with_task_variant(design, args.pool, args.odds_unknown)
    if args.pool is not None or args.odds_unknown:
        raise StopwiseInputError("--pool and --odds-unknown are for solo models only")
    if args.players < 2 or not math.isfinite(args.prize) or args.prize <= 0:
        raise StopwiseInputError("contests need --players of at least 2 and a positive --prize")
    return contest_design(design, args.players, args.prize, args.keep_bank, args.sequential)


def population(
    model: Any, args: argparse.Namespace, given: dict[str, float]
) -> tuple[list[Any], pd.DataFrame | None, pd.DataFrame, list[str]]:
    """(subjects, per-subject parameter table or None when everyone shares ``given``,
    covariate table, parameters given by the --params file)."""
    covariates = _population.parse_covariates(args.covariate)
    effects = _population.parse_effects(args.effect)
    _population.check_effects(effects, model.param_names, covariates)
    per_subject = (
        _population.read_params_file(args.params, model.param_names) if args.params else None
    )
    subjects = subject_ids(args, per_subject)
    table = _population.covariate_table(subjects, covariates)
    from_file = [] if per_subject is None else [c for c in per_subject.columns if c != "subject"]
    if per_subject is None and not effects:
        return subjects, None, table, from_file
    if model.data_kind == "contest":
        raise StopwiseInputError(
            "contest play is simulated with parameters common to all players (an "
            "equilibrium of one game); --params and --effect apply to solo and lottery models"
        )
    base = {**model.start_theta(), **given}
    params = _population.subject_parameters(subjects, base, per_subject, table, effects)
    return subjects, params, table, from_file


def run(args: argparse.Namespace) -> int:
    from stopwise.models.simulation import check_simulation_size, simulate

    check_output_path(args.out)
    check_simulation_size(
        (DEFAULT_SUBJECTS if args.subjects is None else max(args.subjects, 1))
        * (DEFAULT_TRIALS if args.trials is None else max(args.trials, 1))
    )
    model = _options.cli_model(args.model, args.max_target, args.options)
    given = parse_assignments(args.assignments)
    check_parameters(model, given)
    subjects, params, covariates, from_file = population(model, args, given)
    design = make_design(model, args, subjects)
    missing = [n for n in model.param_names if n not in given and n not in from_file]
    if missing:
        starts = ", ".join(f"{n}={model.spec(n).start:g}" for n in missing)
        print(f"note: not set, using start values: {starts}", file=sys.stderr)
    design = design.merge(covariates, on="subject", how="left", validate="many_to_one")
    theta: Any = {**model.start_theta(), **given} if params is None else params
    frame = simulate(model, theta, design, seed=args.seed)
    write_table(args.out, frame)
    print(f"wrote {len(frame)} rows ({len(subjects)} subjects, model {model.name}) to {args.out}")
    return 0
