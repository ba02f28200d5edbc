"""Dependency floors that keep known security flaws out (issue 22 item 3)."""

from __future__ import annotations

import re
from pathlib import Path

from packaging.requirements import Requirement
from packaging.version import Version

PYPROJECT = Path(__file__).resolve().parents[1] / "pyproject.toml"
# CVE-2023-47248: arbitrary code execution when reading crafted IPC/Feather/Parquet data,
# fixed in pyarrow 14.0.1 (Apache Arrow security advisory, November 2023; from memory).
PYARROW_FIXED = Version("14.0.1")


def requirement(name: str) -> Requirement:
    """The quoted requirement of ``name`` in pyproject.toml (tomllib needs Python 3.11)."""
    text = PYPROJECT.read_text(encoding="utf-8")
    (found,) = re.findall(rf'^\s*"({re.escape(name)}[<>=!~ ][^"]*)"', text, flags=re.MULTILINE)
    return Requirement(found)


def test_no_pyarrow_release_with_cve_2023_47248_is_admitted() -> None:
    spec = requirement("pyarrow").specifier
    for flawed in ("14.0.0", "13.0.0", "0.14.0"):
        assert not spec.contains(flawed), flawed
    assert spec.contains(PYARROW_FIXED)
