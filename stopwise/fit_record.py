"""What a result JSON must carry to be used again without refitting: the model spec with
its options, the data fingerprint, and the formulas (stopwise.saved reads it back)."""

from __future__ import annotations

import dataclasses
import hashlib
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from stopwise.models.base import Model
from stopwise.models.spec import DEFAULT_OPTIONS

RECORDED_OPTIONS = (*DEFAULT_OPTIONS, "level", "level0")
PLAIN = (str, int, float, bool)


def model_options(model: Model) -> dict[str, Any]:
    """The model's user-settable options (models.spec.DEFAULT_OPTIONS, level, level0) with
    plain values that differ from the defaults; build_model(name, **these) rebuilds it."""
    options = model.options or {}
    out = {}
    for key in RECORDED_OPTIONS:
        value = options.get(key)
        if value is None or isinstance(value, np.generic):
            value = None if value is None else value.item()
        if value is None or not isinstance(value, PLAIN):
            continue
        if key in DEFAULT_OPTIONS and value == DEFAULT_OPTIONS[key]:
            continue
        out[key] = value
    return out


def bundle_fingerprint(bundle: Any) -> str:
    """SHA-256 over every array of a data bundle (field name, dtype, shape and bytes, in
    field order; covariates by sorted name): equal for the same rows in the same order."""
    digest = hashlib.sha256()
    for item in dataclasses.fields(bundle):
        value = getattr(bundle, item.name)
        pairs = sorted(value.items()) if isinstance(value, Mapping) else [("", value)]
        for key, part in pairs:
            if part is None:
                continue
            array = np.asarray(part)
            if array.dtype == object:
                array = array.astype(str)
            digest.update(f"{item.name}/{key}/{array.dtype.str}/{array.shape}".encode())
            digest.update(np.ascontiguousarray(array).tobytes())
    return digest.hexdigest()


def fit_record(
    model: Model,
    bundle: Any,
    formulas: Sequence[str] | Mapping[str, str] | None = None,
    fixed: Mapping[str, float] | None = None,
) -> dict[str, Any]:
    """{"spec": {"model", "options", "formulas", "fixed"}, "data_sha256"} for a result."""
    if isinstance(formulas, Mapping):
        formulas = [f"{k} ~ {v}" for k, v in formulas.items()]
    return {
        "spec": {
            "model": model.name,
            "options": model_options(model),
            "formulas": list(formulas or []),
            "fixed": {k: float(v) for k, v in (fixed or {}).items()},
        },
        "data_sha256": bundle_fingerprint(bundle),
    }
