"""A persistent on-disk cache of compiled JAX programs, so that a second run of the same fit
(a new Python process, e.g. the next ``stopwise fit`` on the command line) loads its compiled
likelihood instead of compiling it again.

The cache is JAX's own (``jax_compilation_cache_dir``); stopwise only chooses its place:

* ``STOPWISE_CACHE_DIR`` set to a path: that folder; set to ``off`` (or ``0``, ``none``, the
  empty string): no persistent cache;
* unset: ``$XDG_CACHE_HOME/stopwise/jax-<key>`` (default ``~/.cache/stopwise/jax-<key>``),
  where ``<key>`` names the JAX version and the processor (model name and instruction-set
  flags), so that a home folder shared by different machines never loads a program compiled
  for another processor;
* a cache directory the user configured for JAX itself (``JAX_COMPILATION_CACHE_DIR`` or
  ``jax.config``) is left alone.

JAX loads compiled programs from this folder and runs them, so the folder must not be
writable by anyone else: a folder that is group- or world-writable, or owned by another
user, is not used, with a warning (``cache_folder_problem``; its parent folders are not
checked). New cache folders are created with mode 0o700.

Only programs that took at least ``MIN_COMPILE_SECONDS`` to compile are stored, and JAX
evicts the least recently used entries beyond ``MAX_CACHE_BYTES``.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import os
import platform
import stat
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

# 0.5 s, not lower: with 0.1 s a test session read back a small cached program (a Newton
# solve with a least-squares step) and crashed inside JAX with a segmentation fault (not
# reproduced alone; under investigation, see the closing note of the fourth session)
MIN_COMPILE_SECONDS = 0.5
MAX_CACHE_BYTES = 1 << 30  # 1 GiB
OFF_VALUES = ("", "0", "off", "none", "false", "no")


def processor_fingerprint() -> str:
    """A short hash of the processor model and its instruction-set flags (Linux), or of
    platform.processor() and platform.machine() elsewhere."""
    text = f"{platform.machine()} {platform.processor()}"
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as handle:
            lines = [
                line.strip()
                for line in handle
                if line.startswith(("model name", "flags", "Features", "CPU part"))
            ]
        text += " " + " ".join(sorted(set(lines)))
    except OSError:
        pass
    return hashlib.sha256(text.encode()).hexdigest()[:12]


def default_cache_dir(environ: Mapping[str, str]) -> Path:
    """$XDG_CACHE_HOME (or ~/.cache) / stopwise / jax-<jax version>-<processor hash>."""
    base = environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    version = importlib.metadata.version("jax")  # without importing JAX (start-up speed)
    return Path(base) / "stopwise" / f"jax-{version}-{processor_fingerprint()}"


def chosen_cache_dir(environ: Mapping[str, str], jax_setting: str | None) -> Path | None:
    """The folder the settings above choose from the environment and JAX's own setting, or
    None for no stopwise-managed cache."""
    if environ.get("JAX_COMPILATION_CACHE_DIR") or jax_setting:
        return None
    setting = environ.get("STOPWISE_CACHE_DIR")
    if setting is not None:
        return None if setting.strip().lower() in OFF_VALUES else Path(setting).expanduser()
    return default_cache_dir(environ)


def cache_folder_problem(folder: Path) -> str | None:
    """Why ``folder`` is unsafe for compiled programs (writable by group or others, or
    owned by another user), or None when it is safe."""
    info = os.stat(folder)
    if info.st_mode & (stat.S_IWGRP | stat.S_IWOTH):
        return f"it is writable by {'others' if info.st_mode & stat.S_IWOTH else 'its group'}"
    if hasattr(os, "geteuid") and info.st_uid != os.geteuid():
        return f"it belongs to another user (uid {info.st_uid})"
    return None


def enable_compilation_cache(config: Any) -> Path | None:
    """Point JAX's persistent compilation cache (``config`` is ``jax.config``) at
    chosen_cache_dir(); returns the folder, or None when no cache is set up (switched off,
    set by the user, not writable, or unsafe: cache_folder_problem, with a warning). Called by stopwise/_jax_setup.py once JAX is
    imported."""
    folder = chosen_cache_dir(os.environ, config.jax_compilation_cache_dir)
    if folder is None:
        return None
    try:
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
    except OSError:
        return None
    if not os.access(folder, os.W_OK):
        return None
    problem = cache_folder_problem(folder)
    if problem is not None:
        warnings.warn(
            f"stopwise: not using the compilation cache {folder}: {problem}, and compiled "
            "programs are loaded from it (make it private: chmod go-w, or set "
            "STOPWISE_CACHE_DIR to a folder of your own)",
            stacklevel=2,
        )
        return None
    config.update("jax_compilation_cache_dir", str(folder))
    config.update("jax_persistent_cache_min_compile_time_secs", MIN_COMPILE_SECONDS)
    config.update("jax_compilation_cache_max_size", MAX_CACHE_BYTES)
    return folder
