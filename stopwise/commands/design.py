"""``stopwise design --model SPEC --set NAME=VALUE ...``: precision of a study before data.

Prints the expected standard errors (pooled over ``--subjects`` participants and for one
participant), their correlation and the checks; ``--range`` averages over a parameter's
range, ``--versus`` adds the discrimination of a rival model (and, for a nested rival, the
LR test's sample size), ``--optimise p_survive`` the best sets of ``--choose`` survival
chances among ``--candidates``, ``--optimise conditions`` chances, gains
(``--gain-candidates``) and trial splits (``--allocation-step``) together. ``--gain`` and
``--allocation`` give one gain and one trial count per chance; contest models play
``--players``/``--prize``/``--keep-bank``. ``--json`` writes the result, ``--figure`` a PNG
of expected SE against participants (stopwise.planning).
"""

from __future__ import annotations

import argparse
from typing import Any

from stopwise._io import write_atomic
from stopwise.commands import _args, _options
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
        "design",
        help="expected precision, best survival chances and model discrimination of a plan",
        description="Before collecting data: expected standard errors and correlations of "
        "a planned study, exact over the model's decision paths, with optional parameter "
        "ranges, a rival model and a search over survival chances.",
    )
    _args.add_model_and_values(
        parser, "an assumed parameter value (repeatable; others: start values)"
    )
    _options.add_option(parser)
    parser.add_argument(
        "--p-survive", default="0.6,0.75,0.9", metavar="P[,P...]", help="default 0.6,0.75,0.9"
    )
    parser.add_argument(
        "--trials",
        type=_args.positive_int,
        default=60,
        metavar="T",
        help=f"trials per participant (default 60; lottery models: the first T of the "
        f"{PRICE_LIST_ROWS} price-list rows)",
    )
    parser.add_argument("--subjects", type=_args.positive_int, default=100, metavar="N")
    parser.add_argument(
        "--gain", default="1", metavar="G[,G...]", help="one gain or one per chance (default 1)"
    )
    parser.add_argument(
        "--allocation", metavar="N[,N...]", help="trials per chance (default: round robin)"
    )
    parser.add_argument("--players", type=int, default=2, metavar="N", help="contests: group size")
    parser.add_argument("--prize", type=float, default=10.0, metavar="X", help="contests: prize")
    parser.add_argument(
        "--keep-bank", action="store_true", help="contests: players keep their own bank"
    )
    parser.add_argument(
        "--range",
        action="append",
        default=[],
        metavar="NAME=LO:HI",
        dest="ranges",
        help="average over this range of the parameter (repeatable)",
    )
    parser.add_argument("--versus", metavar="SPEC", help="a rival model to tell apart")
    parser.add_argument(
        "--optimise",
        choices=("p_survive", "conditions"),
        help="search survival chances among --candidates; 'conditions': chances, gains "
        "(--gain-candidates) and the split of trials (--allocation-step) together",
    )
    parser.add_argument("--gain-candidates", metavar="G[,G...]", help="gains to search")
    parser.add_argument(
        "--allocation-step", type=_args.positive_int, metavar="S", help="trial split granularity"
    )
    parser.add_argument("--candidates", default="0.5:0.97:0.01", metavar="LO:HI:STEP")
    parser.add_argument("--choose", type=_args.positive_int, default=3, metavar="K")
    parser.add_argument(
        "--criterion", default="d", metavar="d|se:NAME", help="D-optimality or one SE"
    )
    parser.add_argument("--best", type=_args.positive_int, default=5, metavar="B")
    parser.add_argument("--max-payout", type=float, metavar="X", help="expected payout cap")
    _args.add_max_target(parser, _args.FIT_CAP_HELP)
    _args.add_json_file(parser, "the design result")
    parser.add_argument("--figure", metavar="FILE", help="PNG of expected SE against participants")
    parser.set_defaults(func=run)
    return parser


def parse_ranges(items: list[str]) -> dict[str, tuple[float, float]]:
    """['r=0.1:0.7'] -> {'r': (0.1, 0.7)}."""
    ranges = {}
    for item in items:
        name, sep, text = item.partition("=")
        lo, colon, hi = text.partition(":")
        try:
            ranges[name.strip()] = (float(lo), float(hi))
        except ValueError:
            colon = ""
        if not sep or not colon or not name.strip():
            raise StopwiseInputError(f"--range {item!r}: expected NAME=LO:HI, e.g. r=0.1:0.7")
    return ranges


def parse_counts(text: str) -> list[int]:
    """'20,30,10' -> [20, 30, 10] (whole numbers >= 1)."""
    try:
        counts = [int(part) for part in text.split(",")]
    except ValueError:
        counts = []
    if not counts or any(n < 1 for n in counts):
        raise StopwiseInputError(
            f"--allocation {text!r}: expected whole numbers >= 1, e.g. 20,30,10"
        )
    return counts


def run(args: argparse.Namespace) -> int:
    from stopwise.figures.design import precision_figure
    from stopwise.planning import candidate_grid, design

    model = _options.cli_model(args.model, args.max_target, args.options)
    given = parse_assignments(args.assignments)
    check_parameters(model, given)
    items, contest = None, None
    if model.data_kind == "lottery":
        items = price_list_design([1], args.trials).drop(columns="subject")
    elif model.data_kind == "contest":
        contest = {"players": args.players, "prize": args.prize, "keep_bank": args.keep_bank}
    gains = parse_list(args.gain, "--gain")
    allocation = [] if args.allocation is None else parse_counts(args.allocation)
    joint = args.optimise == "conditions"
    gain_candidates = parse_list(args.gain_candidates, "--gain-candidates") if joint else None
    if joint and args.gain_candidates is None:
        gain_candidates = gains
    if args.figure and not args.figure.lower().endswith(".png"):
        raise StopwiseInputError(f"--figure {args.figure}: expected a .png file")
    candidates = candidate_grid(args.candidates) if args.optimise else None
    versus = _options.cli_model(args.versus, args.max_target, args.options) if args.versus else None
    result = design(
        model,
        given,
        p_survive=parse_list(args.p_survive, "--p-survive"),
        trials=args.trials,
        subjects=args.subjects,
        gain=gains,
        items=items,
        allocation=allocation,
        contest=contest,
        ranges=parse_ranges(args.ranges),
        versus=versus,
        candidates=candidates,
        choose=args.choose,
        criterion=args.criterion,
        best=args.best,
        max_payout=args.max_payout,
        gain_candidates=gain_candidates,
        allocation_step=args.allocation_step if joint else None,
    )
    picture = precision_figure(result) if args.figure else None
    emit(result, args.json)
    if picture is not None:
        write_atomic(args.figure, picture)
    return 0 if result.certified else 1
