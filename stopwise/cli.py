"""The ``stopwise`` command line.

Each command lives in ``stopwise/commands/<name>.py`` and exposes
``register(subparsers) -> argparse.ArgumentParser`` which sets ``func=run`` on its parser,
with ``run(args) -> int``. Exit codes (DESIGN.md): 0 success; 2 bad input or usage (message
on stderr, no traceback, nothing written); 1 anything else; 130 after an interrupt (SIGINT)
and 143 after SIGTERM, each with one line on stderr and no temporary file left (the console
command starts in ``stopwise_launch.py``, which covers the import of this module).
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import os
import signal
import sys
import warnings
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from types import FrameType
from typing import Any

from stopwise._io import OutputWriteError, remove_pending_temporaries
from stopwise.commands._args import check_output_options
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.certify import UncertifiedAnswer

COMMANDS = (
    "validate",
    "describe",
    "fit",
    "compare",
    "simulate",
    "recover",
    "equilibrium",
    "sweep",
    "design",
    "demo",
    "report",
    "incentives",
)
DEFAULT_CHAINS = 4  # the --chains default of fit and compare
DEVICE_FLAG = "--xla_force_host_platform_device_count"
EXIT_INTERRUPTED = 128 + signal.SIGINT  # 130, as a shell reports Ctrl-C
EXIT_TERMINATED = 128 + signal.SIGTERM  # 143


def exit_on_sigterm(signum: int, frame: FrameType | None) -> None:
    """SIGTERM during a command: delete the temporary files of writes in progress (an
    output is either complete or untouched), say so in one line and exit with 143.
    os._exit, not an exception: an exception raised in a signal handler can be swallowed
    where the handler happens to run (a garbage-collection callback, a __del__)."""
    remove_pending_temporaries()
    sys.stderr.write("terminated\n")
    sys.stderr.flush()
    os._exit(EXIT_TERMINATED)


@contextmanager
def sigterm_cleans_up() -> Iterator[None]:
    """While the block runs, SIGTERM goes to exit_on_sigterm (main thread only; elsewhere
    the handlers stay as they are); the previous handler is restored afterwards."""
    try:
        previous: Callable[..., Any] | int | None = signal.signal(signal.SIGTERM, exit_on_sigterm)
    except ValueError:  # not the main thread
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


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
    that NumPyro runs chains in parallel (chain_method "auto", estimation/bayes/sampler.py); None
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


def is_floating_point_warning(category: type[Warning], message: object) -> bool:
    """numpy's floating-point RuntimeWarnings ("overflow encountered in exp", "divide by
    zero encountered in log", "invalid value encountered in ...")."""
    return issubclass(category, RuntimeWarning) and " encountered in " in str(message)


def floating_point_note(messages: list[str]) -> str:
    """One line for the numpy floating-point warnings of a command, instead of raw lines."""
    distinct = list(dict.fromkeys(messages))
    shown = "; ".join(distinct[:3]) + ("; ..." if len(distinct) > 3 else "")
    return (
        f"note: numpy reported {len(messages)} floating-point warning(s) ({shown}), e.g. "
        "from extreme trial values during a search; the results state their own checks "
        "(convergence, max |gradient|, Hessian)"
    )


def run_command(args: argparse.Namespace) -> int:
    """Run the chosen command; numpy floating-point warnings become one note on stderr,
    other warnings are shown as usual."""
    caught: list[str] = []
    with warnings.catch_warnings():
        shown = warnings.showwarning

        def collect(message: Any, category: type[Warning], *rest: Any, **kw: Any) -> None:
            if is_floating_point_warning(category, message):
                caught.append(str(message))
            else:
                shown(message, category, *rest, **kw)

        warnings.showwarning = collect
        try:
            return int(args.func(args) or 0)
        finally:
            if caught:
                print(floating_point_note(caught), file=sys.stderr)


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point; returns the process exit code (an interrupt: 130, SIGTERM: 143, each
    with one line on stderr; temporary output files are removed on the way out)."""
    with sigterm_cleans_up():
        return _run(argv)


def _run(argv: Sequence[str] | None) -> int:
    """Parse, check the outputs, run the command; map errors to exit codes."""
    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        args.argv = list(sys.argv[1:] if argv is None else argv)  # the exact command (report)
        give_chains_their_devices(args)
        if not getattr(args, "func", None):
            parser.print_help(sys.stderr)
            return 2
        check_output_options(args)
        return run_command(args)
    except StopwiseInputError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except OutputWriteError as exc:
        print(f"error: {exc.strerror}", file=sys.stderr)
        return 1
    except UncertifiedAnswer as exc:  # an answer that failed its check is never written
        print(f"error: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED
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
