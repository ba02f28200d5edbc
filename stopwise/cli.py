"""The ``stopwise`` command line.

Each command lives in ``stopwise/commands/<name>.py`` and exposes
``register(subparsers) -> argparse.ArgumentParser`` which sets ``func=run`` on its parser,
with ``run(args) -> int``. Exit codes (DESIGN.md): 0 success; 2 bad input or usage (message
on stderr, no traceback, nothing written); 1 anything else.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import os
import sys
from collections.abc import Sequence

from stopwise.data_schemas.errors import StopwiseInputError

COMMANDS = ("validate", "describe", "fit", "compare", "simulate", "equilibrium", "demo")
DEFAULT_CHAINS = 4  # the --chains default of fit and compare
DEVICE_FLAG = "--xla_force_host_platform_device_count"


class _Parser(argparse.ArgumentParser):
    """argparse parser whose usage errors raise instead of exiting (we choose the exit code)."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise StopwiseInputError(f"{self.prog}: {message}\n{self.format_usage().strip()}")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="stopwise",
        description="Fit models of risk preference and strategic play to stopping and "
        "lottery-choice data.",
    )
    parser.add_argument("--version", action="version", version=_version())
    subparsers = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for name in available_commands():
        importlib.import_module(f"stopwise.commands.{name}").register(subparsers)
    return parser


def available_commands() -> list[str]:
    """The commands whose modules are installed (all of COMMANDS in a complete install;
    tests/test_package.py checks that none is missing)."""
    found = []
    for name in COMMANDS:
        if importlib.util.find_spec(f"stopwise.commands.{name}") is not None:
            found.append(name)
    return found


def _version() -> str:
    from stopwise import __version__

    return f"stopwise {__version__}"


def host_device_flags(current: str | None, chains: int) -> str | None:
    """XLA_FLAGS giving JAX one CPU device per sampling chain (at least DEFAULT_CHAINS), so
    that NumPyro runs chains in parallel (chain_method "auto", estimation/bayes.py); None
    when the user's XLA_FLAGS already choose a device count."""
    if current and DEVICE_FLAG in current:
        return None
    flag = f"{DEVICE_FLAG}={max(int(chains), DEFAULT_CHAINS)}"
    return f"{current} {flag}" if current else flag


def give_chains_their_devices(args: argparse.Namespace) -> None:
    """Set XLA_FLAGS (host_device_flags) before JAX starts its CPU backend; once the backend
    runs (e.g. main() called inside a Python session) device counts are fixed, and nothing
    is changed. Single-device work is not slowed by the extra devices (bench_bayes.py).
    Without JAX imported no backend runs: JAX is not imported here (start-up speed)."""
    if "jax" in sys.modules:
        from jax._src import xla_bridge  # JAX is loaded already: this import costs nothing

        if xla_bridge.backends_are_initialized():
            return
    flags = host_device_flags(os.environ.get("XLA_FLAGS"), getattr(args, "chains", None) or 0)
    if flags is not None:
        os.environ["XLA_FLAGS"] = flags


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point; returns the process exit code."""
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        give_chains_their_devices(args)
        if not getattr(args, "func", None):
            parser.print_help(sys.stderr)
            return 2
        return int(args.func(args) or 0)
    except StopwiseInputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 1
    except BrokenPipeError:
        return 1
    except Exception as exc:  # anything else: exit 1, traceback only on request
        if os.environ.get("STOPWISE_DEBUG"):
            raise
        print(
            f"internal error: {type(exc).__name__}: {exc}\n(set STOPWISE_DEBUG=1 for a traceback)",
            file=sys.stderr,
        )
        return 1


if __name__ == "__main__":
    sys.exit(main())
