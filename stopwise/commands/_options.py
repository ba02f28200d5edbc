"""``--option NAME=VALUE``: model options on the command line (fit, compare, simulate).

The options are those of ``stopwise.model(spec, **options)``: ``wealth``, ``reference``,
``contextual``, ``max_p_survive``, ``target_tolerance``, ``max_target`` for solo and lottery
models; ``level``, ``level0`` and ``max_target`` for contest models. The model builder checks
names and ranges; this module only turns the text into values.
"""

from __future__ import annotations

import argparse
from typing import Any

from stopwise.data_schemas.errors import StopwiseInputError

OPTION_HELP = (
    "a model option, e.g. --option wealth=20, --option reference=5, --option contextual=true, "
    "--option level=2 (level-k contests); repeatable"
)
TRUE_WORDS = ("true", "yes", "on")
FALSE_WORDS = ("false", "no", "off")


def add_option(parser: argparse.ArgumentParser) -> None:
    """``--option NAME=VALUE`` (repeatable), stored as ``args.options``."""
    parser.add_argument(
        "--option",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        dest="options",
        help=OPTION_HELP,
    )


def option_value(text: str) -> bool | int | float | str:
    """'true'/'false' (also yes/no, on/off) -> bool; a whole number -> int; a number ->
    float; anything else stays text (e.g. reference=start, level0=solo)."""
    word = text.strip()
    if word.lower() in TRUE_WORDS:
        return True
    if word.lower() in FALSE_WORDS:
        return False
    for convert in (int, float):
        try:
            return convert(word)
        except ValueError:
            continue
    return word


def parse_options(items: list[str]) -> dict[str, Any]:
    """['wealth=20', 'contextual=true'] -> {'wealth': 20, 'contextual': True}."""
    options: dict[str, Any] = {}
    for item in items:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name or not text.strip():
            raise StopwiseInputError(
                f"--option {item!r}: expected NAME=VALUE, e.g. --option wealth=20"
            )
        if name in options:
            raise StopwiseInputError(f"--option {name} is given twice")
        options[name] = option_value(text)
    return options


def cli_model(spec: str, max_target: int | None, items: list[str]) -> Any:
    """The Model of ``spec`` with the ``--option`` values and ``--max-target``."""
    from stopwise.models.spec import build_model

    options = parse_options(items)
    if max_target is not None:
        if "max_target" in options and options["max_target"] != max_target:
            raise StopwiseInputError(
                "--max-target and --option max_target disagree; give one of them"
            )
        options["max_target"] = max_target
    return build_model(spec, **options)
