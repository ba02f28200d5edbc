"""``stopwise incentives``: the contest scheme that best serves a goal for fitted players."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from stopwise._io import is_same_file, write_atomic, write_json
from stopwise.commands import _args
from stopwise.data_schemas.errors import StopwiseInputError


def _number_list(kind: type, what: str) -> Any:
    """argparse type: comma-separated numbers of ``kind``."""

    def parse(text: str) -> tuple:
        try:
            return tuple(kind(part) for part in text.split(",") if part.strip())
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected {what}, got {text!r}") from None

    return parse


def prize_range(text: str) -> tuple[float, float]:
    """argparse type: LO:HI (two numbers, 0 < LO <= HI)."""
    parts = text.split(":")
    try:
        lo, hi = (float(p) for p in parts)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected LO:HI (e.g. 1:20), got {text!r}") from None
    return lo, hi


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "incentives",
        help="the contest scheme and prize that best serve a goal for fitted players",
        description="Searches contest designs (players per group, scheme, survival chance, "
        "prize) for the one that best serves a goal under the fitted model's play: "
        "efficiency (expected total bank), bust (lowest bust rate), risk (mean target closest "
        "to --target-risk) or outlay (smallest expected prize outlay with bust rate <= "
        "--max-bust). Every prediction is certified; an uncertified one is never chosen. "
        "Prints the choice with Nash play beside it, its uncertainty and the runners-up.",
    )
    parser.add_argument("fit", metavar="FIT.json", help="a contest fit written by fit --json")
    parser.add_argument("--goal", required=True, choices=("efficiency", "bust", "risk", "outlay"))
    parser.add_argument("--prize", required=True, type=prize_range, metavar="LO:HI")
    parser.add_argument(
        "--players",
        type=_number_list(int, "whole numbers like 2,3"),
        default=(2,),
        metavar="N,...",
        help="players per group to consider (default 2)",
    )
    parser.add_argument(
        "--scheme",
        type=_number_list(str, "names like winner,keep"),
        default=("winner", "keep"),
        metavar="S,...",
        help="winner (top bank takes the prize), keep (everyone also keeps their bank) "
        "and/or topK (the K top banks share the prize, e.g. top2; ties across the K-th "
        "place in a fair random order) (default winner,keep)",
    )
    parser.add_argument(
        "--p-survive",
        type=_number_list(float, "numbers like 0.8,0.9"),
        default=(0.8,),
        metavar="P,...",
        help="survival chance(s) of a draw the designer may set (default 0.8)",
    )
    parser.add_argument(
        "--max-bust", type=float, default=None, metavar="B", help="limit on the predicted bust rate"
    )
    parser.add_argument(
        "--budget",
        type=float,
        default=None,
        metavar="X",
        help="limit on the expected prize outlay per group",
    )
    parser.add_argument(
        "--target-risk",
        type=float,
        default=None,
        metavar="T",
        help="target mean number of draws aimed for (goal risk)",
    )
    parser.add_argument(
        "--grid",
        type=_args.positive_int,
        default=9,
        metavar="K",
        help="prize grid points per setting before refinement (default 9)",
    )
    parser.add_argument(
        "--refine",
        type=int,
        default=30,
        metavar="S",
        help="iterations of each derivative-steered root search beside the best grid "
        "prize (0: grid only; default 30)",
    )
    parser.add_argument(
        "--bootstrap",
        type=int,
        default=0,
        metavar="B",
        help="parametric bootstrap draws for the goal's band (default 0)",
    )
    _args.add_seed(parser, "seed of the parametric bootstrap")
    _args.add_json_file(parser)
    parser.add_argument(
        "--figure",
        default=None,
        metavar="FILE.png",
        help="write the goal-against-prize figure as PNG",
    )
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.incentives import NoAdmissibleDesign, design_incentives
    from stopwise.saved import SavedFit, load_result

    for option in ("json", "figure"):
        path = getattr(args, option)
        if path and path != "-" and is_same_file(path, args.fit):
            raise StopwiseInputError(f"--{option} names the input file {args.fit}")
    if args.figure and not args.figure.lower().endswith(".png"):
        raise StopwiseInputError(f"--figure must name a .png file, got {args.figure}")
    if args.bootstrap < 0 or args.refine < 0:
        raise StopwiseInputError("--bootstrap and --refine must be >= 0")
    fit = load_result(args.fit)
    if not isinstance(fit, SavedFit):
        raise StopwiseInputError(f"{args.fit}: expected one fit, not a collection of fits")
    try:
        result = design_incentives(
            fit,
            args.goal,
            args.prize,
            args.players,
            args.scheme,
            args.p_survive,
            args.max_bust,
            args.budget,
            args.target_risk,
            args.grid,
            args.refine,
            args.bootstrap,
            args.seed if args.seed is not None else 0,
        )
    except NoAdmissibleDesign as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    record = result.to_dict()
    if args.json == "-":
        write_json("-", record)
        return 0
    png = None
    if args.figure:  # rendered before anything is written: a failure leaves no output
        from stopwise.figures.incentives import incentives_figure
        from stopwise.figures.palette import figure_bytes

        png = figure_bytes(incentives_figure(result), "png")
    print(format_design(record))
    if args.json:
        write_json(args.json, record)
    if png is not None:
        write_atomic(args.figure, png)
    return 0


def _design_line(label: str, d: dict[str, Any]) -> str:
    m, n = d["model"], d["nash"]
    return (
        f"{label:<10} {d['scheme']:<7} {d['players']:>3} {d['p_survive']:>5.2f} "
        f"{d['prize']:>9.4g} {m['goal_value']:>11.4g} {m['bust_rate']:>6.3f} "
        f"{m['mean_target']:>6.2f} {m['prize_outlay']:>8.4g} | {n['goal_value']:>11.4g} "
        f"{n['bust_rate']:>6.3f}"
    )


def format_design(record: dict[str, Any]) -> str:
    """The printed table: choice, runners-up, uncertainty and notes."""
    head = (
        f"{'':<10} {'scheme':<7} {'N':>3} {'p':>5} {'prize':>9} {'goal':>11} {'bust':>6} "
        f"{'target':>6} {'outlay':>8} | {'Nash goal':>11} {'bust':>6}"
    )
    lines = [f"goal: {record['goal']}  (fitted play | Nash play)", head]
    lines.append(_design_line("chosen", record["choice"]))
    lines += [_design_line("runner-up", d) for d in record["runners_up"]]
    lines += uncertainty_lines(record["choice"])
    lines.append(f"search: {record['method']}")
    lines += [f"note: {n}" for n in record["notes"]]
    return "\n".join(lines)


def uncertainty_lines(choice: dict[str, Any]) -> list[str]:
    """Delta-method standard errors and bootstrap bands of the chosen design."""
    lines = []
    slope = choice.get("prize_derivative")
    if slope:
        lines.append(
            f"d goal / d prize at the choice: {slope['derivative']:.4g} (automatic "
            f"differentiation through the fitted play; central differences agree to "
            f"{slope['relative_gap']:.1e} relative)"
        )
    bust_slope = choice.get("bust_rate_derivative")
    if bust_slope:
        lines.append(
            f"d bust rate / d prize at the choice: {bust_slope['derivative']:.4g} (central "
            f"differences agree to {bust_slope['relative_gap']:.1e} relative)"
        )
    delta = choice.get("delta_method")
    if delta:
        ses = ", ".join(f"{q} {v:.3g}" for q, v in delta["se_by_quantity"].items())
        lines.append(f"standard errors (delta method): {ses}")
    boot = choice.get("bootstrap")
    if boot:
        bands = ", ".join(
            f"{q} [{b['band_95'][0]:.4g}, {b['band_95'][1]:.4g}]"
            for q, b in boot["by_quantity"].items()
            if b["band_95"][0] is not None
        )
        lines.append(f"bootstrap 95% bands: {bands}")
        lines.append(
            f"bootstrap: {boot['used']} of {boot['draws']} draws certified and used; "
            f"limits hold in {boot['limits_hold_share']:.0%} of them"
            if boot["used"]
            else "bootstrap: no draw was certified"
        )
    return lines
