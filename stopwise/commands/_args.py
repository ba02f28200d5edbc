"""Argument declarations shared by several commands (same names, defaults and help text
wherever a command offers them), and the mapping of ``--se`` to the engines' choices."""

from __future__ import annotations

import argparse
from typing import Any

from stopwise._io import check_output_folder, check_output_path
from stopwise.commands._options import cli_model
from stopwise.data_schemas.errors import StopwiseInputError

CONTEST_CAP_HELP = "cap on the targets a contest model considers"
FIT_CAP_HELP = (
    "cap on planned draws: the targets a target or contest model considers, and where the "
    "planner's backward induction stops (default: sized from the data; a shorter planner "
    "cap is faster, and Bayesian fits check it against the default at 100 posterior draws)"
)
JSON_HELP = "write {what} as JSON to FILE ('-' for stdout)"


def positive_int(text: str) -> int:
    """argparse type: a whole number >= 1 (a count of starts, replications, ...)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a whole number >= 1, got {value}")
    return value


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
    """The Model of ``spec`` with the ``--option`` values, ``--wealth`` (shorthand for
    ``--option wealth=W``) and the ``--max-target`` cap."""
    items = list(getattr(args, "options", None) or [])
    if getattr(args, "wealth", None) is not None:
        if any(item.partition("=")[0].strip() == "wealth" for item in items):
            raise StopwiseInputError("--wealth and --option wealth=... both given; give one")
        items.append(f"wealth={args.wealth!r}")
    return cli_model(spec, getattr(args, "max_target", None), items)


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
    parser.add_argument(
        "--loo",
        choices=("subject", "trial"),
        default=None,
        help="Bayes: unit of leave-one-out (default subject when the data have several "
        "subjects: leave-one-subject-out, subjects with Pareto k > 0.7 refitted without "
        "them; trial: leave-one-trial-out, rows for lottery data)",
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


OUTPUT_FILE_OPTIONS = ("json", "out", "table", "figure")  # dests that name an output file
INPUT_OPTIONS = ("data", "joint", "params")  # dests that name an input file


def _named_paths(args: argparse.Namespace, dests: tuple[str, ...]) -> list[tuple[str, str]]:
    """(option, path) for each of ``dests`` that holds a path string or a list of them
    (a repeatable option such as ``--joint``)."""
    named = []
    for dest in dests:
        value = getattr(args, dest, None)
        values = value if isinstance(value, list) else [value]
        option = f"--{dest.replace('_', '-')}"
        named += [(option, path) for path in values if isinstance(path, str) and path]
    return named


def check_output_options(args: argparse.Namespace) -> None:
    """Check every output path of a parsed command line before anything runs
    (stopwise._io.check_output_path): regular file or new, not an input, in a folder that
    takes new files, and no two outputs the same file. A command whose option names an
    output folder lists it with ``parser.set_defaults(output_folders=("out",))``."""
    folders = tuple(getattr(args, "output_folders", ()))
    inputs = [path for _, path in _named_paths(args, INPUT_OPTIONS)]
    files = [
        (opt, p) for opt, p in _named_paths(args, OUTPUT_FILE_OPTIONS) if opt[2:] not in folders
    ]
    seen: dict[Any, str] = {}
    for option, path in files:
        target = check_output_path(path, inputs, option)
        if target is not None and target in seen:
            raise StopwiseInputError(f"{seen[target]} and {option} name the same file {path}")
        seen[target] = option
    for option, path in _named_paths(args, folders):
        check_output_folder(path, option)


def add_model_and_values(parser: argparse.ArgumentParser, set_help: str) -> None:
    """``--model SPEC`` (required) and repeatable ``--set NAME=VALUE`` (``args.assignments``),
    as simulate, recover and design take them."""
    parser.add_argument("--model", required=True, metavar="SPEC", help="e.g. crra+planner+logit")
    parser.add_argument(
        "--set",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        dest="assignments",
        help=set_help,
    )
