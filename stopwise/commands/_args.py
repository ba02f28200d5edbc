"""Argument declarations shared by several commands (same names, defaults and help text
wherever a command offers them), and the mapping of ``--se`` to the engines' choices."""

from __future__ import annotations

import argparse
from typing import Any

CONTEST_CAP_HELP = "cap on the targets a contest model considers"
FIT_CAP_HELP = (
    "cap on planned draws: the targets a target or contest model considers, and where the "
    "planner's backward induction stops (default: sized from the data; a shorter planner "
    "cap is faster, and Bayesian fits check it against the default at 100 posterior draws)"
)
JSON_HELP = "write {what} as JSON to FILE ('-' for stdout)"


def add_data(parser: argparse.ArgumentParser) -> None:
    """The positional DATA file."""
    parser.add_argument("data", metavar="DATA", help="CSV or Parquet file")


def add_json_file(
    parser: argparse.ArgumentParser, what: str = "the result", help_text: str | None = None
) -> None:
    """``--json FILE`` ('-' for stdout); ``what`` names the object written."""
    parser.add_argument(
        "--json",
        metavar="FILE",
        default=None,
        help=help_text or JSON_HELP.format(what=what),
    )


def add_method(parser: argparse.ArgumentParser, bayes_help: str) -> None:
    """``--method mle|bayes`` (default mle)."""
    parser.add_argument(
        "--method",
        choices=("mle", "bayes"),
        default="mle",
        help=f"maximum likelihood (default) or {bayes_help}",
    )


def add_se(parser: argparse.ArgumentParser, choices: tuple[str, ...], help_text: str) -> None:
    """``--se`` among ``choices`` (None = the engine's default)."""
    parser.add_argument("--se", choices=choices, default=None, help=help_text)


def add_max_target(parser: argparse.ArgumentParser, help_text: str = CONTEST_CAP_HELP) -> None:
    """``--max-target M``."""
    parser.add_argument("--max-target", type=int, default=None, metavar="M", help=help_text)


def add_wealth(parser: argparse.ArgumentParser) -> None:
    """``--wealth W`` (model option ``wealth``)."""
    parser.add_argument(
        "--wealth",
        type=float,
        default=None,
        metavar="W",
        help="utility over W + payoff (model option wealth); crra and expo need wealth + "
        "outcome >= 0",
    )


def model_from_args(spec: str, args: argparse.Namespace) -> Any:
    """The spec itself, or with ``--wealth`` a Model built with that wealth (and the
    ``--max-target`` cap)."""
    if getattr(args, "wealth", None) is None:
        return spec
    from stopwise.models.spec import build_model

    options = {"wealth": args.wealth}
    if args.max_target is not None:
        options["max_target"] = args.max_target
    return build_model(spec, **options)


def add_hierarchical(parser: argparse.ArgumentParser) -> None:
    """Bayes ``--hierarchical`` and ``--parametrisation``."""
    parser.add_argument(
        "--hierarchical",
        action="store_true",
        help="Bayes: subject-level parameters with population hyperpriors",
    )
    parser.add_argument(
        "--parametrisation",
        choices=("auto", "centred", "noncentred"),
        default="auto",
        help="Bayes, hierarchical: centred or non-centred subject parameters (auto: chosen "
        "per parameter from the per-subject ML standard errors against the spread between "
        "subjects)",
    )


def add_sampler(parser: argparse.ArgumentParser) -> None:
    """Bayes ``--chains``, ``--draws``, ``--warmup`` and ``--planner-cap``."""
    parser.add_argument("--chains", type=int, default=4, metavar="C", help="Bayes: chains")
    parser.add_argument(
        "--draws", type=int, default=1000, metavar="D", help="Bayes: draws per chain"
    )
    parser.add_argument(
        "--warmup", type=int, default=1000, metavar="W", help="Bayes: warm-up iterations per chain"
    )
    parser.add_argument(
        "--planner-cap",
        choices=("auto", "exact"),
        default="auto",
        help="Bayes, planner models without --max-target: auto samples with the backward "
        "induction stopped 30 steps beyond the longest trial, checks that at 100 posterior "
        "draws against the default cap and refits at the default cap if the check fails; "
        "exact uses the default cap",
    )


def add_seed(parser: argparse.ArgumentParser, help_text: str) -> None:
    """``--seed S`` (default 0)."""
    parser.add_argument("--seed", type=int, default=0, metavar="S", help=help_text)


def add_allow_censored(parser: argparse.ArgumentParser) -> None:
    """``--allow-censored``."""
    parser.add_argument(
        "--allow-censored",
        action="store_true",
        help="accept trials that end without a stop or a bust (censored)",
    )


def se_choice(option: str | None) -> str | None:
    """``--se`` to the engines' ``se``: not given -> "auto", "none" -> None, else as given."""
    return {"none": None, None: "auto"}.get(option, option)
