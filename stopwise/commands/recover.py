"""``stopwise recover --model SPEC --set NAME=VALUE ...``: parameter recovery.

Simulate ``--reps`` data sets from the model at the values given (a design of ``--subjects``
x ``--trials`` trials cycling through ``--p-survive`` in a shuffled order per subject; lottery
models: the ten-row price list of ``stopwise simulate``), refit each and report per parameter
bias = mean(estimate) - truth, RMSE, the share of 95% intervals that cover the truth, the
correlation of estimates across replications and the parameters this design identifies
poorly (stopwise.estimation.ml.recovery). ``--rival SPEC`` also reports how often AIC prefers
the generating model.
"""

from __future__ import annotations

import argparse
import sys
from typing import Any

from stopwise.commands import _args, _cluster, _options
from stopwise.commands.fit import emit
from stopwise.commands.simulate import (
    PRICE_LIST_ROWS,
    check_parameters,
    parse_assignments,
    parse_list,
    price_list_design,
)
from stopwise.data_schemas.errors import StopwiseInputError


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "recover",
        help="parameter recovery: simulate from known values, refit, compare",
        description="Check that a design can recover a model's parameters: simulate "
        "--reps data sets at the --set values, refit each by maximum likelihood and report "
        "bias, RMSE, 95% interval coverage, the correlation of the estimates and any "
        "parameter this design identifies poorly.",
    )
    _args.add_model_and_values(
        parser, "a true parameter value, e.g. --set r=0.4 (repeatable; others: start values)"
    )
    _options.add_option(parser)
    parser.add_argument(
        "--reps", type=int, default=20, metavar="R", help="replications (default 20)"
    )
    parser.add_argument("--subjects", type=int, default=40, metavar="N", help="default 40")
    parser.add_argument(
        "--trials",
        type=int,
        default=30,
        metavar="T",
        help=f"trials per subject (default 30; lottery models answer the {PRICE_LIST_ROWS} "
        "price-list rows)",
    )
    parser.add_argument(
        "--p-survive", default="0.7,0.8,0.9", metavar="P[,P...]", help="default 0.7,0.8,0.9"
    )
    parser.add_argument("--gain", type=float, default=1.0, metavar="G", help="default 1")
    parser.add_argument(
        "--rival",
        action="append",
        default=[],
        metavar="SPEC",
        help="also fit this model to every replication and report how often AIC picks the "
        "generating model (repeatable)",
    )
    parser.add_argument(
        "--starts", type=int, default=1, metavar="N", help="optimiser starts per refit (default 1)"
    )
    _args.add_max_target(parser, _args.FIT_CAP_HELP)
    _args.add_seed(parser, "random seed (design, simulation, starts)")
    _cluster.add_cluster_options(parser)
    parser.add_argument("--no-progress", action="store_true", help="hide the progress bar")
    _args.add_json_file(parser, "the recovery table")
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.api import recover

    if args.reps < 2 or args.subjects < 1 or args.trials < 1 or args.starts < 1:
        raise StopwiseInputError("--reps must be at least 2; --subjects, --trials, --starts >= 1")
    model = _options.cli_model(args.model, args.max_target, args.options)
    if model.data_kind == "contest":
        raise StopwiseInputError(
            f"model {model.name} is a contest model; recover checks solo stopping and "
            "lottery models"
        )
    given = parse_assignments(args.assignments)
    check_parameters(model, given)
    missing = [n for n in model.param_names if n not in given]
    if missing:
        starts = ", ".join(f"{n}={model.spec(n).start:g}" for n in missing)
        print(f"note: not set, using start values as the truth: {starts}", file=sys.stderr)
    truth = {**model.start_theta(), **given}
    rivals = [_options.cli_model(r, args.max_target, args.options) for r in args.rival]
    design = None
    if model.data_kind == "lottery":
        design = price_list_design(list(range(1, args.subjects + 1)), PRICE_LIST_ROWS)
    result = recover(
        model,
        truth,
        design,
        n_reps=args.reps,
        subjects=args.subjects,
        trials=args.trials,
        p_survive=parse_list(args.p_survive, "--p-survive"),
        gain=args.gain,
        seed=args.seed,
        starts=args.starts,
        rivals=rivals,
        progress=not args.no_progress,
        **_cluster.cluster_kwargs(args),
    )
    emit(result, args.json)
    if not result.run.complete:
        print(
            "error: not every replication ran: " + result.run.summary_line("replications"),
            file=sys.stderr,
        )
        return 1
    return 0
