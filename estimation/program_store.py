"""Traced programs that survive the process: a folder of serialised JAX programs
(``jax.export``), so that a later process (the next ``stopwise fit``, a Dask worker of a
study) neither traces nor lowers the likelihood programs of a model it has met before.

JAX's persistent compilation cache (stopwise/_compile_cache.py) skips only the XLA
compilation; tracing the Python code of a model and lowering it cost a fresh process about
as much again. Here ``call_stored(name, program, rows, *args)`` computes
``program(rows, *args)`` (``program`` jitted with ``rows`` static) through a serialised
StableHLO module kept under a key naming

* what is computed (``name``) and the row function's structure (``rows.program_key()``:
  the model, its options and static sizes, the free and fixed parameters);
* the argument pytree (its structure, e.g. the horizon of a stopping bundle) and every
  argument's shape and dtype (the padded data size);
* the JAX and jaxlib versions, whether 64-bit floats are on, and a SHA-256 over the source
  of stopwise's engines and models (``code_fingerprint``), so a change of the code misses.

A row function without ``program_key`` (a user-written model, contest models, mixtures) or
an argument being traced (a call inside another compiled program) calls the program
directly. An entry file is ``MAGIC``, one JSON line (the full key, the payload's SHA-256 and
length) and the payload (``Exported.serialize()``, a flatbuffer: no pickle). It is used only
when its key equals the one asked for and its payload hashes right; anything else (a
truncated or corrupt file, a foreign JAX version, a hash collision) is counted in
``COUNTS["rejected"]``, rebuilt and overwritten. Files are written to a temporary name and
renamed (atomic); the folder is created private (0o700) and refused when others may write
it. The folder is ``STOPWISE_PROGRAM_DIR`` (a path, or ``off``), else the ``programs``
subfolder of JAX's compilation cache folder, else none (no store).

The XLA step of a loaded program still runs in each process, and is itself served by the
persistent compilation cache when it took over 0.5 s.
"""

from __future__ import annotations

import hashlib
import json
import os
import stat
import tempfile
from collections.abc import Callable
from functools import lru_cache
from pathlib import Path
from typing import Any

import jax
import jaxlib
import numpy as np
from jax import export

import stopwise.data_schemas
import stopwise.models

MAGIC = b"stopwise exported program, format 1\n"
SUBFOLDER = "programs"
MAX_ENTRIES = 256  # beyond this, the least recently used entries are deleted
OFF_VALUES = ("", "0", "off", "none", "false", "no")
COUNTS = {"loaded": 0, "built": 0, "rejected": 0, "direct": 0}
_IN_PROCESS: dict[str, Callable[..., Any]] = {}
_KEYS: dict[tuple[Any, ...], str] = {}  # call signature -> program_key text


def store_folder(environ: Any = None) -> Path | None:
    """STOPWISE_PROGRAM_DIR (a path, or an off value), else <JAX compilation cache>/programs,
    else None."""
    environ = os.environ if environ is None else environ
    setting = environ.get("STOPWISE_PROGRAM_DIR")
    if setting is not None:
        return None if setting.strip().lower() in OFF_VALUES else Path(setting).expanduser()
    base = jax.config.jax_compilation_cache_dir
    return Path(base) / SUBFOLDER if base else None


def folder_is_private(folder: Path) -> bool:
    """The folder exists, is ours and is writable by neither its group nor others (programs
    are loaded from it)."""
    info = os.stat(folder)
    if info.st_mode & (stat.S_IWGRP | stat.S_IWOTH):
        return False
    return not (hasattr(os, "geteuid") and info.st_uid != os.geteuid())


def ready_folder() -> Path | None:
    """store_folder(), created private when missing; None when unset, not creatable or not
    private."""
    folder = store_folder()
    if folder is None:
        return None
    try:
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
    except OSError:
        return None
    return folder if folder_is_private(folder) and os.access(folder, os.W_OK) else None


@lru_cache(maxsize=1)
def code_fingerprint() -> str:
    """SHA-256 over (relative path, bytes) of every .py file of the engines, the models and
    the data bundles (the code a traced program comes from)."""
    digest = hashlib.sha256()
    packages = (stopwise.data_schemas, stopwise.models, Path(__file__).parent)
    for package in packages:
        root = package if isinstance(package, Path) else Path(package.__file__).parent
        for path in sorted(root.rglob("*.py")):
            digest.update(f"{root.name}/{path.relative_to(root)}\n".encode())
            digest.update(path.read_bytes())
    return digest.hexdigest()


def leaf_spec(leaf: Any) -> jax.ShapeDtypeStruct:
    """Shape and dtype of one argument leaf (numpy, JAX or a Python scalar), no transfer."""
    dtype = leaf.dtype if hasattr(leaf, "dtype") else np.asarray(leaf).dtype
    return jax.ShapeDtypeStruct(np.shape(leaf), dtype)


def leaf_signature(leaf: Any) -> tuple[tuple[int, ...], Any]:
    """(shape, dtype) of one argument leaf, hashable: what its program depends on."""
    return np.shape(leaf), leaf.dtype if hasattr(leaf, "dtype") else np.asarray(leaf).dtype


def leaf_specs(leaves: list[Any]) -> list[jax.ShapeDtypeStruct]:
    return [leaf_spec(leaf) for leaf in leaves]


def program_key(name: str, rows_key: str, treedef: Any, specs: list[Any]) -> str:
    """The key text (JSON) of one program; see the module docstring."""
    return json.dumps(
        {
            "what": name,
            "rows": rows_key,
            "tree": str(treedef),
            "shapes": [[list(s.shape), str(s.dtype)] for s in specs],
            "jax": jax.__version__,
            "jaxlib": jaxlib.__version__,
            "x64": bool(jax.config.jax_enable_x64),
            "code": code_fingerprint(),
        },
        sort_keys=True,
    )


def entry_path(folder: Path, key: str) -> Path:
    return folder / f"{hashlib.sha256(key.encode()).hexdigest()[:32]}.program"


def entry_bytes(key: str, payload: bytes) -> bytes:
    """MAGIC, a JSON header line {key, sha256, bytes} and the payload."""
    header = {"key": key, "sha256": hashlib.sha256(payload).hexdigest(), "bytes": len(payload)}
    return MAGIC + json.dumps(header).encode() + b"\n" + payload


def payload_of(blob: bytes, key: str) -> bytes | None:
    """The payload of an entry whose key is ``key`` and whose payload hashes right, else
    None (a foreign, truncated or corrupt entry)."""
    if not blob.startswith(MAGIC):
        return None
    line_end = blob.find(b"\n", len(MAGIC))
    if line_end < 0:
        return None
    try:
        header = json.loads(blob[len(MAGIC) : line_end])
    except ValueError:
        return None
    payload = blob[line_end + 1 :]
    if not isinstance(header, dict) or header.get("key") != key:
        return None
    if header.get("bytes") != len(payload):
        return None
    return payload if hashlib.sha256(payload).hexdigest() == header.get("sha256") else None


def write_atomically(path: Path, data: bytes) -> None:
    """Write to a temporary file in the same folder, then rename over ``path``."""
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=".tmp-", suffix=".program")
    try:
        with os.fdopen(handle, "wb") as out:
            out.write(data)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


def evict_oldest(folder: Path, keep: int = MAX_ENTRIES) -> None:
    """Delete the least recently used entries (by modification time, refreshed on every
    load) beyond ``keep``."""
    entries = []
    for path in folder.glob("*.program"):
        try:  # another process (a Dask worker) may delete or replace it meanwhile
            entries.append((path.stat().st_mtime, path))
        except OSError:
            continue
    entries.sort()
    for _, path in entries[: max(len(entries) - keep, 0)]:
        path.unlink(missing_ok=True)


def load_entry(path: Path, key: str, specs: list[Any]) -> export.Exported | None:
    """The stored program under ``key``, or None (missing; or rejected: counted)."""
    try:
        blob = path.read_bytes()
    except OSError:
        return None
    payload = payload_of(blob, key)
    try:
        program = None if payload is None else export.deserialize(bytearray(payload))
    except Exception:  # a payload JAX cannot read is rebuilt like a corrupt one
        program = None
    if program is None or list(program.in_avals) != [
        jax.core.ShapedArray(s.shape, s.dtype) for s in specs
    ]:
        COUNTS["rejected"] += 1
        return None
    try:
        os.utime(path)  # recently used: evicted last
    except OSError:
        pass
    COUNTS["loaded"] += 1
    return program


def build_entry(
    path: Path, key: str, program: Callable[..., Any], rows: Any, treedef: Any, specs: list[Any]
) -> export.Exported | None:
    """Trace and lower program(rows, *args) on the argument leaves, store it, return it; None
    when JAX cannot export it (e.g. a host callback, a custom call outside JAX's stable
    list): the caller then runs the program directly. A folder that refuses the write
    leaves the program in memory only."""

    def on_leaves(*leaves: Any) -> Any:
        return program(rows, *jax.tree_util.tree_unflatten(treedef, leaves))

    try:
        exported = export.export(jax.jit(on_leaves))(*specs)
        payload = exported.serialize()
    except Exception:  # not exportable: never a reason for a fit to fail
        return None
    try:
        write_atomically(path, entry_bytes(key, payload))
        evict_oldest(path.parent)
    except OSError:
        pass
    COUNTS["built"] += 1
    return exported


def call_stored(name: str, program: Callable[..., Any], rows: Any, *args: Any) -> Any:
    """program(rows, *args), through the stored program of its key (module docstring)."""
    describe = getattr(rows, "program_key", None)
    rows_key = describe() if callable(describe) else None
    leaves, treedef = jax.tree_util.tree_flatten(args)
    if rows_key is None or any(isinstance(leaf, jax.core.Tracer) for leaf in leaves):
        COUNTS["direct"] += 1
        return program(rows, *args)
    signature = (name, rows_key, treedef, tuple(leaf_signature(leaf) for leaf in leaves))
    key = _KEYS.get(signature)
    if key is None:  # the key's JSON (and its code fingerprint) once per signature
        key = _KEYS[signature] = program_key(name, rows_key, treedef, leaf_specs(leaves))
    compiled = _IN_PROCESS.get(key)
    if compiled is None:
        specs = leaf_specs(leaves)
        folder = ready_folder()
        if folder is None:
            COUNTS["direct"] += 1
            return program(rows, *args)
        path = entry_path(folder, key)
        exported = load_entry(path, key, specs)
        if exported is None:
            exported = build_entry(path, key, program, rows, treedef, specs)
        if exported is None:
            COUNTS["direct"] += 1
            return program(rows, *args)
        compiled = _IN_PROCESS[key] = jax.jit(exported.call)
    return compiled(*leaves)
