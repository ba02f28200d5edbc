"""Atomic output: every file is written to a temporary sibling and renamed into place,
so a failure never leaves a partial file and input files are never touched."""

from __future__ import annotations

import json
import math
import os
import sys
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd


def write_atomic(path: str | os.PathLike[str], data: str | bytes) -> Path:
    """Write ``data`` to ``path`` atomically (temp file in the same folder, then rename)."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    mode = "wb" if isinstance(data, bytes) else "w"
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    try:
        with os.fdopen(fd, mode, **({} if mode == "wb" else {"encoding": "utf-8"})) as fh:
            fh.write(data)
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return target


def _jsonable(value: Any) -> Any:
    """Convert numpy/pandas/JAX values to plain JSON types; NaN and inf become null."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (pd.Series, pd.Index)):
        return [_jsonable(v) for v in value.tolist()]
    if hasattr(value, "shape") and hasattr(value, "tolist"):  # numpy / JAX arrays
        return _jsonable(np.asarray(value).tolist())
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    return value


def dumps_json(obj: Any) -> str:
    return json.dumps(_jsonable(obj), indent=2, allow_nan=False) + "\n"


def write_json(path: str | os.PathLike[str], obj: Any) -> None:
    """Write ``obj`` as JSON to ``path`` atomically, or to stdout when path is ``-``."""
    text = dumps_json(obj)
    if str(path) == "-":
        sys.stdout.write(text)
        sys.stdout.flush()
    else:
        write_atomic(path, text)


def write_table(path: str | os.PathLike[str], frame: pd.DataFrame) -> Path:
    """Write a DataFrame atomically as CSV or Parquet (by the file ending)."""
    target = Path(path)
    if target.suffix.lower() in (".parquet", ".pq"):
        import io

        buffer = io.BytesIO()
        frame.to_parquet(buffer, index=False)
        return write_atomic(target, buffer.getvalue())
    return write_atomic(target, frame.to_csv(index=False))
