"""The public verbs for estimation: ``fit``, ``compare`` and ``recover``.

They accept a model as a spec string ("crra+planner+logit") or a Model value, and data as a
file path, a DataFrame, a loaded Dataset or an array bundle; they wire the data loader, the
model builder and the estimation engines together.
"""

from __future__ import annotations

import functools
import hashlib
import os
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.partitioned import is_partitioned
from stopwise.data_schemas.sequential_state import sequential_game_key
from stopwise.estimation.ml.learning_check import learning_warnings
from stopwise.fit_checks import certify_fixed_points
from stopwise.fit_record import fit_record
from stopwise.models.base import Model

METHODS = ("mle", "bayes")


def resolve_model(model: str | Model, max_target: int | None = None) -> Model:
    """A Model from a spec string (stopwise.models.spec.build_model) or a Model as given."""
    if isinstance(model, Model):
        return model
    if not isinstance(model, str):
        raise StopwiseInputError(f"model must be a spec string or a Model, not {type(model)}")
    from stopwise.models.spec import build_model

    options = {} if max_target is None else {"max_target": int(max_target)}
    return build_model(model, **options)


@functools.lru_cache(maxsize=32)
def _shared_model(spec: str, max_target: int | None, data_key: bytes) -> Model:
    """One Model object per (spec, max_target, data_key): the engines' compiled programs are
    keyed by the model object, so spec strings naming the same model share them."""
    return resolve_model(spec, max_target)


def preparation_key(bundle: Any) -> bytes:
    """What a model's prepare() sizes its static parts from: the distinct (p_survive,
    contest) conditions of stopping data (a stopping model's planner and target caps, a
    contest model's cap on targets); lottery models prepare nothing."""
    if not isinstance(bundle, StoppingData):
        return type(bundle).__name__.encode()
    conditions = np.stack(
        [np.asarray(bundle.cond_p_survive, float), np.asarray(bundle.cond_contest, float)]
    )
    if bundle.cond_order is not None:  # sequential contests: their games size the model too
        conditions = np.concatenate([conditions, sequential_game_key(bundle)])
    return np.unique(conditions, axis=1).tobytes()


def design_key(design: pd.DataFrame) -> bytes:
    """A fingerprint of a study design (column names, dtypes, every value and the index):
    studies of one design share a Model, and with it the compiled programs of their
    replications; any other design gets a model of its own."""
    digest = hashlib.sha256(repr([(str(c), str(t)) for c, t in design.dtypes.items()]).encode())
    digest.update(pd.util.hash_pandas_object(design, index=True).to_numpy().tobytes())
    return b"design:" + digest.digest()


def model_for_data(model: str | Model, max_target: int | None, bundle: Any) -> Model:
    """resolve_model, with one shared Model per spec string and data conditions: a new
    model would be sized by prepare() exactly like the shared one, so sharing it changes no
    number and lets a refit reuse the compiled programs (_shared_model)."""
    if isinstance(model, str):
        return _shared_model(model, max_target, preparation_key(bundle))
    return resolve_model(model, max_target)


def resolve_data(
    data: Any, covariates: Sequence[str] = (), horizon: int | None = None
) -> tuple[Any, pd.DataFrame | None]:
    """(array bundle, aligned decision/lottery frame or None) from any accepted data form."""
    if isinstance(data, (StoppingData, LotteryData)):
        return data, None
    from stopwise.data_schemas.load import Dataset, load

    if is_partitioned(data):  # a folder or glob of Parquet files, gathered in memory
        from stopwise.partitioned import load_parts

        data = load_parts(data)

    if isinstance(data, (str, os.PathLike, pd.DataFrame, Dataset)):
        dataset = load(data)
        return dataset.arrays(horizon=horizon) if horizon else dataset.arrays(), dataset.frame
    raise StopwiseInputError(
        "data must be a file path (CSV or Parquet), a DataFrame, a loaded Dataset or an "
        f"array bundle, not {type(data).__name__}"
    )


CONTEST_PARTS = "nash, qre, aqre, levelk, ch"


def rows_for_model(model: Model, bundle: Any) -> np.ndarray | None:
    """Row positions the model explains, or None for all rows.

    Solo stopping models explain the solo decisions (task "solo") and contest models the
    contest decisions; a model of one data format fitted to another is refused.
    """
    kind = model.data_kind
    if isinstance(bundle, LotteryData):
        if kind != "lottery":
            raise StopwiseInputError(
                f"model {model.name} is a {kind} model but the data are lottery choices; "
                "lottery specs take a utility, an optional weighting and a noise rule, "
                "e.g. crra+logit or pt+tk+probit"
            )
        return None
    if kind == "lottery":
        raise StopwiseInputError(
            f"model {model.name} is a lottery model (binary lottery choices) but the data are stopping "
            "decisions; add a policy (target, myopic, planner), e.g. crra+planner+logit"
        )
    contest_row = np.asarray(bundle.cond_contest)[np.asarray(bundle.cond)] > 0.5
    wanted = contest_row if kind == "contest" else ~contest_row
    if not wanted.any():
        if kind == "contest":
            raise StopwiseInputError(
                f"model {model.name} explains contest play but the data hold no contest "
                "decisions (task = contest); use a solo policy such as crra+planner+logit"
            )
        raise StopwiseInputError(
            f"model {model.name} explains solo stopping but every decision in the data is "
            f"from a contest; name a play concept ({CONTEST_PARTS}), e.g. crra+qre"
        )
    return None if wanted.all() else np.flatnonzero(wanted)


def restrict_rows(bundle: StoppingData, rows: np.ndarray) -> StoppingData:
    """The bundle with only ``rows``; subject and trial indices renumbered 0..n-1."""
    sub = bundle.take(rows)
    subject_codes, subject = np.unique(np.asarray(sub.subject), return_inverse=True)
    trial_codes, trial = np.unique(np.asarray(sub.trial), return_inverse=True)
    labels = bundle.subject_labels
    trial_labels = bundle.trial_labels
    return replace(
        sub,
        subject=subject.astype(np.int32),
        trial=trial.astype(np.int32),
        subject_labels=None if labels is None else np.asarray(labels)[subject_codes],
        trial_labels=None if trial_labels is None else np.asarray(trial_labels)[trial_codes],
    )


def select_data(
    model: Model, bundle: Any, frame: pd.DataFrame | None
) -> tuple[Any, pd.DataFrame | None, list[str]]:
    """(bundle, frame, notes) restricted to the rows ``model`` explains (see rows_for_model)."""
    rows = rows_for_model(model, bundle)
    if rows is None:
        return bundle, frame, []
    left_out = bundle.n_obs - len(rows)
    what = "contest" if model.data_kind == "contest" else "solo"
    other = "solo" if what == "contest" else "contest"
    note = (
        f"fitted to the {len(rows)} {what} decisions; {left_out} {other} decisions are "
        f"left out ({other} play needs a "
        + (
            "solo policy such as crra+planner+logit)"
            if other == "solo"
            else f"play concept: {CONTEST_PARTS})"
        )
    )
    if frame is not None:
        frame = frame.iloc[rows].reset_index(drop=True)
    return restrict_rows(bundle, rows), frame, [note]


def prepare_model(model: Model, bundle: Any) -> list[str]:
    """Let a model size its static parts from concrete data (``options["prepare"]``) and
    return the warnings it raises (e.g. parameters the data cannot identify)."""
    prepare = model.options.get("prepare") if model.options else None
    if not callable(prepare):
        return []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        prepare(bundle)
    return list(dict.fromkeys(str(w.message) for w in caught))


def _attach(result: Any, notes: list[str], warned: list[str]) -> Any:
    """Add selection notes and model warnings to a result that carries such lists."""
    if notes and isinstance(getattr(result, "notes", None), list):
        result.notes.extend(notes)
    elif notes and isinstance(getattr(result, "warnings", None), list):
        result.warnings.extend(notes)
    if warned and isinstance(getattr(result, "warnings", None), list):
        result.warnings.extend(w for w in warned if w not in result.warnings)
    return result


def _check_method(method: str) -> None:
    if method not in METHODS:
        raise StopwiseInputError(f"unknown method {method!r}; choose one of {', '.join(METHODS)}")


def fit(
    model: str | Model,
    data: Any,
    *,
    method: str = "mle",
    se: str | None = "auto",
    by: str | None = None,
    formulas: Sequence[str] | Mapping[str, str] | None = None,
    max_target: int | None = None,
    seed: int = 0,
    **kw: Any,
) -> Any:
    """Fit ``model`` to ``data``. method="mle" (default): a Fit (or FitBySubject with
    by="subject"; a finite mixture with types=K); method="bayes":
    stopwise.estimation.bayes.fit.fit_bayes(model, data, **kw).
    ``se``: "auto" (clustered sandwich with several subjects), "robust", "hessian",
    "bootstrap" or None. ``formulas``: e.g. ["r ~ 1 + treatment"]. ``workers``/``scheduler``
    (estimation/distributed.py) say where a Parquet folder's parts and bootstrap chunks run."""
    _check_method(method)
    the_model = resolve_model(model, max_target)
    cluster = {k: kw.pop(k) for k in ("workers", "scheduler") if k in kw}
    part_notes: list[str] = []
    if is_partitioned(data):  # a folder or glob of Parquet files (stopwise/partitioned.py)
        from stopwise.partitioned import fit_parts

        parts = fit_parts(
            the_model, data, method=method, se=se, by=by, formulas=formulas, seed=seed,
            kw=kw, prepare=prepare_model, **cluster,
            shared=lambda bundle: model_for_data(model, max_target, bundle),
        )  # fmt: skip
        if parts.fit is not None:
            return _attach(parts.fit, [], parts.warnings)
        data, part_notes = parts.rows, parts.notes
    bundle, frame = resolve_data(data)
    bundle, frame, notes = select_data(the_model, bundle, frame)
    the_model = model_for_data(model, max_target, bundle)
    notes += part_notes
    notes += list((the_model.options or {}).get("notes", ()))
    warned = prepare_model(the_model, bundle)
    record = fit_record(the_model, bundle, formulas, kw.get("fixed"))
    result = _fit_selected(
        the_model, bundle, frame, method, se, by, formulas, seed, {**kw, **cluster}
    )
    if isinstance(getattr(result, "extras", None), dict):
        result.extras["record"] = record  # Fit.to_dict writes it; stopwise.load_result reads it
        certify_fixed_points(the_model, bundle, result)
        cap_in_use = (the_model.options or {}).get("cap_in_use")
        if callable(cap_in_use):
            result.extras["max_target"] = cap_in_use()  # the contest cap travels with the fit
    if (the_model.options or {}).get("learning") and method == "mle":
        warned += learning_warnings(result)
    return _attach(result, notes, warned)


def _fit_selected(
    the_model: Model,
    bundle: Any,
    frame: pd.DataFrame | None,
    method: str,
    se: str | None,
    by: str | None,
    formulas: Sequence[str] | Mapping[str, str] | None,
    seed: int,
    kw: dict[str, Any],
) -> Any:
    cluster = {k: kw.pop(k) for k in ("workers", "scheduler") if k in kw}  # bootstrap refits
    if method == "bayes":
        from stopwise.estimation.bayes.fit import fit_bayes
        from stopwise.estimation.ml.point_fits import ML_POINT_FITS

        if formulas:
            kw["formulas"] = formulas
        kw.setdefault("point_fits", ML_POINT_FITS)  # the Bayes wing starts from ML fits
        return fit_bayes(the_model, bundle, seed=seed, **kw)
    types = kw.pop("types", None)
    if types is not None:
        return _fit_types(the_model, bundle, types, se, by, formulas, seed, kw)
    if by not in (None, "subject"):
        raise StopwiseInputError(f"by must be 'subject' or None, not {by!r}")
    if by == "subject":
        if formulas:
            raise StopwiseInputError(
                "formulas and by='subject' cannot be combined: a "
                "per-subject fit already gives every subject its own "
                "parameters"
            )
        from stopwise.estimation.ml.by_subject import fit_by_subject

        return fit_by_subject(
            the_model, bundle, se="hessian" if se == "auto" else se, seed=seed, **kw
        )
    from stopwise.estimation.ml.identification import fit_identified

    return fit_identified(
        the_model,
        bundle,
        se=se,
        formulas=formulas,
        covariate_frame=frame if formulas else None,
        seed=seed,
        **kw,
        **cluster,
    )


MIXTURE_OPTIONS = ("starts", "bootstrap_reps", "progress", "max_iter")


def _fit_types(
    the_model: Model,
    bundle: Any,
    types: Any,
    se: str | None,
    by: str | None,
    formulas: Sequence[str] | Mapping[str, str] | None,
    seed: int,
    kw: dict[str, Any],
) -> Any:
    """A finite mixture of ``types`` types of the model (estimation/ml/mixture.py): each
    subject belongs to one type; shares and every type's parameters by maximum likelihood."""
    if isinstance(types, bool) or not isinstance(types, (int, np.integer)) or types < 2:
        raise StopwiseInputError(f"types={types!r}: expected a whole number of at least 2")
    if by is not None or formulas or kw.get("fixed"):
        raise StopwiseInputError(
            "a mixture of types cannot be combined with by='subject', formulas or fixed parameters"
        )
    unknown = sorted(k for k, v in kw.items() if k not in MIXTURE_OPTIONS and v is not None)
    if unknown:
        raise StopwiseInputError(f"mixture fit: unknown option(s) {unknown}")
    from stopwise.estimation.ml.mixture import fit_mixture

    options = {k: v for k, v in kw.items() if k in MIXTURE_OPTIONS and v is not None}
    return fit_mixture(the_model, bundle, k=int(types), se=se, seed=seed, **options)


def compare(
    models: Sequence[str | Model],
    data: Any,
    *,
    method: str = "mle",
    max_target: int | None = None,
    seed: int = 0,
    **kw: Any,
) -> Any:
    """Compare several models on the same data. method="mle": a Comparison (AIC, BIC, LR,
    Vuong, Clarke, k-fold CV log score); method="bayes": stopwise.estimation.bayes.fit.
    compare_bayes(models, data, **kw)."""
    _check_method(method)
    if len(models) < 2:
        raise StopwiseInputError("compare needs at least two models")
    resolved = [resolve_model(m, max_target) for m in models]
    bundle, frame = resolve_data(data)
    kinds = {m.data_kind for m in resolved}
    if len(kinds) > 1:
        raise StopwiseInputError(
            "compare needs models of one kind (solo stopping, contest or lottery) fitted to "
            f"the same decisions; got {', '.join(f'{m.name} ({m.data_kind})' for m in resolved)}"
        )
    bundle, frame, _ = select_data(resolved[0], bundle, frame)
    resolved = [model_for_data(m, max_target, bundle) for m in models]
    for m in resolved:
        prepare_model(m, bundle)
    if method == "bayes":
        from stopwise.estimation.bayes.fit import compare_bayes
        from stopwise.estimation.ml.point_fits import ML_POINT_FITS

        kw.setdefault("point_fits", ML_POINT_FITS)  # the Bayes wing starts from ML fits
        return compare_bayes(resolved, bundle, seed=seed, **kw)
    from stopwise.estimation.ml.compare import compare_fits

    formulas = kw.pop("formulas", None)
    result = compare_fits(
        resolved,
        bundle,
        seed=seed,
        formulas=formulas,
        covariate_frame=frame if formulas else None,
        **kw,
    )
    for model_fit, the_model in zip(result.fits, resolved):
        model_fit.extras["record"] = fit_record(the_model, bundle, formulas)
    return result


def recover(
    model: str | Model,
    truths: Mapping[str, float] | Sequence[Mapping[str, float]],
    design: pd.DataFrame | None = None,
    *,
    n_reps: int = 50,
    subjects: int = 120,
    trials: int = 60,
    p_survive: Sequence[float] = (0.7, 0.8, 0.9),
    gain: float = 1.0,
    seed: int = 0,
    max_target: int | None = None,
    **kw: Any,
) -> Any:
    """Parameter recovery: simulate ``n_reps`` data sets from ``truths`` on ``design``
    (default: ``subjects`` x ``trials`` with the given survival probabilities), refit each,
    and report bias, RMSE, 95% coverage, the correlation of estimates and unidentified
    parameters (stopwise.estimation.ml.recovery). ``rivals=[spec, ...]`` also reports how often
    AIC prefers the generating model."""
    from stopwise.data_schemas.bundle import to_lottery_data, to_stopping_data
    from stopwise.estimation.ml.recovery import recover as run_recovery
    from stopwise.estimation.ml.recovery import stopping_design

    the_model = resolve_model(model, max_target)
    if design is None:
        if the_model.data_kind == "lottery":
            raise StopwiseInputError("a lottery model needs a design (the lottery list)")
        design = stopping_design(subjects, trials, p_survive, gain, seed)
    key = design_key(design)

    def shared(spec: str | Model) -> Model:
        """Spec strings: one Model per design, so another study of this design reuses its
        compiled programs; a Model is used as given."""
        return (
            _shared_model(spec, max_target, key) if isinstance(spec, str) else resolve_model(spec)
        )

    the_model = shared(model)

    def to_bundle(frame: pd.DataFrame, horizon: int | None = None) -> Any:
        if the_model.data_kind == "lottery":
            return to_lottery_data(frame)
        return to_stopping_data(frame, horizon=horizon)

    rivals = list(kw.get("rivals", ()))
    if "rivals" in kw:
        kw["rivals"] = [shared(r) for r in rivals]
    if all(isinstance(m, str) for m in [model, *rivals]):
        kw["share_key"] = hashlib.sha256(repr((model, max_target, rivals)).encode()).digest() + key
    return run_recovery(the_model, truths, design, to_bundle, n_reps=n_reps, seed=seed, **kw)
