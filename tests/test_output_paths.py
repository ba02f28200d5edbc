"""Output paths (stopwise/_io.py, stopwise/commands/_args.py): checked before anything is
computed, never an input, never a device, FIFO or folder, symbolic links written through
to their target, permissions from the umask, and a failed write names the file and leaves
no temporary file. Facts of the trade used here (common practice, no source): /dev/null is
a character device; /proc accepts no new files, even for root; a process over its
RLIMIT_FSIZE gets EFBIG ("File too large") once SIGXFSZ is ignored."""

from __future__ import annotations

import argparse
import os
import stat
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

import stopwise.api
from stopwise._io import check_output_path, write_atomic
from stopwise.cli import main
from stopwise.commands._args import check_output_options
from stopwise.data_schemas.errors import StopwiseInputError

ROWS = (
    "subject,trial,step,p_survive,gain,action,outcome\n"
    "s1,1,0,0.9,1,draw,success\ns1,1,1,0.9,1,stop,\n"
    "s2,1,0,0.8,1,draw,bust\ns2,2,0,0.8,1,stop,\n"
)


@pytest.fixture
def data(tmp_path: Path) -> Path:
    """A tiny invented decision file (an input, never a check value)."""
    path = tmp_path / "decisions.csv"
    path.write_text(ROWS, encoding="utf-8")
    return path


def leftovers(folder: Path) -> list[str]:
    """Hidden temporary or probe files left in ``folder``."""
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


def refused_outputs(tmp_path: Path, data: Path) -> dict[str, tuple[str, str]]:
    """The adversarial output cases: name -> (path given, fragment of the refusal)."""
    (tmp_path / "folder").mkdir()
    os.mkfifo(tmp_path / "fifo")
    (tmp_path / "link_to_input").symlink_to(data)
    (tmp_path / "link_to_null").symlink_to("/dev/null")
    os.link(data, tmp_path / "hard_link")
    return {
        "the input itself": (str(data), "input file"),
        "the input by another spelling": (f"{tmp_path}/./folder/../decisions.csv", "input file"),
        "a symbolic link to the input": (str(tmp_path / "link_to_input"), "input file"),
        "a hard link to the input": (str(tmp_path / "hard_link"), "input file"),
        "a device node": ("/dev/null", "character device"),
        "a symbolic link to a device": (str(tmp_path / "link_to_null"), "character device"),
        "a named pipe": (str(tmp_path / "fifo"), "named pipe"),
        "a folder": (str(tmp_path / "folder"), "a folder"),
        "a folder that takes no files": ("/proc/stopwise-out.json", "does not accept new files"),
        "below a regular file": (f"{data}/out.json", "is not a folder"),
    }


def test_every_adversarial_output_is_refused_and_nothing_changes(tmp_path, data) -> None:
    cases = refused_outputs(tmp_path, data)
    before = data.read_bytes()
    for name, (path, fragment) in cases.items():
        with pytest.raises(StopwiseInputError, match=fragment):
            check_output_path(path, [str(data)], "--json")
        assert data.read_bytes() == before, name
    assert stat.S_ISCHR(os.stat("/dev/null").st_mode)
    assert stat.S_ISFIFO(os.stat(tmp_path / "fifo").st_mode)
    assert leftovers(tmp_path) == []


def test_acceptable_outputs_pass_and_the_check_creates_nothing(tmp_path, data) -> None:
    assert check_output_path("-", [str(data)]) is None
    new = tmp_path / "new" / "deeper" / "fit.json"
    assert check_output_path(new, [str(data)]) == new
    assert not (tmp_path / "new").exists()
    existing = tmp_path / "old.json"
    existing.write_text("{}", encoding="utf-8")
    assert check_output_path(existing, [str(data)]) == existing
    assert leftovers(tmp_path) == []


def test_the_command_line_refuses_before_computing(tmp_path, data, monkeypatch, capsys) -> None:
    """Every refused output ends with exit 2 and a message naming the path, and the fit
    is never called (stopwise.api.fit replaced by a function that fails the test)."""

    def never(*args, **kwargs):
        raise AssertionError("the fit ran although its output path was refused")

    monkeypatch.setattr(stopwise.api, "fit", never)
    before = data.read_bytes()
    for path, _ in refused_outputs(tmp_path, data).values():
        argv = ["fit", str(data), "--model", "linear+myopic+logit", "--json", path]
        assert main(argv) == 2
        assert path in capsys.readouterr().err
    assert data.read_bytes() == before
    assert stat.S_ISCHR(os.stat("/dev/null").st_mode)


def test_two_options_naming_one_file_are_refused(tmp_path) -> None:
    """Two output options resolving to one file (through a symbolic link) are refused."""
    (tmp_path / "b.json").symlink_to(tmp_path / "a.json")
    args = argparse.Namespace(json=str(tmp_path / "a.json"), out=str(tmp_path / "b.json"))
    with pytest.raises(StopwiseInputError, match="same file"):
        check_output_options(args)


def test_a_folder_output_must_be_a_folder(tmp_path, data, capsys) -> None:
    assert main(["demo", "--out", str(data)]) == 2
    assert "not a folder" in capsys.readouterr().err


@pytest.mark.parametrize(("umask", "expected"), [(0o022, 0o644), (0o027, 0o640), (0o002, 0o664)])
def test_new_files_honour_the_umask(tmp_path, umask, expected) -> None:
    old = os.umask(umask)
    try:
        write_atomic(tmp_path / "out.json", "{}\n")
    finally:
        os.umask(old)
    assert stat.S_IMODE(os.stat(tmp_path / "out.json").st_mode) == expected


def test_a_replaced_file_keeps_its_permissions(tmp_path) -> None:
    target = tmp_path / "out.json"
    target.write_text("old", encoding="utf-8")
    target.chmod(0o600)
    write_atomic(target, "new")
    assert target.read_text(encoding="utf-8") == "new"
    assert stat.S_IMODE(os.stat(target).st_mode) == 0o600


def test_symbolic_links_are_written_through_to_their_target(tmp_path) -> None:
    target = tmp_path / "results" / "fit.json"
    target.parent.mkdir()
    target.write_text("old", encoding="utf-8")
    link = tmp_path / "latest.json"
    link.symlink_to(target)
    write_atomic(link, "new")
    assert link.is_symlink() and os.readlink(link) == str(target)
    assert target.read_text(encoding="utf-8") == "new"
    dangling = tmp_path / "dangling.json"
    dangling.symlink_to(tmp_path / "created.json")
    write_atomic(dangling, "made")
    assert (tmp_path / "created.json").read_text(encoding="utf-8") == "made"
    assert dangling.is_symlink()
    assert leftovers(tmp_path) == [] and leftovers(target.parent) == []


def test_write_time_check_refuses_a_target_that_became_a_folder(tmp_path) -> None:
    (tmp_path / "out.json").mkdir()
    with pytest.raises(StopwiseInputError, match="a folder"):
        write_atomic(tmp_path / "out.json", "x")
    assert leftovers(tmp_path) == []


def test_a_full_disk_names_the_file_and_leaves_nothing(tmp_path, data) -> None:
    """A file-size limit of 1,000 bytes stands in for a full disk: describe's JSON is
    larger, the write fails with EFBIG; exit 1, the file named, no output, no temp file."""
    out = tmp_path / "described.json"
    script = textwrap.dedent(
        f"""
        import resource, signal, sys
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (1000, 1000))
        from stopwise.cli import main
        sys.exit(main(["describe", {str(data)!r}, "--json", {str(out)!r}]))
        """
    )
    env = {**os.environ, "STOPWISE_CACHE_DIR": "off"}
    done = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=300, env=env
    )
    assert done.returncode == 1, done.stderr
    assert f"cannot write {out}" in done.stderr and "Traceback" not in done.stderr
    assert not out.exists()
    assert leftovers(tmp_path) == []


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_a_read_only_folder_is_refused_up_front(tmp_path, data, capsys) -> None:
    folder = tmp_path / "locked"
    folder.mkdir()
    folder.chmod(0o555)
    try:
        code = main(["describe", str(data), "--json", str(folder / "out.json")])
    finally:
        folder.chmod(0o755)
    assert code == 2 and "does not accept new files" in capsys.readouterr().err
