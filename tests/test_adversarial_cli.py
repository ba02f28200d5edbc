"""The command-line corpus tests/adversarial/cli.tsv (issue 22 items 1, 2 and 11): each case
ends with its exit code and message, never a traceback; a refused case writes nothing and
leaves the input as it was; no formula probe file ever appears. Facts of the trade (common
practice, no source): /dev/null and /dev/zero are character devices; /proc takes no new
files."""

from __future__ import annotations

import os
import shlex
import stat
from pathlib import Path

import pytest

from stopwise.cli import main

CORPUS = Path(__file__).parent / "adversarial" / "cli.tsv"
ROWS = (
    "subject,trial,step,p_survive,gain,action,outcome\n"
    "s1,1,0,0.9,1,draw,success\ns1,1,1,0.9,1,stop,\n"
    "s2,1,0,0.8,1,draw,bust\ns2,2,0,0.8,1,stop,\n"
    "s3,1,0,0.9,1,draw,success\ns3,1,1,0.9,1,draw,success\ns3,1,2,0.9,1,stop,\n"
)


def corpus() -> list[tuple[str, str, int, str]]:
    rows = []
    for line in CORPUS.read_text(encoding="utf-8").splitlines():
        if line and not line.startswith("#"):
            name, argv, code, fragment = line.split("\t")
            rows.append((name, argv, int(code), fragment))
    return rows


def places(tmp: Path) -> dict[str, str]:
    """The files a case's arguments refer to, made in ``tmp``."""
    data = tmp / "decisions.csv"
    data.write_text(ROWS, encoding="utf-8")
    (tmp / "folder").mkdir()
    os.mkfifo(tmp / "fifo")
    (tmp / "link_in").symlink_to(data)
    os.link(data, tmp / "hard_in")
    (tmp / "link_null").symlink_to("/dev/null")
    (tmp / "dangling").symlink_to(tmp / "made_through_link.json")
    names = ("folder", "fifo", "link_in", "hard_in", "link_null", "dangling")
    return {"data": str(data), "tmp": str(tmp), **{n: str(tmp / n) for n in names}}


def snapshot(folder: Path) -> dict[str, bytes | None]:
    """Every entry below ``folder`` with a regular file's bytes (None for others)."""
    out: dict[str, bytes | None] = {}
    for path in sorted(folder.rglob("*")):
        regular = (
            path.is_file() and not path.is_symlink() and not stat.S_ISFIFO(path.lstat().st_mode)
        )
        out[str(path.relative_to(folder))] = path.read_bytes() if regular else None
    return out


@pytest.mark.parametrize(
    ("name", "argv", "code", "fragment"), corpus(), ids=[c[0] for c in corpus()]
)
def test_corpus_case(tmp_path, capsys, name, argv, code, fragment) -> None:
    where = places(tmp_path)
    before = snapshot(tmp_path)
    args = [part.format(**where) for part in shlex.split(argv)]
    assert main(args) == code
    err = capsys.readouterr().err
    assert "Traceback" not in err
    if fragment != "-":
        assert fragment in err
    assert not (tmp_path / "PROBE").exists()
    for device in ("/dev/null", "/dev/zero"):
        assert stat.S_ISCHR(os.stat(device).st_mode)
    after = snapshot(tmp_path)
    if code == 2:
        assert after == before, name
    else:
        assert {k: v for k, v in after.items() if k in before} == before
        assert not [k for k in after if Path(k).name.startswith(".")]


def test_the_corpus_covers_refusals_and_acceptances() -> None:
    codes = [c[2] for c in corpus()]
    assert codes.count(2) >= 20 and codes.count(0) >= 3
