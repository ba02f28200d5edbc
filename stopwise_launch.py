"""The ``stopwise`` console command's entry point, kept outside the ``stopwise`` package.

Importing ``stopwise`` imports JAX, which takes a noticeable moment; an interrupt (Ctrl-C,
SIGINT) or a termination request (SIGTERM) in that moment would otherwise end in a
traceback or a kill by signal. This module imports nothing heavy itself. While the command
line is being imported, both signals end the process at once with one line on stderr and
the shell's conventional exit code, 128 + the signal number (130 for SIGINT, 143 for
SIGTERM): nothing has been written yet, so there is nothing to clean up, and an immediate
exit cannot be swallowed the way an exception raised inside an import can (e.g. in a
garbage-collection callback). Then ``stopwise.cli.main`` runs with Python's usual
KeyboardInterrupt for SIGINT (caught there: exit 130) and its own SIGTERM handler (which
removes temporary output files: exit 143).
"""

from __future__ import annotations

import os
import signal
import sys
from types import FrameType

EXIT_CODES = {signal.SIGINT: 128 + signal.SIGINT, signal.SIGTERM: 128 + signal.SIGTERM}
MESSAGES = {signal.SIGINT: "interrupted", signal.SIGTERM: "terminated"}


def exit_during_start_up(signum: int, frame: FrameType | None) -> None:
    """One line on stderr, then exit with 128 + signum (no cleanup is needed yet)."""
    sys.stderr.write(f"{MESSAGES.get(signum, 'stopped')}\n")
    sys.stderr.flush()
    os._exit(EXIT_CODES.get(signum, 128 + signum))


def main() -> int:
    """Import and run ``stopwise.cli.main`` with start-up signals ending quietly."""
    interrupt = signal.signal(signal.SIGINT, exit_during_start_up)
    signal.signal(signal.SIGTERM, exit_during_start_up)
    from stopwise.cli import main as run_command_line

    signal.signal(signal.SIGINT, interrupt)
    return run_command_line()


if __name__ == "__main__":
    sys.exit(main())
