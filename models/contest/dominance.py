"""Iterated elimination of strictly dominated targets, including domination by mixtures.

Target t is strictly dominated (given the surviving targets R) when some mixture mu over
R \\ {t} does better against every opponent profile c of surviving targets:

    max eps  s.t.  sum_s mu_s U_s(c) - U_t(c) >= eps  for all c,  sum mu = 1,  mu >= 0,

with eps* > 0 (scipy's HiGHS LP). Payoffs are multilinear in the opponents' mixtures, so pure
opponent profiles suffice; in a symmetric contest they are the multisets of N-1 targets.
Elimination repeats until no target is removed (the order of removals does not change the
result for strict dominance). Each round first removes targets dominated by a single other
target (one vectorised comparison); the LP for mixtures runs only when no pure domination is
left, so the LP count is the number of survivors, not of all targets.
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import jax
import jax.numpy as jnp
import numpy as np
from scipy.optimize import linprog

from stopwise.models.contest.game import ContestGame, payoff_matrix, target_payoffs_profile

MAX_PROFILES = 5000


@dataclass(frozen=True)
class Elimination:
    """Targets removed, in order: (target, round, 'pure' or 'mixed'), and the survivors."""

    removed: list[tuple[int, int, str]]
    surviving: list[int]
    checked: bool
    note: str = ""


def dominating_margin(payoffs: np.ndarray, target: int, others: list[int]) -> tuple[float, bool]:
    """(eps*, pure) for rows `payoffs` (own target x opponent profile): the best margin of a
    mixture over `others` over row `target`, and whether a single target achieves it."""
    if not others:
        return -np.inf, False
    diff = payoffs[others] - payoffs[target][None, :]
    best_pure = float(np.max(np.min(diff, axis=1)))
    k = len(others)
    # variables (mu_1..mu_k, eps): minimise -eps s.t. eps - diff^T mu <= 0, sum mu = 1
    result = linprog(
        np.r_[np.zeros(k), -1.0],
        A_ub=np.c_[-diff.T, np.ones(diff.shape[1])],
        b_ub=np.zeros(diff.shape[1]),
        A_eq=np.r_[np.ones(k), 0.0][None, :],
        b_eq=[1.0],
        bounds=[(0, None)] * k + [(None, None)],
        method="highs",
    )
    eps = float(-result.fun) if result.status == 0 else -np.inf
    return max(eps, best_pure), best_pure >= eps - 1e-12


def purely_dominated(table: np.ndarray, surviving: list[int], margin: float) -> list[int]:
    """Targets t in `surviving` with some other surviving s such that
    min_c (table[s, c] - table[t, c]) > margin (strict domination by a pure target)."""
    rows = table[surviving]
    out = []
    for i, t in enumerate(surviving):
        worst_gap = np.min(rows - rows[i][None, :], axis=1)
        worst_gap[i] = -np.inf
        if np.max(worst_gap) > margin:
            out.append(t)
    return out


def iterated_elimination(
    payoffs: np.ndarray, profiles: list[tuple[int, ...]], tol: float = 1e-10
) -> Elimination:
    """Iterated strict dominance on a payoff table (rows: own targets; columns: opponent
    profiles, each a tuple of opponent targets); pure domination first in each round."""
    scale = 1.0 + float(np.ptp(payoffs))
    surviving = list(range(payoffs.shape[0]))
    removed: list[tuple[int, int, str]] = []
    round_ = 0
    while True:
        round_ += 1
        alive = set(surviving)
        columns = [j for j, prof in enumerate(profiles) if alive.issuperset(prof)]
        table = payoffs[:, columns]
        dominated = [(t, round_, "pure") for t in purely_dominated(table, surviving, tol * scale)]
        if not dominated:
            for t in surviving:
                eps, pure = dominating_margin(table, t, [s for s in surviving if s != t])
                if eps > tol * scale:
                    dominated.append((t, round_, "pure" if pure else "mixed"))
        if not dominated:
            return Elimination(removed, surviving, True)
        removed.extend(dominated)
        gone = {t for t, _, _ in dominated}
        surviving = [t for t in surviving if t not in gone]


def contest_elimination(game: ContestGame) -> Elimination:
    """Iterated strict dominance in the symmetric contest (opponent multisets of targets)."""
    n_targets = game.n_targets
    n_opp = round(float(game.n_players)) - 1
    count = math.comb(n_targets + n_opp - 1, n_opp)
    if count > MAX_PROFILES:
        return Elimination(
            [],
            list(range(n_targets)),
            False,
            f"not checked: {count} opponent profiles exceed {MAX_PROFILES}",
        )
    profiles = list(itertools.combinations_with_replacement(range(n_targets), n_opp))
    if n_opp == 1:  # two players: the columns are the payoff matrix A[t, s]
        return iterated_elimination(np.asarray(payoff_matrix(game)), profiles)
    onehots = jax.nn.one_hot(jnp.asarray(profiles), n_targets, dtype=jnp.float64)
    columns = jax.jit(jax.vmap(lambda opp: target_payoffs_profile(game, opp)))(onehots)
    return iterated_elimination(np.asarray(columns).T, profiles)
