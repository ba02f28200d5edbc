"""``stopwise equilibrium``: symmetric play of a stopping contest under a play concept."""

from __future__ import annotations

import argparse
from typing import Any

from stopwise._io import write_json
from stopwise.commands import _args


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "equilibrium",
        help="equilibrium (or bounded-rational) target distribution of a stopping contest",
        description="Players each run a private stopping task; the top final bank wins the "
        "prize (ties broken at random), with --keep-bank everyone also keeps their bank. "
        "Prints the symmetric distribution of targets (numbers of draws aimed for) under "
        "Nash, logit QRE, level-k or cognitive hierarchy, with expected bank, bust rate, win "
        "probability, efficiency loss, the maximum regret and strictly dominated targets.",
    )
    parser.add_argument(
        "--p-survive",
        type=float,
        required=True,
        metavar="P",
        help="probability that one draw succeeds, in (0, 1)",
    )
    parser.add_argument(
        "--players", type=int, required=True, metavar="N", help="number of players (>= 2)"
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
        help="logit precision (qre, levelk, ch, aqre)",
    )
    parser.add_argument(
        "--tau",
        type=float,
        default=None,
        metavar="T",
        help="mean thinking steps of cognitive hierarchy (ch)",
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
        "largest target considered (default: smallest M with "
        "p^M <= 1e-12, beyond which no target matters)",
    )
    _args.add_json_file(parser)
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    from stopwise.contest import equilibrium, format_equilibrium

    result = equilibrium(
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
    )
    if args.json == "-":
        write_json("-", result)
        return 0
    print(format_equilibrium(result))
    if args.json:
        write_json(args.json, result)
    return 0
