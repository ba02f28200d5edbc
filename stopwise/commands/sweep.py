"""``stopwise sweep``: contest equilibria over a grid of survival chances and prizes."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from stopwise._io import write_atomic, write_json, write_table
from stopwise.commands import _args, _cluster
from stopwise.data_schemas.errors import StopwiseInputError


def register(subparsers: Any) -> argparse.ArgumentParser:
    parser = subparsers.add_parser(
        "sweep",
        help="equilibria of a stopping contest over a grid of survival chances and prizes",
        description="Solves the symmetric play of the contest at every grid point, each point "
        "started from its neighbour, and certifies every answer (Nash: max regret on the full "
        "game; QRE: fixed-point residual; level-k and CH are exact by construction). The "
        "table has the target probabilities, expected bank, bust rate, efficiency loss, win "
        "probability, max regret and the total variation distance to the previous point "
        "(large where the equilibrium jumps). Exit 1 if a point cannot be certified, unless "
        "--allow-approximate.",
    )
    parser.add_argument(
        "--p-survive",
        required=True,
        metavar="GRID",
        help="survival chances: LO:HI:STEP (e.g. 0.80:0.95:0.001), a list 0.8,0.9 or one value",
    )
    parser.add_argument(
        "--prize", default="1", metavar="GRID", help="prizes, same forms (default 1)"
    )
    parser.add_argument("--players", type=int, required=True, metavar="N", help="players (>= 2)")
    parser.add_argument(
        "--keep-bank", action="store_true", help="players keep their own bank on top of the prize"
    )
    parser.add_argument("--gain", type=float, default=1.0, metavar="G", help="gain per draw")
    parser.add_argument(
        "--concept", default="nash", choices=("nash", "qre", "levelk", "ch"), help="play concept"
    )
    parser.add_argument(
        "--precision", type=float, default=None, metavar="L", help="qre, levelk, ch"
    )
    parser.add_argument("--tau", type=float, default=None, metavar="T", help="ch: mean steps")
    parser.add_argument("--level", type=int, default=None, metavar="K", help="levelk: depth")
    parser.add_argument(
        "--r", type=float, default=None, metavar="R", help="CRRA curvature over money (r < 1)"
    )
    _args.add_max_target(
        parser,
        "one cap on targets for the whole sweep (default: smallest M with p^M <= 1e-12 at the "
        "largest p_survive; Nash answers do not depend on it, QRE, level-k and CH do)",
    )
    parser.add_argument(
        "--tolerance",
        type=float,
        default=1e-6,
        metavar="E",
        help="certificate: max regret as a share of the payoff range (Nash), fixed-point "
        "residual (QRE); default 1e-6",
    )
    parser.add_argument(
        "--allow-approximate",
        action="store_true",
        help="keep points that fail their certificate, marked certified = false (exit 0)",
    )
    parser.add_argument(
        "--out",
        metavar="TABLE",
        help='write the table: .csv, .parquet, or .json ({"axis": ..., "rows": [...]})',
    )
    parser.add_argument("--figure", metavar="FILE", help="write the figure (.png or .svg)")
    parser.add_argument("--quiet", action="store_true", help="no progress bar")
    _cluster.add_cluster_options(parser)  # one task per line of the grid
    parser.set_defaults(func=run)
    return parser


def output_kind(path: str | None, allowed: tuple[str, ...], option: str) -> str | None:
    """The lower-case ending of an output path, checked against `allowed`."""
    if path is None:
        return None
    ending = Path(path).suffix.lower().lstrip(".")
    if ending not in allowed:
        raise StopwiseInputError(
            f"{option} {path!r}: expected a file ending in {', '.join('.' + a for a in allowed)}"
        )
    return ending


def run(args: argparse.Namespace) -> int:
    from stopwise.contest import sweep
    from stopwise.sweep import UncertifiedSweepError
    from stopwise.sweep_grid import grid_settings, parse_grid

    table_kind = output_kind(args.out, ("csv", "parquet", "json"), "--out")
    figure_kind = output_kind(args.figure, ("png", "svg"), "--figure")
    p_values = parse_grid(args.p_survive, "p_survive")
    prizes = parse_grid(args.prize, "prize")
    options = dict(
        keep_bank=args.keep_bank,
        concept=args.concept,
        precision=args.precision,
        tau=args.tau,
        level=args.level,
        r=args.r,
        max_target=args.max_target,
        gain=args.gain,
        tolerance=args.tolerance,
        allow_approximate=args.allow_approximate,
        progress=not args.quiet,
        **_cluster.cluster_kwargs(args),
    )
    try:
        table = sweep(p_values, prizes, args.players, **options)
    except UncertifiedSweepError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    axis, _ = grid_settings(p_values, prizes)
    figure = None
    if figure_kind is not None:
        from stopwise.figures.sweep import sweep_figure

        fixed = "prize" if axis == "p_survive" else "p_survive"
        first_line = table.loc[table[fixed] == table.iloc[0][fixed]]  # one line of the grid
        figure = sweep_figure(first_line, axis, figure_kind)
    if table_kind == "json":
        write_json(args.out, {"axis": axis, "rows": table.to_dict(orient="records")})
    elif args.out:
        write_table(args.out, table)
    if figure is not None:
        write_atomic(args.figure, figure)
    print(summary(table, axis))
    return 0


def summary(table: Any, axis: str, top: int = 5) -> str:
    """Points, certification and the largest jumps along the swept axis."""
    lines = [
        f"{len(table)} points, {int(table['certified'].sum())} certified, swept along {axis}, "
        f"targets 0..{int(table['cap'].iloc[0])}",
        certificate_line(table),
        f"largest jumps (total variation to the previous {axis}):",
    ]
    jumps = table.dropna(subset=["tv_prev"]).nlargest(top, "tv_prev")
    for row in jumps.itertuples():
        lines.append(
            f"  p_survive {row.p_survive:g}, prize {row.prize:g}: {row.tv_prev:.4f} "
            f"(mean target {row.mean_target:.3f})"
        )
    return "\n".join(lines)


def certificate_line(table: Any) -> str:
    """The worst value of the concept's certificate (QRE regret is not a certificate: a
    quantal response equilibrium is not a Nash equilibrium)."""
    check = str(table["check"].iloc[0])
    if check == "fixed-point residual":
        return (
            f"largest fixed-point residual: {table['residual'].max():.3g} (max regret, not a "
            f"check for QRE: up to {table['regret_share'].max():.3g} of the payoff range)"
        )
    if check == "max regret":
        return f"largest max regret (share of payoff range): {table['regret_share'].max():.3g}"
    return f"check: {check}"
