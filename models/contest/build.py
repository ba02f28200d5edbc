"""Contest models: a utility plus a play concept (plus an optional tremble), as a Model.

Specs (parts joined by "+", parsed by stopwise.models.spec): ``linear+qre``, ``crra+qre``,
``linear+levelk``, ``crra+ch``, ``crra+nash+tremble``, ``linear+aqre``. Concepts:

    nash   symmetric Nash equilibrium (always mixed with a tremble: an exact equilibrium gives
           most targets probability zero); derivatives by the implicit function theorem on
           the indifference system of its support
    qre    symmetric logit QRE on the principal branch (``precision``)
    aqre   agent logit QRE on the draw/stop decisions (``precision``)
    levelk level-k with logit responses (``precision``; ``level`` estimated in (0, 6) as the
           mean of a binomial mixture of levels 0..6, or fixed by the option ``level=K``)
    ch     Poisson cognitive hierarchy (``precision``, ``tau``; levels truncated at 15)

Likelihood of contest rows (cond_contest == 1; other rows contribute 0): per contest
condition the concept gives a target distribution sigma over 0..cap; with the survival
function S(s) = P(T >= s) = sum_{t>=s} sigma_t (log space, cumulative log-sum-exp),

    P(draw at step s) = S(s+1) / S(s),      P(stop at s) = sigma_s / S(s),

so the rows of a trial that busts after k successes multiply to exactly P(T > k) (exact
censoring). With a tremble eps: sigma' = (1 - eps) sigma + eps / (cap + 1).

The cap on targets is the option ``max_target``, else the rule of
``game.default_max_target`` at the largest contest p_survive of the data (read when the
likelihood first sees concrete data, or when an engine calls ``model.options["prepare"](data)``
before tracing, then remembered), and never below the data's horizon - 1 (the largest step);
concrete data with a draw at a step >= cap are refused (such a draw has probability 0).
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from functools import partial
from types import SimpleNamespace
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.data_schemas.limits import MAX_TARGET
from stopwise.models.base import Model, ParamSpec
from stopwise.models.contest.certify import UncertifiedAnswer
from stopwise.models.contest.game import (
    ContestGame,
    default_max_target,
    make_game,
    resolve_utility,
)
from stopwise.models.contest.play import (
    MAX_LEVEL,
    concept_log_probs,
    hazard_loglik,
    simulate_contest,
)
from stopwise.models.contest.qre import fixed_point_residual
from stopwise.models.contest.sequential_certify import sequential_check
from stopwise.models.contest.sequential_likelihood import (
    GAME_FIELDS,
    SequentialPart,
    sequential_conditions,
)
from stopwise.models.contest.sequential_simulate import simulate_sequential_design
from stopwise.models.utility import UTILITIES

CONCEPTS = ("nash", "qre", "aqre", "levelk", "ch")
QRE_SIMULATION_TOLERANCE = 1e-6  # largest fixed-point residual a simulation accepts
CONDITION_FIELDS = (*GAME_FIELDS, "cond_contest")  # what a condition's game is built from

_PRECISION = ParamSpec("precision", 0.0, np.inf, 1.0, "logit precision of responses")
_TAU = ParamSpec("tau", 0.0, 8.0, 1.5, "cognitive-hierarchy mean thinking steps")
_LEVEL = ParamSpec("level", 0.0, float(MAX_LEVEL), 1.5, "level-k depth")
LEVEL_NOTE = (
    f"level is the mean depth of a population of levels 0..{MAX_LEVEL} with binomial weights "
    f"w_k = C({MAX_LEVEL},k) q^k (1-q)^({MAX_LEVEL}-k), q = level/{MAX_LEVEL} (a continuous "
    "mean, not one integer depth: 1.5 means a mix of depths around 1.5); an integer depth "
    "is fitted with the model option level=K"
)
_TREMBLE = ParamSpec("tremble", 0.0, 1.0, 0.05, "share of uniformly random targets")
# money outcomes include 0, so CRRA needs r < 1 for a finite u(0)
_CRRA_R = ParamSpec("r", -1.5, 0.95, 0.3, "CRRA curvature (u = x^(1-r)/(1-r))")


def utility_params(name: str) -> tuple[ParamSpec, ...]:
    """Parameters of the utility family `name` (CRRA bounded to r < 1 in contests)."""
    if name == "linear":
        return ()
    if name == "crra":
        return (_CRRA_R,)
    if name in UTILITIES:
        return tuple(getattr(UTILITIES[name], "params", ()))
    resolve_utility(name)  # raises with the list of known utilities
    return ()


# ----------------------------------------------------------------------------- the model


def build_contest_model(parts: list[str], **options: Any) -> Model:
    """A contest Model from spec parts: one utility, one concept, optionally "tremble"."""
    parts = [p.strip().lower() for p in parts]
    concepts = [p for p in parts if p in CONCEPTS]
    if len(concepts) != 1:
        raise StopwiseInputError(
            f"a contest model needs exactly one play concept among {', '.join(CONCEPTS)}; "
            f"got {'+'.join(parts)!r}"
        )
    concept = concepts[0]
    rest = [p for p in parts if p != concept]
    tremble = "tremble" in rest or concept == "nash"
    rest = [p for p in rest if p != "tremble"]
    if len(rest) > 1:
        raise StopwiseInputError(
            f"a contest model takes one utility, a concept and optionally 'tremble'; "
            f"could not place {', '.join(rest[1:])!r} in {'+'.join(parts)!r}"
        )
    utility_name = rest[0] if rest else "linear"
    utility = resolve_utility(utility_name)
    level = options.get("level")
    if level is not None and not (isinstance(level, (int, np.integer)) and 0 <= level <= MAX_LEVEL):
        raise StopwiseInputError(f"level must be an integer in 0..{MAX_LEVEL}, got {level!r}")
    if options.get("level0", "uniform") not in ("uniform", "solo"):
        raise StopwiseInputError("level0 must be 'uniform' or 'solo'")
    params = list(utility_params(utility_name))
    if concept in ("qre", "aqre", "levelk", "ch"):
        params.append(_PRECISION)
    if concept == "levelk" and level is None:
        params.append(_LEVEL)
    if concept == "ch":
        params.append(_TAU)
    if tremble:
        params.append(_TREMBLE)
    cap_memory: dict[str, int] = {}
    sequential = SequentialPart(concept, tremble, utility, options)  # sequential contests
    if options.get("max_target") is not None:
        cap_memory["cap"] = int(options["max_target"])
        if cap_memory["cap"] < 1:
            raise StopwiseInputError("max_target must be at least 1")
        if cap_memory["cap"] > MAX_TARGET:
            raise StopwiseInputError(
                f"max_target must be at most {MAX_TARGET} (the documented limit, README 'Limits')"
            )

    def resolve_cap(data: Any) -> int:
        cap = cap_memory.get("cap")
        concrete = None
        try:
            concrete = (
                np.asarray(data.cond_p_survive),
                np.asarray(data.cond_contest),
                np.asarray(data.step),
                np.asarray(data.draw),
                np.asarray(data.cond),
            )
        except (jax.errors.TracerArrayConversionError, jax.errors.ConcretizationTypeError):
            if cap is None:
                raise StopwiseInputError(
                    "the contest model's cap on targets could not be derived inside a JAX "
                    "transformation; build the model with max_target=M (--max-target) or "
                    "call model.options['prepare'](data) on concrete data first"
                ) from None
        if concrete is not None:
            p, contest, step, draw, cond = concrete
            contest = contest > 0.5
            if cap is None or "from_data" in cap_memory:
                p_max = float(np.max(p[contest])) if contest.any() else float(np.max(p))
                cap = max(cap or 0, default_max_target(p_max))
                cap_memory.update(cap=cap, from_data=1)
            rows = contest[cond]
            if rows.any():
                needed = int(np.max(step[rows] + (draw[rows] > 0.5)))
                if needed > max(cap, int(data.horizon) - 1):
                    raise StopwiseInputError(
                        f"the data hold a contest draw at step {needed - 1}, so targets up to "
                        f"at least {needed} are needed; max_target is {cap}"
                    )
            _warn_identification(utility_name, data)
            sequential.prepare(data, max(int(cap), int(data.horizon) - 1))
        return max(int(cap), int(data.horizon) - 1)

    def condition_log_probs(theta: Mapping[str, Any], data: Any, cap: int) -> Any:
        contest = data.cond_contest > 0.5

        def one(
            p: Any, gain: Any, start: Any, keep: Any, n: Any, prize: Any, kb: Any, is_contest: Any
        ) -> Any:
            game = make_game(
                p,
                jnp.where(is_contest, n, 2.0),
                jnp.where(is_contest, prize, 1.0),
                jnp.where(is_contest, kb, 0.0),
                cap,
                gain,
                start,
                keep,
                utility,
                theta,
            )
            return concept_log_probs(concept, theta, game, options)

        return jax.vmap(one)(
            data.cond_p_survive,
            data.cond_gain,
            data.cond_start,
            data.cond_bust_keep,
            data.cond_n_players,
            data.cond_prize,
            data.cond_keep_bank,
            contest,
        )

    def loglik_obs(theta: Mapping[str, Any], data: Any) -> Any:
        cap = resolve_cap(data)
        if sequential.only_sequential and sequential.games_for(data):  # no simultaneous play
            return sequential.loglik(theta, data, cap, jnp.zeros_like(data.draw))
        log_sigma = condition_log_probs(theta, data, cap)
        ll = jax.vmap(hazard_loglik)(log_sigma[data.cond], data.step, data.draw)
        ll = jnp.where(data.cond_contest[data.cond] > 0.5, ll, 0.0)
        return sequential.loglik(theta, data, cap, ll)

    def predict(theta: Mapping[str, Any], data: Any) -> Any:
        cap = resolve_cap(data)
        log_sigma = condition_log_probs(theta, data, cap)
        ones = jnp.ones_like(data.draw)
        draw = jnp.exp(jax.vmap(hazard_loglik)(log_sigma[data.cond], data.step, ones))
        return sequential.draw_probability(theta, data, cap, draw)

    @partial(jax.jit, static_argnums=(5, 9))
    def _distribution(
        theta: Mapping[str, Any],
        p_survive: Any,
        n_players: Any,
        prize: Any,
        keep_bank: Any,
        cap: int,
        gain: Any,
        start: Any,
        bust_keep: Any,
        top_k: int = 1,
    ) -> Any:
        game = make_game(
            p_survive,
            n_players,
            prize,
            keep_bank,
            cap,
            gain,
            start,
            bust_keep,
            utility,
            theta,
            top_k,
        )
        return jnp.exp(concept_log_probs(concept, theta, game, options))

    def target_distribution(
        theta: Mapping[str, Any],
        p_survive: float,
        n_players: int,
        prize: float,
        keep_bank: float,
        cap: int,
        gain: float = 1.0,
        start: float = 0.0,
        bust_keep: float = 0.0,
        top_k: int = 1,
    ) -> np.ndarray:
        """Predicted target distribution over 0..cap in one contest condition (``top_k``:
        the prize shared among the k top banks, stopwise.models.contest.topk)."""
        theta = {k: jnp.asarray(v, jnp.float64) for k, v in theta.items()}
        return np.asarray(
            _distribution(
                theta,
                float(p_survive),
                float(n_players),
                float(prize),
                float(keep_bank),
                int(cap),
                float(gain),
                float(start),
                float(bust_keep),
                int(top_k),
            )
        )

    def fixed_point_residuals(theta: Mapping[str, Any], data: Any) -> np.ndarray:
        """Per contest condition, the QRE fixed-point residual max |x - log_softmax(lambda U)|
        of the likelihood's solution at theta (NaN for concepts without a fixed point)."""
        if concept != "qre":
            return np.full(np.asarray(data.cond_contest).shape, np.nan)
        cap = resolve_cap(data)
        values = {k: jnp.asarray(v, jnp.float64) for k, v in theta.items()}
        conditions = {name: getattr(data, name) for name in CONDITION_FIELDS}
        residuals = np.asarray(_residual_program(values, conditions, cap))
        return np.where(sequential_conditions(data), np.nan, residuals)  # no fixed point there

    @partial(jax.jit, static_argnums=2)
    def _residual_program(theta: Mapping[str, Any], conditions: Mapping[str, Any], cap: int) -> Any:
        """fixed_point_residuals' computation as one compiled program per cap and number of
        conditions (run eagerly it compiled about a hundred one-operation programs)."""
        data = SimpleNamespace(**conditions)
        log_sigma = condition_log_probs(theta, data, cap)
        return jax.vmap(lambda ls, g: fixed_point_residual(ls, theta["precision"], g))(
            log_sigma, _condition_games(theta, data, cap)
        )

    def _condition_games(theta: Mapping[str, Any], data: Any, cap: int) -> ContestGame:
        contest = data.cond_contest > 0.5
        return jax.vmap(
            lambda p, gain, start, keep, n, prize, kb, c: make_game(
                p,
                jnp.where(c, n, 2.0),
                jnp.where(c, prize, 1.0),
                jnp.where(c, kb, 0.0),
                cap,
                gain,
                start,
                keep,
                utility,
                theta,
            )
        )(
            data.cond_p_survive,
            data.cond_gain,
            data.cond_start,
            data.cond_bust_keep,
            data.cond_n_players,
            data.cond_prize,
            data.cond_keep_bank,
            contest,
        )

    def certified_distribution(theta: Mapping[str, Any], *setting: Any) -> np.ndarray:
        """target_distribution, refused (UncertifiedAnswer) for logit QRE when its fixed
        point is not solved: residual max |log sigma - log_softmax(lambda U(sigma))| above
        QRE_SIMULATION_TOLERANCE (McKelvey & Palfrey 1995)."""
        sigma = target_distribution(theta, *setting)
        if concept != "qre":
            return sigma
        p_survive, n_players, prize, keep_bank, cap, *rest = setting
        natural = {k: jnp.asarray(v, jnp.float64) for k, v in theta.items()}
        game = make_game(
            p_survive, n_players, prize, keep_bank, cap, *rest, utility=utility, theta=natural
        )
        pure = target_distribution({**theta, "tremble": 0.0} if tremble else theta, *setting)
        log_sigma = jnp.log(jnp.clip(jnp.asarray(pure), 1e-300, None))
        residual = float(fixed_point_residual(log_sigma, natural["precision"], game))
        if not residual <= QRE_SIMULATION_TOLERANCE:
            raise UncertifiedAnswer(
                f"the logit QRE at precision {float(natural['precision']):g} is not solved "
                f"(fixed-point residual {residual:.3g} > {QRE_SIMULATION_TOLERANCE:g}); "
                "nothing was simulated: lower the precision or use the nash concept"
            )
        return sigma

    def simulate(theta: Mapping[str, Any], design: pd.DataFrame, key: Any) -> pd.DataFrame:
        if "order" in design:  # sequential contests (models/contest/sequential_simulate.py)
            return simulate_sequential_design(theta, design, key, concept, utility, options)
        return simulate_contest(certified_distribution, theta, design, key, options)

    name = "+".join([utility_name, concept] + (["tremble"] if tremble else []))
    return Model(
        name=name,
        params=tuple(params),
        loglik_obs=loglik_obs,
        simulate=simulate,
        data_kind="contest",
        predict=predict,
        options={
            **options,
            "concept": concept,
            "utility": utility_name,
            # Nash play is solved on the host (jax.pure_callback, contest/play.py)
            "host_callback": concept == "nash",
            "target_distribution": target_distribution,
            "prepare": resolve_cap,
            "notes": (LEVEL_NOTE,) if concept == "levelk" and level is None else (),
            "cap_in_use": lambda: cap_memory.get("cap"),
            "fixed_point_residual": fixed_point_residuals,
            "sequential_check": lambda theta, data: sequential_check(
                theta, data, resolve_cap(data), sequential
            ),
        },
        description=f"contest play: {concept} with {utility_name} utility"
        + (" and trembles" if tremble else ""),
    )


def identification_warnings(utility_name: str, data: Any) -> list[str]:
    """Parameters the contest data cannot identify (checked on concrete data)."""
    notes = []
    contest = np.asarray(data.cond_contest) > 0.5
    keep = np.asarray(data.cond_keep_bank)[contest]
    if utility_params(utility_name) and contest.any() and np.all(keep < 0.5):
        notes.append(
            "utility curvature is not identified by winner-take-all contests with a single "
            "prize: money is 0 or the prize, and any utility is affine on {0, prize}; its "
            "estimate only reflects the starting value and the precision's scale"
        )
    return notes


def _warn_identification(utility_name: str, data: Any) -> None:
    for note in identification_warnings(utility_name, data):
        warnings.warn(note, UserWarning, stacklevel=3)
