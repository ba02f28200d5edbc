"""``stopwise equilibrium``: symmetric play of a stopping contest under a play concept."""

from __future__ import annotations

import argparse
import sys
from typing import Any

from stopwise._io import write_json
from stopwise.commands import _args
from stopwise.data_schemas.errors import StopwiseInputError


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "equilibrium",
        help="equilibrium (or bounded-rational) target distribution of a stopping contest",
        description="Players each run a private stopping task; the top final bank wins the "
        "prize (ties broken at random), with --keep-bank everyone also keeps their bank. "
        "Prints the symmetric distribution of targets (numbers of draws aimed for) under "
        "Nash, logit QRE, level-k or cognitive hierarchy, with expected bank, bust rate, win "
        "probability, efficiency loss (1 - expected bank / the best solo risk-neutral expected "
        "bank), strictly dominated targets and the answer's check (Nash: max regret; QRE: "
        "fixed-point residual; level-k, CH: exact by construction). An answer that fails its "
        "check is refused with exit code 1 unless --allow-approximate.",
    )
    parser.add_argument(
        "--p-survive",
        type=float,
        required=True,
        metavar="P",
        help="probability that one draw succeeds, in (0, 1)",
    )
    parser.add_argument(
        "--players",
        type=int,
        required=True,
        metavar="N",
        help="number of players, 2..20 (the limit of the symmetric solver)",
    )
    parser.add_argument(
        "--prize", type=float, required=True, metavar="X", help="prize paid to the top final bank"
    )
    parser.add_argument(
        "--keep-bank", action="store_true", help="players keep their own bank on top of the prize"
    )
    parser.add_argument(
        "--gain",
        type=float,
        default=1.0,
        metavar="G",
        help="amount added by each successful draw (default 1)",
    )
    parser.add_argument(
        "--concept",
        default="nash",
        choices=("nash", "qre", "levelk", "ch", "aqre"),
        help="play concept (default nash)",
    )
    parser.add_argument(
        "--precision",
        type=float,
        default=None,
        metavar="L",
        help="logit precision (qre, levelk, ch, aqre; refused with nash, which has none); "
        "precision x payoff range is limited to 1e8, beyond which logit play is Nash play",
    )
    parser.add_argument(
        "--tau",
        type=float,
        default=None,
        metavar="T",
        help="mean thinking steps of cognitive hierarchy (ch only), in (0, 10]",
    )
    parser.add_argument(
        "--level", type=int, default=None, metavar="K", help="depth of level-k reasoning (levelk)"
    )
    parser.add_argument(
        "--r",
        type=float,
        default=None,
        metavar="R",
        help="CRRA curvature of utility over money (r < 1; default linear)",
    )
    _args.add_max_target(
        parser,
        "largest target considered (default: smallest M with p^M <= 1e-12). For nash the "
        "default is exact: no target beyond it changes the equilibrium by more than 1e-12 of "
        "the payoff range. For qre, aqre, levelk and ch the cap is part of the model: logit "
        "play puts mass on every target up to it, so the answer changes with it",
    )
    parser.add_argument(
        "--tolerance",
        type=float,
        default=1e-6,
        metavar="TOL",
        help="certificate tolerance: max regret as a share of the payoff range (nash), "
        "fixed-point residual (qre, aqre) (default 1e-6)",
    )
    parser.add_argument(
        "--allow-approximate",
        action="store_true",
        help="print an answer that fails its certificate, marked NOT CERTIFIED, instead of "
        "exiting with code 1",
    )
    parser.add_argument(
        "--min-prob",
        type=float,
        default=1e-4,
        metavar="Q",
        help="hide targets with probability below Q in the printed table (default 1e-4; "
        "the table says how many it hid; --json keeps them all)",
    )
    parser.add_argument(
        "--sequential",
        action="store_true",
        help="players move one after another, each seeing the best bank already banked: "
        "prints the first mover's target, the later movers' response rule (what they saw -> "
        "target), per-mover banks and the simultaneous Nash comparison (risk-neutral; "
        "players 2..6); with --concept aqre --precision L, logit choice at every node",
    )
    _args.add_json_file(parser)
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.contest_report import format_equilibrium
    from stopwise.contest_solve import UncertifiedAnswer, equilibrium

    if not (0 < args.tolerance < 1):
        raise StopwiseInputError(f"--tolerance must lie in (0, 1), got {args.tolerance}")
    if args.sequential:
        return _run_sequential(args)
    try:
        result = _solve(args, equilibrium)
    except UncertifiedAnswer as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    if args.json == "-":
        write_json("-", result)
        return 0
    print(format_equilibrium(result, min_prob=args.min_prob))
    if args.json:
        write_json(args.json, result)
    return 0


def _solve(args: argparse.Namespace, equilibrium: Any) -> dict[str, Any]:
    return equilibrium(
        p_survive=args.p_survive,
        players=args.players,
        prize=args.prize,
        keep_bank=args.keep_bank,
        gain=args.gain,
        concept=args.concept,
        precision=args.precision,
        tau=args.tau,
        level=args.level,
        r=args.r,
        max_target=args.max_target,
        tolerance=args.tolerance,
        allow_approximate=args.allow_approximate,
    )


def _run_sequential(args: argparse.Namespace) -> int:
    """``--sequential``: the certified sequential solution, or with ``--concept aqre`` agent
    logit play at every node (stopwise.contest_sequential)."""
    from stopwise import contest_sequential as seq
    from stopwise.contest_solve import UncertifiedAnswer

    logit = args.concept == "aqre"
    unused = ("tau", "level") if logit else ("precision", "tau", "level")
    for name in unused:
        if getattr(args, name) is not None:
            raise StopwiseInputError(f"--{name} is not used with --sequential")
    if args.concept not in ("nash", "aqre"):
        raise StopwiseInputError(
            "--sequential solves nash (subgame-perfect) or aqre (logit at every node) play"
        )
    if logit and args.precision is None:
        raise StopwiseInputError("--sequential --concept aqre needs --precision")
    setting = {
        "p_survive": args.p_survive,
        "players": args.players,
        "prize": args.prize,
        "keep_bank": args.keep_bank,
        "gain": args.gain,
        "max_target": args.max_target,
        "tolerance": args.tolerance,
        "r": args.r,
    }
    try:
        if logit:
            result = seq.sequential_logit(precision=args.precision, **setting)
        else:
            result = seq.sequential_equilibrium(allow_approximate=args.allow_approximate, **setting)
    except UncertifiedAnswer as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    if args.json == "-":
        write_json("-", result)
        return 0
    print(seq.format_sequential_logit(result) if logit else seq.format_sequential(result))
    if args.json:
        write_json(args.json, result)
    return 0
