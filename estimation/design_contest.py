"""Expected information of a contest design: every trial is a contest of ``players`` for
``prize`` (``keep_bank``: players keep their own bank besides the prize).

A contest model (stopwise.models.contest.build) gives, per condition, a target distribution
sigma over the targets 0..M, M the model's cap on targets; a player draws at step s with
the hazard d_s = S(s+1) / S(s), S(s) = sum_(t >= s) sigma_t, and stops at s with
sigma_s / S(s). Players' targets are independent draws from sigma, so one player's trial is
a path of decisions exactly as in a solo trial and design_info's recursion applies:

    I_c(theta) = sum_(s < M) R_s [ d_s g_s g_s' + (1 - d_s) h_s h_s' ],
    R_0 = 1,  R_(s+1) = R_s d_s p.

Step M needs no row: S(M + 1) = 0, so a player who reaches M stops there with probability
one and that decision carries no information. The sum is therefore exact, with no path
mass left out.

The probe must describe the same game the fit will see. The contest likelihood sizes its
target set as max(M, horizon - 1) from the data it is given, and a logit response puts
mass on every target it is offered; so a probe whose horizon exceeds M + 1 silently solves
a larger game (more targets, different sigma). That was the earlier ~10% disagreement with
path enumeration (the probe used the solo cap rule, p^H <= 1e-10, as its horizon). Here M
comes from the model's own rule (``prepare`` on a one-step probe: the option
``max_target``, else ``default_max_target`` at the largest chance) and the probe holds
steps 0..M-1 with horizon M.

Certificate beside the information: for the logit QRE, the fixed-point residual
max_t |log sigma_t - log_softmax(lambda U(sigma))_t| of the likelihood's solution in every
condition and at every parameter point (McKelvey & Palfrey 1995 define the QRE as this
fixed point); above MAX_QRE_RESIDUAL the design is refused.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.arrays import StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation import design_info as D
from stopwise.models.base import Model
from stopwise.models.contest.build import concept_log_probs
from stopwise.models.contest.game import make_game, resolve_utility
from stopwise.models.contest.qre import fixed_point_residual

MAX_QRE_RESIDUAL = 1e-6


@dataclass(frozen=True)
class ContestScheme:
    """A contest played in every trial: group size, prize to the top bank, and whether
    players keep their own bank besides the prize."""

    players: int
    prize: float
    keep_bank: bool = False

    def to_dict(self) -> dict[str, float | int | bool]:
        return {"players": self.players, "prize": self.prize, "keep_bank": self.keep_bank}


def check_scheme(scheme: ContestScheme | None) -> ContestScheme:
    """A scheme is needed and must have at least 2 players and a positive finite prize."""
    if scheme is None:
        raise StopwiseInputError(
            "a contest model needs the contest scheme: players, prize and keep_bank "
            "(--players, --prize, --keep-bank)"
        )
    if int(scheme.players) < 2 or not (np.isfinite(scheme.prize) and scheme.prize > 0):
        raise StopwiseInputError(
            f"contest scheme players={scheme.players}, prize={scheme.prize}: expected at "
            "least 2 players and a positive prize"
        )
    return scheme


def contest_probe(
    p_survive: Sequence[float],
    gain: float | Sequence[float],
    start: float,
    scheme: ContestScheme,
    n_steps: int,
) -> StoppingData:
    """design_info.condition_probe with every condition a contest of ``scheme`` and the
    horizon equal to ``n_steps`` (so the model's target set is not enlarged)."""
    probe = D.condition_probe(p_survive, gain, start, n_steps)
    n_cond = len(p_survive)
    return StoppingData(
        **{
            **{f: getattr(probe, f) for f in probe.__dataclass_fields__},
            "cond_contest": np.ones(n_cond),
            "cond_n_players": np.full(n_cond, float(scheme.players)),
            "cond_prize": np.full(n_cond, float(scheme.prize)),
            "cond_keep_bank": np.full(n_cond, float(bool(scheme.keep_bank))),
            "horizon": n_steps,
        }
    )


def model_cap(
    model: Model,
    p_survive: Sequence[float],
    gain: float | Sequence[float],
    start: float,
    scheme: ContestScheme,
) -> tuple[int, list[str]]:
    """(the model's cap M on targets for these conditions, its identification warnings):
    the model's own ``prepare`` on a one-step probe of the same conditions."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        cap = int(model.options["prepare"](contest_probe(p_survive, gain, start, scheme, 1)))
    return cap, [str(w.message) for w in caught]


def contest_path_tables(
    model: Model,
    thetas: Sequence[Mapping[str, float]],
    p_survive: Sequence[float],
    gain: float | Sequence[float],
    start: float,
    scheme: ContestScheme,
) -> tuple[D.PathTables, list[str]]:
    """(PathTables over steps 0..M-1, notes). The mass reaching step M stops there with
    probability one, so ``truncated_mass`` is exactly zero (module docstring)."""
    scheme = check_scheme(scheme)
    cap, notes = model_cap(model, p_survive, gain, start, scheme)
    probe = contest_probe(p_survive, gain, start, scheme, cap)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # already collected by model_cap
        tables = D.probe_tables(model, thetas, p_survive, probe, cap)
    exact = D.PathTables(
        tables.log_draw,
        tables.log_stop,
        tables.grad_draw,
        tables.grad_stop,
        tables.log_reach,
        np.zeros_like(tables.truncated_mass),
    )
    return exact, notes


@partial(jax.jit, static_argnames=("cap", "utility_name"))
def _condition_residuals(
    theta: Mapping[str, Any],
    p_survive: Any,
    gains: Any,
    start: Any,
    scheme: tuple[Any, Any, Any],
    cap: int,
    utility_name: str,
) -> Any:
    """Per condition, max_t |log sigma_t - log_softmax(lambda U(sigma))_t| of the logit QRE
    the likelihood solves (the same make_game and concept_log_probs, compiled once)."""
    players, prize, keep_bank = scheme
    utility = resolve_utility(utility_name)

    def one(p: Any, gain: Any) -> Any:
        game = make_game(p, players, prize, keep_bank, cap, gain, start, 0.0, utility, theta)
        log_sigma = concept_log_probs("qre", theta, game, {})
        return fixed_point_residual(log_sigma, theta["precision"], game)

    return jax.vmap(one)(p_survive, gains)


def qre_residuals(
    model: Model,
    thetas: Sequence[Mapping[str, float]],
    p_survive: Sequence[float],
    gain: float | Sequence[float],
    start: float,
    scheme: ContestScheme,
) -> np.ndarray:
    """Largest fixed-point residual over the conditions per parameter point (m,), NaN for
    concepts without a fixed point, inf where it is not finite (module docstring). The
    tremble is left out: the fixed point is the QRE before the tremble is mixed in."""
    if model.options.get("concept") != "qre":
        return np.full(len(thetas), np.nan)
    cap, _ = model_cap(model, p_survive, gain, start, scheme)
    ps = jnp.asarray(p_survive, dtype=jnp.float64)
    gains = jnp.broadcast_to(jnp.asarray(gain, dtype=jnp.float64), ps.shape)
    setting = (float(scheme.players), float(scheme.prize), float(bool(scheme.keep_bank)))
    out = []
    for theta in thetas:
        pure = {k: jnp.float64(v) for k, v in theta.items() if k != "tremble"}
        residual = _condition_residuals(
            pure, ps, gains, float(start), setting, cap, str(model.options["utility"])
        )
        worst = float(jnp.max(residual))
        out.append(worst if np.isfinite(worst) else np.inf)
    return np.array(out)
