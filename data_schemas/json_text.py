"""Result objects as JSON text: numpy, pandas and JAX values become plain JSON types, NaN
and inf become null. Below both the engines (``Fit.to_json``, ``Posterior.to_json``) and the
face (``stopwise._io.write_json``), so neither reaches into the other."""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np
import pandas as pd


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
    """The JSON text of ``obj`` (indented, NaN and inf as null, a final newline)."""
    return json.dumps(_jsonable(obj), indent=2, allow_nan=False) + "\n"
