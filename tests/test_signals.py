"""Signals end the command line quietly (issue 22 item 12): SIGINT -> exit 130, SIGTERM ->
exit 143 (128 + the signal number, as shells report them: common practice, no source),
one line on stderr, no traceback, no temporary file left, at start-up and during a write.
Every child process is bounded by a timeout."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from stopwise import _io
from stopwise.cli import main

STOPWISE = Path(sys.executable).with_name("stopwise")  # the installed console script
ROWS = (
    "subject,trial,step,p_survive,gain,action,outcome\n"
    "s1,1,0,0.9,1,draw,success\ns1,1,1,0.9,1,stop,\n"
    "s2,1,0,0.8,1,draw,bust\ns2,2,0,0.8,1,stop,\n"
    "s3,1,0,0.9,1,draw,success\ns3,1,1,0.9,1,draw,success\ns3,1,2,0.9,1,stop,\n"
)


@pytest.fixture
def data(tmp_path: Path) -> Path:
    """A tiny invented decision file (an input, never a check value)."""
    path = tmp_path / "decisions.csv"
    path.write_text(ROWS, encoding="utf-8")
    return path


def hidden_files(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


# Children of a non-interactive shell may inherit an ignored SIGINT, which Python then
# leaves ignored; each child script restores Python's own handler first (a preexec_fn
# would fork this multithreaded process).
RESTORE_SIGINT = "import signal; signal.signal(signal.SIGINT, signal.default_int_handler)\n"


def python_child(script: str) -> list[str]:
    return [sys.executable, "-c", RESTORE_SIGINT + textwrap.dedent(script)]


def console_command(*argv: str) -> list[str]:
    """The console command as its installed wrapper runs it (stopwise_launch.main)."""
    return python_child(
        f"""
        import sys
        from stopwise_launch import main
        sys.argv = ["stopwise", *{list(argv)!r}]
        sys.exit(main())
        """
    )


def wait_for_handler(pid: int, signum: int, timeout_s: float = 120.0) -> None:
    """Wait until process ``pid`` has a handler for ``signum`` (Linux: the SigCgt mask of
    /proc/PID/status), so that a signal sent next meets the launcher's or the command's
    handler and not Python's start-up: on a loaded machine a fixed delay did not always
    cover the interpreter's own start. Elsewhere: a fixed half second."""
    status = Path(f"/proc/{pid}/status")
    if not status.exists():
        time.sleep(0.5)
        return
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        try:
            fields = dict(line.split(":", 1) for line in status.read_text().splitlines())
        except (OSError, ValueError):
            return  # the process has ended; its exit code tells
        if int(fields["SigCgt"].strip(), 16) & (1 << (signum - 1)):
            return
        time.sleep(0.01)
    raise AssertionError(f"no handler for signal {signum} after {timeout_s} s")


def run_script(script: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        python_child(script), capture_output=True, text=True, timeout=300, cwd=cwd
    )


@pytest.mark.parametrize(
    ("signame", "code", "line"), [("SIGINT", 130, "interrupted"), ("SIGTERM", 143, "terminated")]
)
def test_a_signal_during_start_up_imports_ends_quietly(tmp_path, signame, code, line) -> None:
    """Deterministic start-up signal: an import hook sends it when the command line's
    import reaches numpy, the first heavy library of every command (JAX loads later, only
    for the commands that estimate) (stopwise_launch.main, the console command's entry
    point)."""
    done = run_script(
        f"""
        import os, signal, sys
        class SignalAtJax:
            def find_spec(self, name, path=None, target=None):
                if name == "numpy":
                    os.kill(os.getpid(), signal.{signame})
                return None
        sys.meta_path.insert(0, SignalAtJax())
        import stopwise_launch
        sys.argv = ["stopwise", "--version"]
        sys.exit(stopwise_launch.main())
        """,
        tmp_path,
    )
    assert done.returncode == code, done.stderr
    assert done.stderr == f"{line}\n"
    assert done.stdout == ""


def test_sigint_to_the_console_command_gives_130_and_one_line(tmp_path, data) -> None:
    """The console command, interrupted shortly after it starts (in start-up or in
    the fit; either way the outcome must be the same). The delay only schedules the
    signal; nothing about time is asserted."""
    out = tmp_path / "fit.json"
    child = subprocess.Popen(
        console_command("fit", str(data), "--model", "crra+planner+logit", "--json", str(out)),
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    # Python itself handles SIGINT from its start; the launcher's SIGTERM handler, set
    # right after its SIGINT one, marks that the launcher is in charge
    wait_for_handler(child.pid, signal.SIGTERM)
    time.sleep(0.2)
    child.send_signal(signal.SIGINT)
    _, err = child.communicate(timeout=300)
    assert child.returncode == 130, err
    assert err == "interrupted\n"
    assert not out.exists() and hidden_files(tmp_path) == []


@pytest.mark.parametrize(("signame", "code"), [("SIGINT", 130), ("SIGTERM", 143)])
def test_python_dash_m_goes_through_the_launcher(tmp_path, signame, code) -> None:
    """`python -m stopwise` (not the console script) is quiet at start-up too: the signal
    arrives when the command line's import reaches numpy."""
    done = run_script(
        f"""
        import os, runpy, signal, sys
        class SignalAtNumpy:
            def find_spec(self, name, path=None, target=None):
                if name == "numpy":
                    os.kill(os.getpid(), signal.{signame})
                return None
        sys.meta_path.insert(0, SignalAtNumpy())
        sys.argv = ["stopwise", "--version"]
        runpy.run_module("stopwise", run_name="__main__", alter_sys=True)
        """,
        tmp_path,
    )
    assert done.returncode == code, done.stderr
    assert "Traceback" not in done.stderr
    assert done.stderr.strip() in {"interrupted", "terminated"}


def test_sigterm_during_a_write_leaves_no_temporary_file(tmp_path, data) -> None:
    """SIGTERM arrives between writing the temporary file and renaming it into place:
    exit 143, the old output untouched, no hidden file."""
    out = tmp_path / "described.json"
    out.write_text("old\n", encoding="utf-8")
    done = run_script(
        f"""
        import os, signal, sys
        from stopwise.cli import main
        real_replace = os.replace
        def replace_after_sigterm(source, target):
            os.kill(os.getpid(), signal.SIGTERM)
            real_replace(source, target)
        os.replace = replace_after_sigterm
        sys.exit(main(["describe", {str(data)!r}, "--json", {str(out)!r}]))
        """,
        tmp_path,
    )
    assert done.returncode == 143, done.stderr
    assert done.stderr == "terminated\n"
    assert out.read_text(encoding="utf-8") == "old\n"
    assert hidden_files(tmp_path) == []


def test_sigterm_to_the_console_command_during_a_fit(tmp_path, data) -> None:
    out = tmp_path / "fit.json"
    child = subprocess.Popen(
        [str(STOPWISE), "fit", str(data), "--model", "crra+planner+logit", "--json", str(out)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    wait_for_handler(child.pid, signal.SIGTERM)
    time.sleep(0.5)
    child.send_signal(signal.SIGTERM)
    _, err = child.communicate(timeout=300)
    assert child.returncode == 143, err
    assert err == "terminated\n"
    assert not out.exists() and hidden_files(tmp_path) == []


def test_the_temporary_file_is_registered_before_it_exists(tmp_path) -> None:
    fd, name = _io._open_temporary(tmp_path / "out.json")
    os.close(fd)
    assert name in _io._PENDING and Path(name).exists()
    _io.remove_pending_temporaries()
    assert not Path(name).exists() and name not in _io._PENDING


def test_main_restores_the_callers_sigterm_handler(data, capsys) -> None:
    before = signal.getsignal(signal.SIGTERM)
    assert main(["describe", str(data)]) == 0
    assert signal.getsignal(signal.SIGTERM) is before
