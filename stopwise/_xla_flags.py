"""XLA compiler flags stopwise adds to ``XLA_FLAGS`` before JAX starts its CPU backend.

One flag: ``--xla_cpu_use_fusion_emitters=false``, XLA's older CPU code emitters instead of
its fusion emitters. stopwise compiles one program per model, data size and task (a
multistart, its standard errors, a sampler), and a researcher's first run of a fit pays
their compilation. Measured on 2 cores (December 2026, jaxlib 0.10.2, persistent cache off):
the 12-subject demo 121-122 s -> 89-99 s; a first pooled crra+planner+logit fit on 120
subjects 3.5-3.8 s -> 2.1 s; a refit with compiled programs 0.14-0.21 s either way; one
hierarchical gradient 1.0-1.3 ms either way; log-likelihoods equal to 1e-15 relative. The
test suite compiles about 9,500 programs: 832 s -> 322 s of XLA time.

Rules:

* a flag the user's ``XLA_FLAGS`` already names (with any value) is left as the user set it,
  so ``XLA_FLAGS=--xla_cpu_use_fusion_emitters=true`` restores XLA's default;
* the flag is added only for jaxlib 0.10 and later (checked on 0.10.2): XLA stops the process
  on a flag it does not know;
* it takes effect only when JAX has not started its CPU backend yet (``import stopwise``
  before the first JAX computation, as the command line and Dask workers do); otherwise it
  changes nothing.
"""

from __future__ import annotations

import importlib.metadata
from collections.abc import MutableMapping, Sequence

STOPWISE_XLA_FLAGS = ("--xla_cpu_use_fusion_emitters=false",)
FIRST_JAXLIB_WITH_FLAGS = (0, 10)


def flag_name(flag: str) -> str:
    """``--name=value`` -> ``name`` (leading dashes and the value dropped)."""
    return flag.lstrip("-").split("=")[0]


def merged_flags(existing: str, wanted: Sequence[str]) -> str:
    """``existing`` followed by each flag of ``wanted`` whose name it does not name."""
    flags = existing.split()
    named = {flag_name(f) for f in flags}
    flags += [f for f in wanted if flag_name(f) not in named]
    return " ".join(flags)


def jaxlib_knows_flags(version: str) -> bool:
    """True when jaxlib ``version`` (e.g. "0.10.2") is FIRST_JAXLIB_WITH_FLAGS or later."""
    parts = []
    for part in version.split(".")[:2]:
        digits = "".join(ch for ch in part if ch.isdigit())
        parts.append(int(digits) if digits else 0)
    return tuple(parts) >= FIRST_JAXLIB_WITH_FLAGS


def installed_jaxlib_version() -> str | None:
    """jaxlib's version from its package metadata (without importing it), or None."""
    try:
        return importlib.metadata.version("jaxlib")
    except importlib.metadata.PackageNotFoundError:
        return None


def add_stopwise_xla_flags(environ: MutableMapping[str, str], jaxlib_version: str | None) -> None:
    """Set ``environ["XLA_FLAGS"]`` to merged_flags(its value, STOPWISE_XLA_FLAGS) when
    jaxlib_knows_flags(jaxlib_version); leave it alone otherwise."""
    if jaxlib_version is None or not jaxlib_knows_flags(jaxlib_version):
        return
    merged = merged_flags(environ.get("XLA_FLAGS", ""), STOPWISE_XLA_FLAGS)
    if merged != environ.get("XLA_FLAGS"):
        environ["XLA_FLAGS"] = merged
