"""Result JSON files loaded back into objects that predict, simulate, feed
``contest.counterfactual`` and ``report`` without refitting (``stopwise.load_result``).

A saved pooled fit predicts with its point estimates theta: per condition c and step s the
draw probability h_s(theta) and the stop-step distribution (estimation.ml.response.stop_step_table);
per row P(draw) = h_{step}(theta) of the row's condition. On data whose fingerprint equals
the fitted data's (``data_sha256``) it certifies itself first: the log-likelihood
sum_i log P(y_i | theta) recomputed from the rebuilt model must equal the saved one within
1e-6 (relative), otherwise it refuses (the model or its options were not rebuilt exactly).
Formula fits (per covariate profile) and per-subject fits (per subject) predict too, with
their own certificates (stopwise/saved_predict.py).
No pickle: the JSON is parsed with the standard library only.
"""

from __future__ import annotations

import json
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from stopwise.api import prepare_model, resolve_data, select_data
from stopwise.data_schemas.arrays import LotteryData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation import tables
from stopwise.estimation.ml.response import stop_step_table
from stopwise.fit_record import bundle_fingerprint
from stopwise.models.base import Model
from stopwise.models.simulation import simulate
from stopwise.models.spec import build_model
from stopwise.saved_predict import (
    certify_groups,
    check_loglik,
    formula_thetas,
    grouped_predictions,
    row_logliks,
    row_profiles,
    subject_thetas,
    subjects_of_rows,
)

LOGLIK_RTOL = 1e-6
REQUIRED_KEYS = ("model", "params")


def params_frame(records: Sequence[Mapping[str, Any]]) -> pd.DataFrame:
    """The saved "params" list as a frame indexed by name (estimate, se, ci_low, ci_high)."""
    frame = pd.DataFrame(list(records))
    for column in ("estimate", "se", "ci_low", "ci_high"):
        if column not in frame:
            frame[column] = np.nan
    return frame.set_index("name")[["estimate", "se", "ci_low", "ci_high"]].astype(float)


@dataclass
class SavedFit:
    """One fit read from JSON. ``record`` is the whole JSON object; ``source`` its file."""

    record: dict[str, Any]
    source: str = "<dict>"
    notes: list[str] = field(default_factory=list)

    @property
    def model(self) -> str:
        return str(self.record["model"])

    @property
    def method(self) -> str:
        return str(self.record.get("method", "mle"))

    @property
    def params(self) -> pd.DataFrame:
        return params_frame(self.record["params"])

    @property
    def options(self) -> dict[str, Any]:
        return dict((self.record.get("spec") or {}).get("options") or {})

    @property
    def formulas(self) -> list[str]:
        return list((self.record.get("spec") or {}).get("formulas") or [])

    def estimates(self) -> dict[str, float]:
        """The model's parameters on their natural scale (held-fixed values included: the
        user's, and those identification held fixed because the data cannot move them)."""
        values = dict(self.params["estimate"])
        values.update((self.record.get("identification") or {}).get("fixed") or {})
        values.update((self.record.get("spec") or {}).get("fixed") or {})
        return {k: float(v) for k, v in values.items()}

    def build_model(self) -> Model:
        """The model rebuilt from its spec and recorded options."""
        return build_model(self.model, **self.options)

    def theta(self, model: Model) -> dict[str, float]:
        """Point estimates for every model parameter; refuses formula and mixture fits,
        whose parameters differ across rows or subjects."""
        if self.formulas or "type_probabilities" in self.record:
            raise StopwiseInputError(
                f"{self.source}: a saved fit with covariate formulas or types has no single "
                "parameter vector; simulating and contest counterfactuals need a pooled fit "
                "(a formula fit predicts per covariate profile with .predict)"
            )
        values = self.estimates()
        missing = [n for n in model.param_names if n not in values]
        if missing:
            raise StopwiseInputError(f"{self.source}: no estimate for parameter(s) {missing}")
        return {n: values[n] for n in model.param_names}

    def _selected(self, data: Any) -> tuple[Model, Any, dict[str, float]]:
        model, bundle, _ = model_and_rows(self.record, self.source, data)
        theta = self.theta(model)
        if bundle_fingerprint(bundle) == self.record.get("data_sha256"):
            self.certify(model, theta, bundle)
        return model, bundle, theta

    def certify(self, model: Model, theta: Mapping[str, float], bundle: Any) -> float:
        """Recompute the log-likelihood at theta on the fitted data; refuse on a mismatch.
        Returns the relative difference."""
        saved = self.record.get("loglik")
        loglik = float(np.sum(row_logliks(model, theta, bundle)))
        if saved is None:
            raise StopwiseInputError(f"{self.source}: no saved log-likelihood to check against")
        gap = abs(loglik - float(saved)) / max(1.0, abs(float(saved)))
        if not gap <= LOGLIK_RTOL:
            raise StopwiseInputError(
                f"{self.source}: the rebuilt model gives log-likelihood {loglik:.6f} on the "
                f"fitted data, the saved fit {float(saved):.6f}; refusing to predict with it"
            )
        return gap

    def predict(self, data: Any) -> dict[str, pd.DataFrame]:
        """As Fit.predict: "rows" (P(draw) or P(choose B) per row) and, for stopping data,
        "stop_steps" (per condition and step: p_draw, p_reach, p_stop_here, p_bust_here).
        A formula fit predicts per covariate profile (stopwise/saved_predict.py)."""
        if self.formulas and "type_probabilities" not in self.record:
            return self.predict_profiles(data)
        model, bundle, theta = self._selected(data)
        subject = np.asarray(bundle.subject)
        labels = (
            subject if bundle.subject_labels is None else np.asarray(bundle.subject_labels)[subject]
        )
        if isinstance(bundle, LotteryData):
            probe = replace(bundle, choice_b=np.ones_like(np.asarray(bundle.choice_b)))
            prob = np.exp(row_logliks(model, theta, probe))
            return {
                "rows": pd.DataFrame(
                    {"subject": labels, "p_choose_b": prob, "chose_b": np.asarray(bundle.choice_b)}
                )
            }
        table = stop_step_table(model, theta, bundle)
        cond, step = np.asarray(bundle.cond), np.asarray(bundle.step)
        grid = table["p_draw"].to_numpy().reshape(bundle.n_cond, -1)
        rows = pd.DataFrame(
            {
                "subject": labels,
                "step": step,
                "cond": cond,
                "p_draw": grid[cond, step],
                "drew": np.asarray(bundle.draw),
            }
        )
        return {"rows": rows, "stop_steps": table}

    def predict_profiles(self, data: Any) -> dict[str, pd.DataFrame]:
        """A formula fit's predictions: each row with the saved theta of its covariate
        profile, certified on the fitted data (stopwise/saved_predict.py); frames as
        Fit.predict of the live fit ("rows" and "stop_steps" carry a "profile" column)."""
        model, bundle, frame = model_and_rows(self.record, self.source, data)
        if frame is None:
            frame = pd.DataFrame({k: np.asarray(v) for k, v in bundle.covariates.items()})
        fixed = (self.record.get("spec") or {}).get("fixed") or {}
        variables, keys, thetas = formula_thetas(self.record, fixed)
        for theta in thetas.values():
            missing = [n for n in model.param_names if n not in theta]
            if missing:
                raise StopwiseInputError(f"{self.source}: no profile value for {missing}")
        profile = row_profiles(frame, variables, keys, self.source)
        if bundle_fingerprint(bundle) == self.record.get("data_sha256"):
            total = sum(
                float(row_logliks(model, thetas[c], bundle)[profile == c].sum())
                for c in np.unique(profile)
            )
            check_loglik(total, self.record.get("loglik"), "the fit", self.source)
        return grouped_predictions(model, bundle, profile, thetas, "profile")

    def simulate(self, design: pd.DataFrame, seed: int = 0) -> pd.DataFrame:
        """Data simulated at the point estimates over ``design`` (stopwise.simulate)."""
        model = self.build_model()
        return simulate(model, self.theta(model), design, seed=seed)

    def contest_input(self) -> dict[str, Any]:
        """{"model": Model, "params": ..., "max_target": ...} for contest.counterfactual."""
        model = self.build_model()
        return {
            "model": model,
            "params": self.theta(model),
            "max_target": self.options.get("max_target"),
        }

    def to_dict(self) -> dict[str, Any]:
        return dict(self.record)

    def to_latex(self, interval: str = "se") -> str:
        return tables.to_latex([self], interval)

    def to_markdown(self, interval: str = "se") -> str:
        return tables.to_markdown([self], interval)


@dataclass
class SavedCollection:
    """A comparison (``table`` of models) or a per-subject fit (``by`` = "subject")."""

    record: dict[str, Any]
    fits: list[SavedFit]
    source: str = "<dict>"

    @property
    def kind(self) -> str:
        return "by_subject" if self.record.get("by") == "subject" else "comparison"

    @property
    def table(self) -> pd.DataFrame:
        """Comparison: one row per model; per-subject fits: the long parameter frame."""
        if self.kind == "comparison":
            return pd.DataFrame(self.record.get("models", [])).set_index("model")
        frames = []
        for fit in self.fits:
            frame = fit.params.reset_index()
            frame.insert(0, "subject", fit.record.get("subject"))
            frames.append(frame)
        return pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()

    def to_dict(self) -> dict[str, Any]:
        return dict(self.record)

    def predict(self, data: Any) -> dict[str, pd.DataFrame]:
        """Per-subject fits: every row predicted with its subject's saved estimates, each
        subject's log-likelihood certified on the fitted data (stopwise/saved_predict.py);
        "rows" as SavedFit.predict, "stop_steps" with a "subject" column."""
        if self.kind != "by_subject":
            raise StopwiseInputError(
                f"{self.source}: a comparison predicts through its fits (.fits[i].predict)"
            )
        model, bundle, _ = model_and_rows(self.record, self.source, data)
        fixed = (self.record.get("spec") or {}).get("fixed") or {}
        fits = self.record.get("fits") or []
        thetas = subject_thetas(fits, fixed, model.param_names)
        group = subjects_of_rows(bundle, thetas, self.source)
        if bundle_fingerprint(bundle) == self.record.get("data_sha256"):
            saved = {str(f.get("subject")): f.get("loglik") for f in fits}
            certify_groups(model, bundle, group, thetas, saved, self.source)
        return grouped_predictions(model, bundle, group, thetas, "subject")


def model_and_rows(
    record: dict[str, Any], source: str, data: Any
) -> tuple[Model, Any, pd.DataFrame | None]:
    """The model rebuilt from the record's spec, prepared on the rows of ``data`` it
    explains, with those rows' bundle and frame."""
    spec = record.get("spec")
    if not spec:
        raise StopwiseInputError(
            f"{source}: this result records no model spec and options (written by an older "
            "stopwise); refit it to predict"
        )
    model = build_model(str(record["model"]), **(spec.get("options") or {}))
    bundle, frame = resolve_data(data)
    bundle, frame, _ = select_data(model, bundle, frame)
    prepare_model(model, bundle)
    return model, bundle, frame


@dataclass
class SavedSweep:
    """A contest sweep written by ``stopwise sweep --out FILE.json``: {"axis", "rows"}."""

    record: dict[str, Any]
    source: str = "<dict>"
    fits: list[SavedFit] = field(default_factory=list)  # none: a sweep fits nothing

    @property
    def axis(self) -> str:
        return str(self.record["axis"])

    @property
    def table(self) -> pd.DataFrame:
        return pd.DataFrame(self.record["rows"])

    def lines(self) -> list[pd.DataFrame]:
        """One frame per line of the grid (the other setting held at one value), in order
        along the swept axis."""
        table = self.table
        fixed = "prize" if self.axis == "p_survive" else "p_survive"
        return [
            line.sort_values(self.axis).reset_index(drop=True)
            for _, line in table.groupby(fixed, sort=True)
        ]

    def to_dict(self) -> dict[str, Any]:
        return dict(self.record)


SWEEP_COLUMNS = ("p_survive", "prize", "certified", "max_regret", "concept", "tv_prev")


def sweep_from_record(record: dict[str, Any], source: str) -> SavedSweep:
    """A sweep record, checked for the columns its figure reads."""
    rows = record["rows"]
    if record.get("axis") not in ("p_survive", "prize") or not rows:
        raise StopwiseInputError(f"{source}: a sweep needs axis p_survive or prize and rows")
    missing = [c for c in SWEEP_COLUMNS if not all(isinstance(r, dict) and c in r for r in rows)]
    if missing:
        raise StopwiseInputError(f"{source}: sweep rows lack the column(s) {missing}")
    return SavedSweep(record, source)


def result_from_record(
    record: Any, source: str = "<dict>"
) -> SavedFit | SavedCollection | SavedSweep:
    """A SavedFit (one fit), SavedCollection (comparison, per-subject fits) or SavedSweep."""
    if not isinstance(record, dict):
        raise StopwiseInputError(f"{source}: expected a JSON object, got {type(record).__name__}")
    if isinstance(record.get("rows"), list) and "axis" in record:
        return sweep_from_record(record, source)
    if isinstance(record.get("fits"), list) or isinstance(record.get("models"), list):
        fits = [
            result_from_record(item, f"{source} fits[{i}]")
            for i, item in enumerate(record.get("fits") or [])
        ]
        return SavedCollection(record, [f for f in fits if isinstance(f, SavedFit)], source)
    missing = [k for k in REQUIRED_KEYS if k not in record]
    if missing:
        raise StopwiseInputError(
            f"{source}: not a stopwise result (missing key(s) {', '.join(missing)}); "
            "expected the JSON written by fit --json or compare --json"
        )
    return SavedFit(record, source)


def load_result(path: str | os.PathLike[str]) -> SavedFit | SavedCollection | SavedSweep:
    """Read a result JSON written by stopwise (fit, compare, fit --by subject, sweep)."""
    source = os.fspath(path)
    try:
        text = Path(source).read_text(encoding="utf-8")
    except OSError as exc:
        raise StopwiseInputError(f"{source}: cannot read ({exc.strerror or exc})") from None
    try:
        record = json.loads(text)
    except json.JSONDecodeError as exc:
        raise StopwiseInputError(
            f"{source}: line {exc.lineno}, column {exc.colno}: not valid JSON ({exc.msg})"
        ) from None
    return result_from_record(record, source)
