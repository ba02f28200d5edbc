"""Shared fixtures. ``import stopwise`` first, so JAX runs in float64 everywhere.

The test session runs with the persistent compilation cache switched off (inherited by the
command-line subprocesses the tests start): a run must not depend on programs another
process compiled, and reading a cached program compiled by another process crashed a run
with a segmentation fault inside JAX (twice, in test_report's contest section, with a
fresh cache of the session's own too). ``STOPWISE_CACHE_DIR`` set by the caller is left as
it is; tests/test_compile_cache.py checks the cache itself.

It also compiles with XLA's backend optimisation level 0 (``XLA_FLAGS`` unset by the
caller only; inherited by the subprocesses too): the suite compiles about 9,500 programs
once each and runs most of them once, so compiling them takes far longer than running them.
Measured on 2 cores with two pytest workers: 925 s at level 0 against 1,238 s at the
default level, every test passing at both. The optimised programs users run are what
``make bench`` and ``make demo`` time (they leave ``XLA_FLAGS`` alone); the numbers the
tests check are tolerances that hold at either level. stopwise's own XLA flag (the older CPU
code emitters, stopwise/_xla_flags.py) is added on top, as in every process that imports
stopwise: at level 0 it took the suite from 734 s to 421 s (XLA compile time summed over
the programs 832 s -> 322 s).
"""

from __future__ import annotations

import os
from pathlib import Path

if "STOPWISE_CACHE_DIR" not in os.environ:  # before stopwise (or JAX) is imported
    os.environ["STOPWISE_CACHE_DIR"] = "off"
if "XLA_FLAGS" not in os.environ:  # read when JAX starts its CPU backend
    os.environ["XLA_FLAGS"] = "--xla_backend_optimization_level=0"

import pandas as pd
import pytest

import stopwise  # noqa: F401

BAD_FILES = Path(__file__).with_name("bad_files")


@pytest.fixture(scope="session")
def bad_files_dir() -> Path:
    """The corpus of bad data files (see tests/bad_files/README.md)."""
    return BAD_FILES


@pytest.fixture
def decision_frame() -> pd.DataFrame:
    """A tiny valid decision-level frame: two subjects, four trials, solo and contest."""
    rows = [
        # subject, trial, step, p, gain, action, outcome, task, group, n_players, prize, keep, age
        ("a", 1, 0, 0.9, 1.0, "draw", "success", "solo", None, 1, 0.0, 1, 30),
        ("a", 1, 1, 0.9, 1.0, "draw", "success", "solo", None, 1, 0.0, 1, 30),
        ("a", 1, 2, 0.9, 1.0, "stop", None, "solo", None, 1, 0.0, 1, 30),
        ("a", 2, 0, 0.8, 2.0, "draw", "bust", "contest", "g1", 2, 10.0, 0, 30),
        ("b", 1, 0, 0.9, 1.0, "stop", None, "solo", None, 1, 0.0, 1, 41),
        ("b", 2, 0, 0.8, 2.0, "draw", "success", "contest", "g1", 2, 10.0, 0, 41),
        ("b", 2, 1, 0.8, 2.0, "stop", None, "contest", "g1", 2, 10.0, 0, 41),
    ]
    columns = [
        "subject",
        "trial",
        "step",
        "p_survive",
        "gain",
        "action",
        "outcome",
        "task",
        "group",
        "n_players",
        "prize",
        "keep_bank",
        "age",
    ]
    return pd.DataFrame(rows, columns=columns)


@pytest.fixture(scope="session")
def small_demo() -> dict[str, pd.DataFrame]:
    """The demo data with 12 subjects (fast)."""
    from stopwise.demo import demo_data

    return demo_data(n_subjects=12)


@pytest.fixture(autouse=True, scope="module")
def _release_compiled_programs():
    """After each test module, drop JAX's compiled programs: the suite compiles thousands,
    and the kept executables' memory mappings ran into Linux's per-process limit late in a
    clean-clone run (a segmentation fault inside XLA's compiler in test_report.py)."""
    yield
    import jax

    jax.clear_caches()
