"""Certified symmetric play of one stopping contest: input checks, the concept's solver, its
certificate (stopwise.models.contest.certify) and the result record of ``equilibrium``.

Limits (refused up front with exit code 2 on the command line): players <= MAX_PLAYERS,
tau <= MAX_TAU, precision x payoff range <= MAX_SCALED_PRECISION, finite numbers only,
max_target <= CAP_LIMIT.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from typing import Any

import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.agent import agent_qre_with_residual
from stopwise.models.contest.certify import (
    DEFAULT_TOLERANCE,
    Certificate,
    UncertifiedAnswer,
    dominated_mass,
    exact_certificate,
    fixed_point_certificate,
    nash_certificate,
    symmetric_regret,
)
from stopwise.models.contest.dominance import Elimination, contest_elimination
from stopwise.models.contest.game import (
    CAP_LIMIT,
    ContestGame,
    as_jax_game,
    default_max_target,
    expected_bank,
    make_numpy_game,
    resolve_utility,
    target_distribution_stats,
    target_payoffs,
)
from stopwise.models.contest.levelk import ch_population, level0_strategy, levelk_strategies
from stopwise.models.contest.nash import contest_nash
from stopwise.models.contest.qre import qre_symmetric_certified

CONCEPTS = ("nash", "qre", "levelk", "ch", "aqre")
CH_DEPTH = 15
MAX_PLAYERS = 20
MAX_TAU = 10.0
MAX_SCALED_PRECISION = 1e8
DOMINATED_MASS_WARNING = 0.01
EFFICIENCY_LOSS_DEFINITION = (
    "1 - (expected total bank of the N players) / (N x the best expected bank of a single "
    "risk-neutral player on their own, max_t E[bank | target t]): the share of the solo "
    "risk-neutral optimum lost to contest play"
)


def _finite(name: str, value: float) -> float:
    value = float(value)
    if not math.isfinite(value):
        raise StopwiseInputError(f"{name} must be a finite number, got {value}")
    return value


def _check_setup(
    p_survive: float,
    players: int,
    prize: float,
    gain: float,
    max_target: int | None,
    bust_keep: float,
    start: float,
) -> int:
    """Validate a contest setting (finite numbers, players 2..MAX_PLAYERS); returns the cap."""
    for name, value in (("p_survive", p_survive), ("prize", prize), ("gain", gain)):
        _finite(name, value)
    _finite("bust_keep", bust_keep)
    _finite("start", start)
    if not 0.0 < p_survive < 1.0:
        raise StopwiseInputError(f"p_survive must lie strictly between 0 and 1, got {p_survive}")
    if int(players) != players or players < 2:
        raise StopwiseInputError(f"players must be an integer >= 2, got {players}")
    if players > MAX_PLAYERS:
        raise StopwiseInputError(
            f"players must be at most {MAX_PLAYERS} (the limit of the symmetric solver), "
            f"got {players}"
        )
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
    if int(max_target) != max_target or not 1 <= max_target <= CAP_LIMIT:
        raise StopwiseInputError(
            f"max_target must be an integer in 1..{CAP_LIMIT}, got {max_target}"
        )
    return int(max_target)


def _check_concept_inputs(
    concept: str, precision: float | None, tau: float | None, level: int | None
) -> None:
    """Refuse parameters the concept does not use, and non-finite or out-of-range values."""
    if concept not in CONCEPTS:
        raise StopwiseInputError(
            f"unknown concept {concept!r}; choose one of {', '.join(CONCEPTS)}"
        )
    uses = {"precision": concept != "nash", "tau": concept == "ch", "level": concept == "levelk"}
    for name, value in (("precision", precision), ("tau", tau), ("level", level)):
        if value is None:
            continue
        if not uses[name]:
            raise StopwiseInputError(
                f"{name} (--{name}) is not used by {concept} play; drop it"
                + (" or choose qre, levelk, ch or aqre" if name == "precision" else "")
            )
        _finite(name, value)
    if tau is not None and not 0 < tau <= MAX_TAU:
        raise StopwiseInputError(
            f"tau must lie in (0, {MAX_TAU:g}] (levels are truncated at {CH_DEPTH}), got {tau}"
        )


def _need(name: str, value: Any, concept: str) -> float:
    if value is None:
        raise StopwiseInputError(f"concept {concept!r} needs {name} (--{name})")
    value = float(value)
    if not value > 0 and name != "level":
        raise StopwiseInputError(f"{name} must be positive, got {value}")
    return value


def _check_precision(lam: float, game: ContestGame) -> float:
    scaled = lam * float(game.payoff_range)
    if scaled > MAX_SCALED_PRECISION:
        raise StopwiseInputError(
            f"precision x payoff range is {scaled:.3g}, above the limit "
            f"{MAX_SCALED_PRECISION:g}: logit play there is Nash play up to rounding; use "
            "concept nash (--concept nash)"
        )
    return lam


def concept_strategy(
    game: ContestGame,
    concept: str,
    precision: float | None = None,
    tau: float | None = None,
    level: int | None = None,
    level0: str = "uniform",
    tolerance: float = DEFAULT_TOLERANCE,
) -> tuple[np.ndarray, dict[str, Any]]:
    """The symmetric target distribution of `concept` in `game` (numpy arrays), with solver
    details: method, notes and, for the fixed-point concepts, the residual."""
    if concept == "nash":
        sigma, _, method, notes = contest_nash(game)
        return np.asarray(sigma, float), {"method": method, "notes": notes}
    lam = _check_precision(_need("precision", precision, concept), game)
    jax_game = as_jax_game(game)
    if concept == "qre":
        qre = qre_symmetric_certified(lam, jax_game, tolerance=tolerance)
        method = f"symmetric logit QRE on the principal branch ({qre.message}), Newton in log space"
        return qre.sigma, {"method": method, "residual": qre.residual}
    if concept == "aqre":
        log_sigma, residual = agent_qre_with_residual(jnp.float64(lam), jax_game)
        method = "agent logit QRE on draw/stop decisions, continuation in lambda and Newton"
        return np.exp(np.asarray(log_sigma)), {"method": method, "residual": float(residual)}
    sigma0 = level0_strategy(jax_game, level0)

    def payoffs(s: Any) -> Any:
        return target_payoffs(jax_game, s)

    if concept == "levelk":
        k = _need("level", level, concept)
        if int(k) != k or k < 0:
            raise StopwiseInputError(f"level must be an integer >= 0, got {level}")
        sigma = levelk_strategies(payoffs, sigma0, lam, int(k))[-1]
        return np.asarray(sigma), {"method": f"level-{int(k)} logit responses from level 0"}
    if concept == "ch":
        t = _need("tau", tau, concept)
        sigma = ch_population(payoffs, sigma0, lam, t, CH_DEPTH)
        method = f"Poisson cognitive hierarchy, levels 0..{CH_DEPTH}, logit responses"
        return np.asarray(sigma), {"method": method}
    raise StopwiseInputError(f"unknown concept {concept!r}; choose one of {', '.join(CONCEPTS)}")


def certify(
    concept: str,
    game: ContestGame,
    sigma: np.ndarray,
    details: Mapping[str, Any],
    dominated: list[int],
    tolerance: float = DEFAULT_TOLERANCE,
) -> tuple[Certificate, float]:
    """The concept's certificate (models.contest.certify) and the max regret of sigma."""
    payoffs = np.asarray(target_payoffs(game, sigma))
    regret = symmetric_regret(payoffs, sigma)
    if concept == "nash":
        mass = dominated_mass(sigma, dominated)
        return nash_certificate(regret, float(game.payoff_range), mass, tolerance), regret
    if concept in ("qre", "aqre"):
        return fixed_point_certificate(details["residual"], tolerance), regret
    return exact_certificate(sigma, tolerance), regret


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
    tolerance: float = DEFAULT_TOLERANCE,
    allow_approximate: bool = False,
) -> dict[str, Any]:
    """Symmetric play of the contest under `concept` (nash, qre, levelk, ch, aqre), certified.

    Returns the DESIGN.md keys concept, targets, probs, expected_bank (E[final bank] of one
    player), win_prob, efficiency_loss (EFFICIENCY_LOSS_DEFINITION), max_regret
    (max_t U_t(sigma) - sigma.U(sigma), payoff units), certified, method, and extras:
    max_regret_share (regret / payoff range), certificate (kind, value, tolerance,
    statement), bust_rate, dominated (targets removed by iterated strict dominance),
    dominated_mass, cap, utility, notes. An answer that fails its certificate
    (models.contest.certify) raises UncertifiedAnswer unless ``allow_approximate``, when it
    is returned with certified False and a note. With ``r`` payoffs are CRRA expected
    utilities of money (r < 1).
    """
    _check_concept_inputs(concept, precision, tau, level)
    cap = _check_setup(p_survive, players, prize, gain, max_target, bust_keep, start)
    if r is not None and not (math.isfinite(r) and r < 1):
        raise StopwiseInputError(
            f"r must be finite and below 1 in contests (money can be 0), got {r}"
        )
    utility_name, theta = ("linear", {}) if r is None else ("crra", {"r": float(r)})
    game = make_numpy_game(
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
    sigma, details = concept_strategy(game, concept, precision, tau, level, tolerance=tolerance)
    sigma = np.clip(np.nan_to_num(sigma, nan=0.0), 0.0, None)
    sigma = sigma / sigma.sum() if sigma.sum() > 0 else sigma
    elimination = contest_elimination(game)
    dominated = [t for t, _, _ in elimination.removed]
    certificate, regret = certify(concept, game, sigma, details, dominated, tolerance)
    stats = target_distribution_stats(game, sigma)
    notes = _notes(concept, utility_name, keep_bank, elimination, sigma, dominated, details)
    method = details["method"]
    if not certificate.certified:
        message = f"the {concept} solver ({method}) failed its certificate: {certificate.statement}"
        if not allow_approximate:
            raise UncertifiedAnswer(
                f"{message}. Try another --max-target, a lower --precision, or "
                "--allow-approximate (Python: allow_approximate=True) to see the "
                "approximate answer marked uncertified"
            )
        notes.insert(0, f"APPROXIMATE, NOT CERTIFIED: {message}")
    return {
        "concept": concept,
        "targets": list(range(cap + 1)),
        "probs": sigma.tolist(),
        "expected_bank": float(stats["expected_bank"]),
        "win_prob": float(stats["win_prob"]),
        "efficiency_loss": efficiency_loss(game, sigma),
        "efficiency_loss_definition": EFFICIENCY_LOSS_DEFINITION,
        "bust_rate": float(stats["bust_rate"]),
        "max_regret": regret,
        "max_regret_share": regret / float(game.payoff_range),
        "payoff_range": float(game.payoff_range),
        "certified": certificate.certified,
        "certificate": certificate.as_dict(),
        "method": method,
        "dominated": dominated,
        "dominated_mass": dominated_mass(sigma, dominated),
        "cap": cap,
        "players": int(players),
        "prize": float(prize),
        "keep_bank": bool(keep_bank),
        "p_survive": float(p_survive),
        "utility": utility_name if r is None else f"crra(r={float(r):g})",
        "notes": notes,
    }


def efficiency_loss(game: ContestGame, sigma: np.ndarray) -> float:
    """1 - (sigma . E[bank | t]) / max_t E[bank | t] (EFFICIENCY_LOSS_DEFINITION; the N
    players are symmetric, so totals and per-player values give the same share)."""
    banks = np.asarray(expected_bank(game))
    return float(1.0 - (sigma @ banks) / banks.max())


def _notes(
    concept: str,
    utility_name: str,
    keep_bank: bool,
    elimination: Elimination,
    sigma: np.ndarray,
    dominated: list[int],
    details: Mapping[str, Any],
) -> list[str]:
    """Notes that are true for this concept and setting."""
    notes = list(details.get("notes", []))
    if not elimination.checked:
        notes.append(f"dominance {elimination.note}")
    if utility_name != "linear" and not keep_bank:
        if concept == "nash":
            notes.append(
                "winner-take-all with one prize: any utility is affine on {0, prize}, so r "
                "does not change the Nash equilibrium"
            )
        else:
            notes.append(
                "winner-take-all with one prize: r acts on logit play only through the payoff "
                "scale u(prize) - u(0), which multiplies the precision"
            )
    if concept in ("qre", "aqre", "levelk", "ch"):
        notes.append(
            "logit play puts mass on every target up to the cap, so the answer depends on the "
            "cap (--max-target), a modelling choice recorded as 'cap'"
        )
    mass = dominated_mass(sigma, dominated)
    if concept != "nash" and mass > DOMINATED_MASS_WARNING:
        message = (
            f"{100 * mass:.1f}% of the probability sits on strictly dominated targets "
            f"(above {100 * DOMINATED_MASS_WARNING:g}%); consider a smaller cap"
        )
        warnings.warn(message, UserWarning, stacklevel=3)
        notes.append(f"warning: {message}")
    return notes
