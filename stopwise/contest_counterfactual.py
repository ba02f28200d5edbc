"""Incentive counterfactuals of a fitted contest model: predicted play under other schemes,
by Nash and by the model, each row certified (stopwise.contest_solve.certify).

Predictions are research estimates for designing and analysing experiments, not a basis for
decisions about individual people.
"""

from __future__ import annotations

import functools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.contest_counterfactual_sequential import sequential_rows
from stopwise.contest_solve import _check_setup, certify, concept_strategy, efficiency_loss
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.base import Model
from stopwise.models.contest.agent import agent_qre_with_residual
from stopwise.models.contest.certify import (
    DEFAULT_TOLERANCE,
    Certificate,
    UncertifiedAnswer,
    exact_certificate,
    fixed_point_certificate,
    symmetric_regret,
)
from stopwise.models.contest.dominance import contest_elimination
from stopwise.models.contest.game import (
    ContestGame,
    as_jax_game,
    make_numpy_game,
    resolve_utility,
    target_distribution_stats,
    target_payoffs,
)
from stopwise.models.contest.qre import fixed_point_residual
from stopwise.models.spec import build_model


@dataclass(frozen=True)
class Counterfactual:
    """``table``: one row per scheme and prediction (nash, model) with bust rate, expected
    bank, efficiency loss, win probability, mean target and prize outlay per group
    (prize + keep_bank * players * expected bank), the cap used and its source ("fit",
    "scheme" or "default"), max regret and ``certified`` (each row's certificate,
    stopwise.models.contest.certify); ``plot_frame``: long format
    (scheme, prediction, target, prob) for plotting target distributions."""

    table: pd.DataFrame
    plot_frame: pd.DataFrame


def _model_and_theta(fit_or_params: Any) -> tuple[Model, dict[str, float], int | None]:
    """Accept a fit result (attributes model + params/theta/estimates) or a mapping
    {"model": spec or Model, "params": {name: value}, "max_target": M (optional)}; a fit's
    cap is its ``extras["max_target"]`` (recorded by ``stopwise.fit``) or its model's."""

    if isinstance(fit_or_params, Mapping):
        model = fit_or_params.get("model")
        params = fit_or_params.get("params")
        max_target = fit_or_params.get("max_target")
    else:  # a fit result: model (spec or Model) and estimates() / params
        model = getattr(fit_or_params, "model", None)
        params = getattr(fit_or_params, "estimates", None)
        if callable(params):
            params = params()
        if params is None:
            params = getattr(fit_or_params, "params", None)
        max_target = (getattr(fit_or_params, "extras", None) or {}).get("max_target")
        if max_target is None and isinstance(model, Model):
            max_target = model.options.get("max_target")
    if isinstance(model, str):
        model = counterfactual_model(model, None if max_target is None else int(max_target))
    if not isinstance(model, Model) or model.data_kind != "contest":
        raise StopwiseInputError(
            "counterfactual needs a contest model (e.g. 'crra+qre') and its parameter values"
        )
    params = _params_dict(params)
    missing = set(model.param_names) - set(params)
    if missing:
        raise StopwiseInputError(f"parameter value(s) missing for {sorted(missing)}")
    return model, {k: float(params[k]) for k in model.param_names}, max_target


@functools.lru_cache(maxsize=16)
def counterfactual_model(spec: str, max_target: int | None) -> Model:
    """One Model per (spec, max_target) for counterfactual play: its compiled programs (the
    play's distribution, the incentive search's slopes) are keyed by the model object, so a
    second call with the same spec reuses them instead of compiling again (a repeated
    two-player linear+qre incentive design with max_target 8: 6.9 s -> 0.1 s, 2026-12-03).
    The model is never shown data here, so nothing in it is sized from one caller's data."""
    return build_model(spec, **({} if max_target is None else {"max_target": max_target}))


def _params_dict(params: Any) -> dict[str, float]:
    if isinstance(params, Mapping):
        return {str(k): float(v) for k, v in params.items()}
    if isinstance(params, pd.DataFrame) and {"name", "estimate"} <= set(params.columns):
        return dict(zip(params["name"], params["estimate"].astype(float)))
    if isinstance(params, Sequence):  # [{"name": .., "estimate": ..}, ...] (result JSON)
        return {str(p["name"]): float(p["estimate"]) for p in params}
    raise StopwiseInputError("parameter values must be a mapping name -> value")


def counterfactual(
    fit_or_params: Any,
    schemes: Sequence[Mapping[str, Any]],
    tolerance: float = DEFAULT_TOLERANCE,
    allow_approximate: bool = False,
) -> Counterfactual:
    """Predicted play under alternative schemes, by Nash and by the behavioural model.

    Each scheme is a mapping with p_survive, players, prize and optionally keep_bank, gain,
    start, bust_keep, max_target, top_k (the prize shared among the k top banks, 1 <= k <
    players; stopwise.models.contest.topk), a name and ``sequential`` (True: players move
    in turn; rows subgame-perfect and the model's sequential play, stopwise/
    contest_counterfactual_sequential.py). The cap on targets is the scheme's max_target,
    else the fit's (the cap it was estimated with), else the default rule. Every row is
    certified (Nash: max regret; QRE: fixed-point residual; level-k, CH: exact by
    construction); a row that fails raises UncertifiedAnswer unless ``allow_approximate``.
    Returns a Counterfactual (see its docstring).
    """
    model, theta, fit_cap = _model_and_theta(fit_or_params)
    rows, plot = [], []
    for i, scheme in enumerate(schemes):
        setting = _scheme_setting(dict(scheme), i, fit_cap)
        if scheme.get("sequential"):  # movers in turn (stopwise/contest_counterfactual_sequential)
            rows += _certified(sequential_rows(model, theta, setting, tolerance), allow_approximate)
            continue
        game = _setting_game(model, theta, setting)
        for label, sigma, certificate, regret in _predictions(
            model, theta, game, setting, tolerance
        ):
            if not certificate.certified and not allow_approximate:
                raise UncertifiedAnswer(
                    f"scheme {setting['name']!r}, {label}: {certificate.statement}; pass "
                    "allow_approximate=True to see the approximate row marked uncertified"
                )
            rows.append(_row(setting, label, game, sigma, certificate, regret))
            plot.extend(
                {"scheme": setting["name"], "prediction": label, "target": t, "prob": float(q)}
                for t, q in enumerate(sigma)
            )
    return Counterfactual(pd.DataFrame(rows), pd.DataFrame(plot))


def _certified(rows: list[dict[str, Any]], allow_approximate: bool) -> list[dict[str, Any]]:
    """The rows, refused (UncertifiedAnswer) if one fails its check, unless approximate."""
    for row in rows:
        if not row["certified"] and not allow_approximate:
            raise UncertifiedAnswer(
                f"scheme {row['scheme']!r}, {row['prediction']}: failed its check ({row['check']}"
                "); pass allow_approximate=True to see the approximate row marked uncertified"
            )
    return rows


def model_row(
    fit_or_params: Any, scheme: Mapping[str, Any], tolerance: float = DEFAULT_TOLERANCE
) -> dict[str, Any]:
    """The model-prediction row of ``counterfactual(fit_or_params, [scheme])`` (the same
    numbers and certificate, never raising on a failed certificate: the row says
    ``certified``), without solving for Nash play (for searches and resampling)."""
    model, theta, fit_cap = _model_and_theta(fit_or_params)
    setting = _scheme_setting(dict(scheme), 0, fit_cap)
    game = _setting_game(model, theta, setting)
    sigma, certificate, regret = model_prediction(model, theta, game, setting, tolerance)
    return _row(setting, model.name, game, sigma, certificate, regret)


GAME_FIELDS = ("p_survive", "players", "prize", "keep_bank", "cap", "gain", "start", "bust_keep")


def game_fields(setting: Mapping[str, Any]) -> tuple[Any, ...]:
    """A checked scheme setting's game arguments, in the order the game builders take them."""
    return tuple(setting[name] for name in GAME_FIELDS)


def _setting_game(
    model: Model, theta: Mapping[str, float], setting: Mapping[str, Any]
) -> ContestGame:
    """The numpy normal form of one checked scheme setting under the model's utility."""
    return make_numpy_game(
        *game_fields(setting),
        resolve_utility(model.options.get("utility", "linear")),
        {k: jnp.asarray(v) for k, v in theta.items()},
        setting["top_k"],
    )


def _scheme_setting(s: dict[str, Any], index: int, fit_cap: int | None) -> dict[str, Any]:
    """A scheme's numbers, checked, with its cap and the cap's source."""
    name = str(s.get("name", f"scheme {index + 1}"))
    try:
        p, players, prize = float(s["p_survive"]), int(s["players"]), float(s["prize"])
    except KeyError as exc:
        raise StopwiseInputError(f"scheme {name!r} lacks {exc.args[0]!r}") from None
    gain, start, keep = (
        float(s.get("gain", 1.0)),
        float(s.get("start", 0.0)),
        float(s.get("bust_keep", 0.0)),
    )
    source = "scheme" if s.get("max_target") is not None else "fit" if fit_cap else "default"
    wanted = s.get("max_target") if source == "scheme" else fit_cap
    cap = _check_setup(p, players, prize, gain, wanted, keep, start)
    top_k = s.get("top_k", 1)
    if int(top_k) != top_k or not 1 <= top_k < players:
        raise StopwiseInputError(
            f"scheme {name!r}: top_k (places sharing the prize) must be a whole number from 1 "
            f"to players - 1 = {players - 1}, got {top_k}"
        )
    return {
        "name": name,
        "p_survive": p,
        "players": players,
        "prize": prize,
        "keep_bank": float(bool(s.get("keep_bank", False))),
        "gain": gain,
        "start": start,
        "bust_keep": keep,
        "cap": cap,
        "cap_source": source,
        "top_k": int(top_k),
    }


def _predictions(
    model: Model,
    theta: Mapping[str, float],
    game: ContestGame,
    setting: Mapping[str, Any],
    tolerance: float,
) -> list[tuple[str, np.ndarray, Certificate, float]]:
    """(label, sigma, certificate, max regret) of Nash play and of the model's play."""
    nash_sigma, details = concept_strategy(game, "nash")
    nash_sigma = _normalised(nash_sigma)
    dominated = [t for t, _, _ in contest_elimination(game).removed]
    nash_cert, nash_regret = certify("nash", game, nash_sigma, details, dominated, tolerance)
    model_sigma, model_cert, model_regret = model_prediction(
        model, theta, game, setting, tolerance, nash_cert
    )
    return [
        ("nash", nash_sigma, nash_cert, nash_regret),
        (model.name, model_sigma, model_cert, model_regret),
    ]


def model_prediction(
    model: Model,
    theta: Mapping[str, float],
    game: ContestGame,
    setting: Mapping[str, Any],
    tolerance: float,
    nash_cert: Certificate | None = None,
) -> tuple[np.ndarray, Certificate, float]:
    """(sigma, certificate, max regret) of the model's play alone: QRE by its fixed-point
    residual, level-k/CH exact by construction, Nash-with-trembles by the Nash certificate
    (``nash_cert``; solved here when not given)."""
    model_sigma = _normalised(
        model.options["target_distribution"](theta, *game_fields(setting), setting["top_k"])
    )
    concept = model.options["concept"]
    jax_game = as_jax_game(game)
    if concept == "qre":
        log_sigma = jnp.log(jnp.asarray(model_sigma))
        residual = float(fixed_point_residual(log_sigma, theta["precision"], jax_game))
        model_cert = fixed_point_certificate(residual, tolerance)
    elif concept == "aqre":
        _, residual = agent_qre_with_residual(jnp.float64(theta["precision"]), jax_game)
        model_cert = fixed_point_certificate(float(residual), tolerance)
    elif concept == "nash":  # Nash mixed with trembles: the Nash part carries the check
        if nash_cert is None:
            nash_sigma, details = concept_strategy(game, "nash")
            dominated = [t for t, _, _ in contest_elimination(game).removed]
            nash_cert, _ = certify(
                "nash", game, _normalised(nash_sigma), details, dominated, tolerance
            )
        model_cert = nash_cert
    else:
        model_cert = exact_certificate(model_sigma, tolerance)
    payoffs = np.asarray(target_payoffs(game, model_sigma))
    return model_sigma, model_cert, symmetric_regret(payoffs, model_sigma)


def _normalised(sigma: Any) -> np.ndarray:
    sigma = np.clip(np.asarray(sigma, float), 0.0, None)
    return sigma / sigma.sum()


def _row(
    setting: Mapping[str, Any],
    label: str,
    game: ContestGame,
    sigma: np.ndarray,
    certificate: Certificate,
    regret: float,
) -> dict[str, Any]:
    stats = {k: float(v) for k, v in target_distribution_stats(game, sigma).items()}
    return {
        "scheme": setting["name"],
        "prediction": label,
        "players": setting["players"],
        "prize": setting["prize"],
        "keep_bank": bool(setting["keep_bank"]),
        "top_k": setting["top_k"],
        "p_survive": setting["p_survive"],
        "cap": setting["cap"],
        "cap_source": setting["cap_source"],
        "mean_target": float(sigma @ np.arange(setting["cap"] + 1)),
        "bust_rate": stats["bust_rate"],
        "expected_bank": stats["expected_bank"],
        "efficiency_loss": efficiency_loss(game, sigma),
        "win_prob": stats["win_prob"],
        "prize_outlay": setting["prize"]
        + setting["keep_bank"] * setting["players"] * stats["expected_bank"],
        "max_regret": regret,
        "check": certificate.kind,
        "certified": certificate.certified,
    }
