"""Who is simulated: per-subject parameters for ``stopwise simulate``.

Subject i's value of parameter q is

    q_i = base_q + sum_c b_{q,c} x_{i,c}

where base_q is the subject's row of ``--params FILE`` (one row per subject), else the
``--set`` value, else the model's start value; x_{i,c} is subject i's value of covariate c
(``--covariate c=v1,v2,...``) and b_{q,c} the effect ``--effect q:c=b``, both on the natural
scale of q. Covariate values are assigned to subjects in turn over the full factorial of all
covariates (subject i gets combination (i - 1) mod K of K combinations, in the order of
itertools.product), so each combination is used equally often when K divides the number of
subjects.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError


def parse_number(text: str, where: str) -> float:
    """A finite number or an input error naming ``where``."""
    try:
        value = float(text)
    except ValueError:
        raise StopwiseInputError(f"{where}: {text!r} is not a number") from None
    if not math.isfinite(value):
        raise StopwiseInputError(f"{where}: the value must be finite, got {text!r}")
    return value


def parse_covariates(items: Sequence[str]) -> dict[str, list[float]]:
    """['treatment=0,1'] -> {'treatment': [0.0, 1.0]}."""
    out: dict[str, list[float]] = {}
    for item in items:
        name, sep, text = item.partition("=")
        name = name.strip()
        if not sep or not name or not text.strip():
            raise StopwiseInputError(
                f"--covariate {item!r}: expected NAME=V1,V2,..., e.g. --covariate treatment=0,1"
            )
        if name in out:
            raise StopwiseInputError(f"--covariate {name} is given twice")
        out[name] = [parse_number(v, f"--covariate {item!r}") for v in text.split(",")]
    return out


def parse_effects(items: Sequence[str]) -> dict[tuple[str, str], float]:
    """['r:treatment=0.1'] -> {('r', 'treatment'): 0.1}."""
    out: dict[tuple[str, str], float] = {}
    for item in items:
        left, sep, text = item.partition("=")
        param, colon, covariate = left.partition(":")
        if not sep or not colon or not param.strip() or not covariate.strip():
            raise StopwiseInputError(
                f"--effect {item!r}: expected PARAM:COVARIATE=VALUE, e.g. --effect r:treatment=0.1"
            )
        out[(param.strip(), covariate.strip())] = parse_number(text, f"--effect {item!r}")
    return out


def covariate_table(
    subjects: Sequence[object], covariates: Mapping[str, list[float]]
) -> pd.DataFrame:
    """One row per subject with each covariate's value (module docstring: assigned in turn
    over the full factorial)."""
    names = list(covariates)
    combos = list(itertools.product(*(covariates[n] for n in names))) or [()]
    rows = [combos[i % len(combos)] for i in range(len(subjects))]
    table = pd.DataFrame(rows, columns=names) if names else pd.DataFrame(index=range(len(subjects)))
    for name in names:  # whole-number covariates (0/1 treatments) stay whole numbers
        if np.all(np.mod(table[name].to_numpy(dtype=np.float64), 1.0) == 0.0):
            table[name] = table[name].astype(np.int64)
    table.insert(0, "subject", list(subjects))
    return table


def read_params_file(path: str, param_names: Sequence[str]) -> pd.DataFrame:
    """The ``--params`` CSV: a ``subject`` column and one column per parameter, one row per
    subject; every problem is an input error naming the file, line and column."""
    source = Path(path)
    if not source.is_file():
        raise StopwiseInputError(f"--params {path}: no such file")
    try:
        frame = pd.read_csv(source, dtype={"subject": str})
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise StopwiseInputError(f"{path}: not a readable CSV file ({exc})") from None
    if "subject" not in frame.columns:
        raise StopwiseInputError(f"{path}, line 1: expected a column 'subject'")
    unknown = [c for c in frame.columns if c != "subject" and c not in param_names]
    if unknown:
        raise StopwiseInputError(
            f"{path}, line 1, column '{unknown[0]}': not a parameter of the model; expected "
            f"subject and some of {', '.join(param_names)}"
        )
    if len(frame) == 0:
        raise StopwiseInputError(f"{path}: no subject rows")
    duplicated = np.flatnonzero(frame["subject"].duplicated().to_numpy())
    if duplicated.size:
        row = int(duplicated[0])
        raise StopwiseInputError(
            f"{path}, line {row + 2}, column 'subject': {frame['subject'].iloc[row]!r} "
            "appears twice; expected one row per subject"
        )
    for column in frame.columns:
        if column == "subject":
            continue
        values = pd.to_numeric(frame[column], errors="coerce").to_numpy(dtype=np.float64)
        bad = np.flatnonzero(~np.isfinite(values))
        if bad.size:
            row = int(bad[0])
            raise StopwiseInputError(
                f"{path}, line {row + 2}, column '{column}': expected a number, got "
                f"{frame[column].iloc[row]!r}"
            )
        frame[column] = values
    return frame


def subject_parameters(
    subjects: Sequence[object],
    base: Mapping[str, float],
    per_subject: pd.DataFrame | None,
    covariates: pd.DataFrame,
    effects: Mapping[tuple[str, str], float],
) -> pd.DataFrame:
    """One row per subject: ``subject`` and every parameter of ``base`` (module docstring);
    ``base`` maps every model parameter to its common value."""
    table = pd.DataFrame({"subject": list(subjects)})
    for name, value in base.items():
        table[name] = float(value)
    if per_subject is not None:
        rows = per_subject.set_index("subject").reindex(table["subject"].astype(str))
        for name in per_subject.columns.drop("subject"):
            table[name] = rows[name].to_numpy()
    for (param, covariate), slope in effects.items():
        table[param] = table[param] + slope * covariates[covariate].to_numpy(dtype=np.float64)
    return table


def check_effects(
    effects: Mapping[tuple[str, str], float],
    param_names: Sequence[str],
    covariates: Mapping[str, list[float]],
) -> None:
    """Each effect names a model parameter and a declared covariate."""
    for param, covariate in effects:
        if param not in param_names:
            raise StopwiseInputError(
                f"--effect {param}:{covariate}: {param} is not a parameter of the model; "
                f"its parameters are {', '.join(param_names)}"
            )
        if covariate not in covariates:
            raise StopwiseInputError(
                f"--effect {param}:{covariate}: declare the covariate with "
                f"--covariate {covariate}=V1,V2,..."
            )
