"""Contest play for researchers: equilibria of stopping contests and incentive counterfactuals.

    equilibrium(p_survive, players, prize, ...) -> dict   (the keys of DESIGN.md, plus extras)
    counterfactual(fit_or_params, schemes) -> Counterfactual(table, plot_frame)

A contest: ``players`` each run their own stopping task privately at the same time; the top
final bank wins ``prize`` (ties broken by a fair random draw); with ``keep_bank`` everyone
also keeps their own bank. A stopping rule is a mixed choice of a target number of draws,
0..cap (``max_target``, default ``default_max_target``: the smallest M with p^M <= 1e-12,
beyond which every target is payoff-equivalent to M up to 1e-12 of the payoff range).

Predictions are research estimates for designing and analysing experiments, not a basis for
decisions about individual people.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.base import Model
from stopwise.models.contest.agent import agent_qre_log_probs
from stopwise.models.contest.dominance import Elimination, contest_elimination
from stopwise.models.contest.game import (
    ContestGame,
    default_max_target,
    expected_bank,
    make_game,
    payoff_matrix,
    resolve_utility,
    target_distribution_stats,
    target_payoffs,
)
from stopwise.models.contest.levelk import (
    ch_population,
    level0_strategy,
    levelk_strategies,
)
from stopwise.models.contest.nash import contest_nash
from stopwise.models.contest.qre import qre_symmetric

__all__ = [
    "CONCEPTS",
    "ContestGame",
    "Counterfactual",
    "Elimination",
    "contest_elimination",
    "counterfactual",
    "default_max_target",
    "equilibrium",
    "make_game",
    "payoff_matrix",
    "target_payoffs",
]

CONCEPTS = ("nash", "qre", "levelk", "ch", "aqre")
CH_DEPTH = 15


def _check_setup(
    p_survive: float,
    players: int,
    prize: float,
    gain: float,
    max_target: int | None,
    bust_keep: float,
    start: float,
) -> int:
    if not 0.0 < p_survive < 1.0:
        raise StopwiseInputError(f"p_survive must lie strictly between 0 and 1, got {p_survive}")
    if int(players) != players or players < 2:
        raise StopwiseInputError(f"players must be an integer >= 2, got {players}")
    if not prize > 0:
        raise StopwiseInputError(f"prize must be positive, got {prize}")
    if not gain > 0:
        raise StopwiseInputError(f"gain must be positive, got {gain}")
    if not 0.0 <= bust_keep <= 1.0:
        raise StopwiseInputError(f"bust_keep must lie in [0, 1], got {bust_keep}")
    if start < 0:
        raise StopwiseInputError(f"start must be >= 0, got {start}")
    if max_target is None:
        return default_max_target(p_survive)
    if int(max_target) != max_target or max_target < 1:
        raise StopwiseInputError(f"max_target must be an integer >= 1, got {max_target}")
    return int(max_target)


def _need(name: str, value: Any, concept: str) -> float:
    if value is None:
        raise StopwiseInputError(f"concept {concept!r} needs {name} (--{name})")
    value = float(value)
    if not value > 0 and name != "level":
        raise StopwiseInputError(f"{name} must be positive, got {value}")
    return value


def concept_strategy(
    game: ContestGame,
    concept: str,
    precision: float | None = None,
    tau: float | None = None,
    level: int | None = None,
    level0: str = "uniform",
) -> tuple[np.ndarray, dict[str, Any]]:
    """The symmetric target distribution of `concept` in `game`, with solver details."""
    details: dict[str, Any] = {}
    if concept == "nash":
        sigma, _, method, notes = contest_nash(game)
        details.update(method=method, notes=notes)
        return sigma, details
    if concept == "qre":
        lam = _need("precision", precision, concept)
        return np.asarray(qre_symmetric(lam, game)), details
    if concept == "aqre":
        lam = _need("precision", precision, concept)
        return np.exp(np.asarray(agent_qre_log_probs(lam, game))), details
    lam = _need("precision", precision, concept)
    sigma0 = level0_strategy(game, level0)

    def payoffs(s: Any) -> Any:
        return target_payoffs(game, s)

    if concept == "levelk":
        k = _need("level", level, concept)
        if int(k) != k or k < 0:
            raise StopwiseInputError(f"level must be an integer >= 0, got {level}")
        return np.asarray(levelk_strategies(payoffs, sigma0, lam, int(k))[-1]), details
    if concept == "ch":
        t = _need("tau", tau, concept)
        return np.asarray(ch_population(payoffs, sigma0, lam, t, CH_DEPTH)), details
    raise StopwiseInputError(f"unknown concept {concept!r}; choose one of {', '.join(CONCEPTS)}")


def equilibrium(
    p_survive: float,
    players: int,
    prize: float,
    keep_bank: bool = False,
    gain: float = 1.0,
    concept: str = "nash",
    precision: float | None = None,
    tau: float | None = None,
    level: int | None = None,
    r: float | None = None,
    max_target: int | None = None,
    start: float = 0.0,
    bust_keep: float = 0.0,
) -> dict[str, Any]:
    """Symmetric play of the contest under `concept` (nash, qre, levelk, ch, aqre).

    Returns the DESIGN.md keys concept, targets, probs, expected_bank (E[final bank] of one
    player), win_prob, efficiency_loss (1 - expected_bank / max_t E[bank of target t]), and
    extras: bust_rate, max_regret (max_t U_t(sigma) - sigma.U(sigma), the Nash certificate),
    dominated (targets removed by iterated strict dominance), cap, utility, method, notes.
    With ``r`` payoffs are CRRA expected utilities of money (r < 1).
    """
    if concept not in CONCEPTS:
        raise StopwiseInputError(
            f"unknown concept {concept!r}; choose one of {', '.join(CONCEPTS)}"
        )
    cap = _check_setup(p_survive, players, prize, gain, max_target, bust_keep, start)
    utility_name, theta = ("linear", {}) if r is None else ("crra", {"r": float(r)})
    if r is not None and not r < 1:
        raise StopwiseInputError(f"r must be below 1 in contests (money can be 0), got {r}")
    game = make_game(
        p_survive,
        players,
        prize,
        float(bool(keep_bank)),
        cap,
        gain,
        start,
        bust_keep,
        resolve_utility(utility_name),
        theta,
    )
    sigma, details = concept_strategy(game, concept, precision, tau, level)
    sigma = np.clip(sigma, 0.0, None)
    sigma = sigma / sigma.sum()
    stats = target_distribution_stats(game, jnp.asarray(sigma))
    banks = np.asarray(expected_bank(game))
    u = np.asarray(target_payoffs(game, jnp.asarray(sigma)))
    elimination = contest_elimination(game)
    notes = list(details.get("notes", []))
    if not elimination.checked:
        notes.append(f"dominance {elimination.note}")
    if utility_name != "linear" and not keep_bank:
        notes.append(
            "winner-take-all with one prize: any utility is affine on {0, prize}, "
            "so r does not change the equilibrium"
        )
    return {
        "concept": concept,
        "targets": list(range(cap + 1)),
        "probs": sigma.tolist(),
        "expected_bank": float(stats["expected_bank"]),
        "win_prob": float(stats["win_prob"]),
        "efficiency_loss": float(1.0 - stats["expected_bank"] / banks.max()),
        "bust_rate": float(stats["bust_rate"]),
        "max_regret": float(u.max() - sigma @ u),
        "dominated": [t for t, _, _ in elimination.removed],
        "cap": cap,
        "players": int(players),
        "prize": float(prize),
        "keep_bank": bool(keep_bank),
        "utility": utility_name if r is None else f"crra(r={float(r):g})",
        "method": details.get("method", f"{concept} by continuation and Newton"),
        "notes": notes,
    }


# ----------------------------------------------------------------------------- counterfactuals


@dataclass(frozen=True)
class Counterfactual:
    """``table``: one row per scheme and prediction (nash, model) with bust rate, expected
    bank, efficiency loss, win probability, mean target and prize outlay per group
    (prize + keep_bank * players * expected bank); ``plot_frame``: long format
    (scheme, prediction, target, prob) for plotting target distributions."""

    table: pd.DataFrame
    plot_frame: pd.DataFrame


def _model_and_theta(fit_or_params: Any) -> tuple[Model, dict[str, float], int | None]:
    """Accept a fit result (attributes model + params/theta/estimates) or a mapping
    {"model": spec or Model, "params": {name: value}, "max_target": M (optional)}."""
    from stopwise.models.spec import build_model

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
        max_target = None
    if isinstance(model, str):
        model = build_model(model, **({} if max_target is None else {"max_target": max_target}))
    if not isinstance(model, Model) or model.data_kind != "contest":
        raise StopwiseInputError(
            "counterfactual needs a contest model (e.g. 'crra+qre') and its parameter values"
        )
    params = _params_dict(params)
    missing = set(model.param_names) - set(params)
    if missing:
        raise StopwiseInputError(f"parameter value(s) missing for {sorted(missing)}")
    return model, {k: float(params[k]) for k in model.param_names}, max_target


def _params_dict(params: Any) -> dict[str, float]:
    if isinstance(params, Mapping):
        return {str(k): float(v) for k, v in params.items()}
    if isinstance(params, pd.DataFrame) and {"name", "estimate"} <= set(params.columns):
        return dict(zip(params["name"], params["estimate"].astype(float)))
    if isinstance(params, Sequence):  # [{"name": .., "estimate": ..}, ...] (result JSON)
        return {str(p["name"]): float(p["estimate"]) for p in params}
    raise StopwiseInputError("parameter values must be a mapping name -> value")


def counterfactual(fit_or_params: Any, schemes: Sequence[Mapping[str, Any]]) -> Counterfactual:
    """Predicted play under alternative schemes, by Nash and by the behavioural model.

    Each scheme is a mapping with p_survive, players, prize and optionally keep_bank, gain,
    start, bust_keep, max_target and a name. Returns a Counterfactual (see its docstring).
    """
    model, theta, default_cap = _model_and_theta(fit_or_params)
    utility_name = model.options.get("utility", "linear")
    rows, plot = [], []
    for i, scheme in enumerate(schemes):
        s = dict(scheme)
        name = str(s.get("name", f"scheme {i + 1}"))
        try:
            p, players, prize = float(s["p_survive"]), int(s["players"]), float(s["prize"])
        except KeyError as exc:
            raise StopwiseInputError(f"scheme {name!r} lacks {exc.args[0]!r}") from None
        kb = float(bool(s.get("keep_bank", False)))
        gain, start, keep = (
            float(s.get("gain", 1.0)),
            float(s.get("start", 0.0)),
            float(s.get("bust_keep", 0.0)),
        )
        cap = _check_setup(p, players, prize, gain, s.get("max_target", default_cap), keep, start)
        game = make_game(
            p,
            players,
            prize,
            kb,
            cap,
            gain,
            start,
            keep,
            resolve_utility(utility_name),
            {k: jnp.asarray(v) for k, v in theta.items()},
        )
        nash_sigma, _ = concept_strategy(game, "nash")
        model_sigma = model.options["target_distribution"](
            theta, p, players, prize, kb, cap, gain, start, keep
        )
        banks = np.asarray(expected_bank(game))
        for label, sigma in (("nash", nash_sigma), (model.name, model_sigma)):
            sigma = np.clip(np.asarray(sigma, float), 0.0, None)
            sigma = sigma / sigma.sum()
            stats = {
                k: float(v) for k, v in target_distribution_stats(game, jnp.asarray(sigma)).items()
            }
            rows.append(
                {
                    "scheme": name,
                    "prediction": label,
                    "players": players,
                    "prize": prize,
                    "keep_bank": bool(kb),
                    "p_survive": p,
                    "mean_target": float(sigma @ np.arange(cap + 1)),
                    "bust_rate": stats["bust_rate"],
                    "expected_bank": stats["expected_bank"],
                    "efficiency_loss": 1.0 - stats["expected_bank"] / banks.max(),
                    "win_prob": stats["win_prob"],
                    "prize_outlay": prize + kb * players * stats["expected_bank"],
                }
            )
            plot.extend(
                {"scheme": name, "prediction": label, "target": t, "prob": float(q)}
                for t, q in enumerate(sigma)
            )
    return Counterfactual(pd.DataFrame(rows), pd.DataFrame(plot))


def format_equilibrium(result: Mapping[str, Any], min_prob: float = 1e-4) -> str:
    """A readable table of an ``equilibrium`` result."""
    lines = [
        f"{result['concept']} play, {result['players']} players, prize {result['prize']:g}"
        f"{' + own bank' if result['keep_bank'] else ' (winner takes the prize only)'}, "
        f"utility {result['utility']}, targets 0..{result['cap']}",
        f"method: {result['method']}",
        "",
        f"{'target':>6}  {'prob':>8}",
    ]
    for t, q in zip(result["targets"], result["probs"]):
        if q >= min_prob:
            lines.append(f"{t:>6}  {q:>8.4f}")
    lines += [
        "",
        f"expected bank    {result['expected_bank']:.4f}",
        f"bust rate        {result['bust_rate']:.4f}",
        f"win probability  {result['win_prob']:.4f}",
        f"efficiency loss  {result['efficiency_loss']:.4f}",
        f"max regret       {result['max_regret']:.3g}",
    ]
    if result["dominated"]:
        lines.append(f"strictly dominated targets (iterated): {_ranges(result['dominated'])}")
    lines += [f"note: {n}" for n in result["notes"]]
    return "\n".join(lines)


def _ranges(values: Sequence[int]) -> str:
    values = sorted(values)
    out, start = [], values[0]
    for prev, cur in zip(values, [*values[1:], None]):
        if cur != prev + 1:
            out.append(f"{start}" if start == prev else f"{start}-{prev}")
            start = cur
    return ", ".join(out)


# ----------------------------------------------------------------------------- sweeps

from stopwise.sweep import sweep_contests  # noqa: E402  (the sweep takes equilibrium as input)


def sweep(
    p_survive: float | Sequence[float],
    prize: float | Sequence[float],
    players: int = 2,
    **options: Any,
) -> pd.DataFrame:
    """Symmetric play over a grid of survival chances and prizes, each point warm-started
    from its neighbour and certified; points the warm start cannot certify are solved cold
    by ``equilibrium``. One row per setting (columns: stopwise.sweep)."""
    return sweep_contests(p_survive, prize, players, cold_solve=equilibrium, **options)


__all__ += ["sweep"]
