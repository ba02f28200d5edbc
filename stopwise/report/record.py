"""The reproducibility record of a report: stopwise and library versions, seeds, the exact
command or call, the SHA-256 of each input file, the date (UTC) and the machine."""

from __future__ import annotations

import datetime as dt
import hashlib
import importlib.metadata as md
import os
import platform
import shlex
from collections.abc import Sequence
from pathlib import Path
from typing import Any

LIBRARIES = (
    "stopwise",
    "numpy",
    "scipy",
    "pandas",
    "jax",
    "jaxlib",
    "numpyro",
    "arviz",
    "statsmodels",
    "patsy",
    "matplotlib",
)
CHUNK = 1 << 20


def file_sha256(path: str | os.PathLike[str]) -> str:
    """Hex SHA-256 of the file's bytes (read in 1 MiB chunks)."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(CHUNK), b""):
            digest.update(block)
    return digest.hexdigest()


def library_versions() -> dict[str, str]:
    """Python and the installed version of each library in LIBRARIES."""
    out = {"python": platform.python_version()}
    for name in LIBRARIES:
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            out[name] = "not installed"
    return out


def machine() -> dict[str, str]:
    """The platform, processor architecture and number of processors (no host name)."""
    return {
        "platform": platform.platform(),
        "architecture": platform.machine(),
        "processors": str(os.cpu_count()),
    }


def command_text(argv: Sequence[str] | None, call: str | None) -> str:
    """The command line, quoted so that it can be pasted into a shell, or the Python call."""
    if argv is not None:
        return shlex.join(["stopwise", *argv])
    return call or "(not recorded)"


def reproducibility_record(
    inputs: Sequence[str | os.PathLike[str]],
    seeds: dict[str, Any],
    argv: Sequence[str] | None = None,
    call: str | None = None,
    now: dt.datetime | None = None,
) -> dict[str, Any]:
    """Everything needed to run the same analysis again (module docstring)."""
    moment = now or dt.datetime.now(dt.timezone.utc)
    return {
        "command": command_text(argv, call),
        "inputs": [{"file": str(p), "sha256": file_sha256(p)} for p in inputs if Path(p).is_file()],
        "seeds": dict(seeds),
        "versions": library_versions(),
        "date": moment.isoformat(timespec="seconds"),
        "machine": machine(),
    }
