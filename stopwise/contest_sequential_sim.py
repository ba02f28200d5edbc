"""Invented sequential-contest data (trial level, with ``order`` and ``rival_bank``) drawn
from the exact solution or from agent logit play (stopwise.models.contest.sequential*).

Groups of ``players`` invented participants play ``trials`` contests each, in a fixed order
(player 1 moves first). Start 0, bust_keep 0, so a bust ends at bank 0. Each mover's play is a
stop probability per bank level given the state (best bank so far, number tied at it):
1 at the exact rule's target and 0 below it, or the logit probabilities.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from stopwise.contest_sequential import max_regret
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.certify import DEFAULT_TOLERANCE as CERTIFICATE_TOLERANCE
from stopwise.models.contest.certify import UncertifiedAnswer
from stopwise.models.contest.game import default_max_target
from stopwise.models.contest.sequential import (
    NONE,
    SequentialGame,
    crra,
    make_sequential_game,
    payoff_range,
    solve_sequential,
)
from stopwise.models.contest.sequential_qre import solve_sequential_logit

MAX_SIMULATED_CONTESTS = 10_000_000


def exact_stop_probs(targets: np.ndarray, cap: int) -> np.ndarray:
    """Stop probabilities per state and bank level for pure targets: 1 at the target."""
    levels = np.arange(cap + 1)
    return (levels == np.clip(targets, 0, cap)[..., None]).astype(float)


def play_mover(
    game: SequentialGame, stop_probs: np.ndarray, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """Draws (successes) and bust flags of one mover per contest; stop_probs has one row of
    per-level stop probabilities per contest."""
    n = stop_probs.shape[0]
    alive = np.ones(n, dtype=bool)
    draws = np.zeros(n, dtype=int)
    busted = np.zeros(n, dtype=bool)
    for k in range(game.cap + 1):
        stopping = alive & (rng.random(n) < stop_probs[:, k])
        alive &= ~stopping
        survive = rng.random(n) < game.p_survive
        busted |= alive & ~survive
        alive &= survive
        draws = np.where(alive, k + 1, draws)
    return draws, busted


def simulate_sequential(
    p_survive: float,
    players: int,
    prize: float,
    groups: int,
    trials: int,
    keep_bank: bool = False,
    precision: float | None = None,
    max_target: int | None = None,
    seed: int = 0,
    r: float | None = None,
) -> pd.DataFrame:
    """Trial-level rows (subject, trial, p_survive, gain, draws, busted, task, group,
    n_players, prize, keep_bank, order, rival_bank) of groups x trials sequential contests;
    exact play without ``precision`` (refused unless it passes the solution's regret check),
    agent logit play with it; risk neutral, or CRRA over the money of the contest with
    curvature ``r`` (u(x) = (x^(1-r) - 1)/(1-r), r < 1)."""
    if groups < 1 or trials < 1 or groups * trials > MAX_SIMULATED_CONTESTS:
        raise StopwiseInputError(
            f"groups and trials must be >= 1 with groups x trials <= {MAX_SIMULATED_CONTESTS}"
        )
    cap = default_max_target(p_survive) if max_target is None else int(max_target)
    game = make_sequential_game(p_survive, players, prize, keep_bank, cap, utility=crra(r))
    if precision is None:
        solution = solve_sequential(game)
        regret, mismatch = max_regret(solution)
        scale = payoff_range(game)
        if max(regret, mismatch) > CERTIFICATE_TOLERANCE * scale:
            raise UncertifiedAnswer(
                f"the sequential solution failed its check (regret {regret:.3g}, value "
                f"mismatch {mismatch:.3g}); nothing simulated"
            )
        stop_tables = [exact_stop_probs(t, cap) for t in solution.targets]
    else:
        stop_tables = solve_sequential_logit(game, precision).stop_probs
    rng = np.random.default_rng(seed)
    n = groups * trials
    best = np.full(n, NONE)
    tied = np.zeros(n, dtype=int)
    banked = np.full(n, np.nan)  # best bank of earlier movers that did not bust
    columns: dict[str, list[np.ndarray]] = {"draws": [], "busted": [], "rival": []}
    for j in range(players):
        columns["rival"].append(banked.copy())
        draws, busted = play_mover(game, stop_tables[j][best + 1, tied], rng)
        index = game.reach_index[draws]
        index = np.where(busted, game.bust_index[np.minimum(draws, cap - 1)], index)
        ahead = (best == NONE) | (index > best)
        tied = np.where(ahead, 1, np.where(index == best, tied + 1, tied))
        best = np.where(ahead, index, best)
        columns["draws"].append(draws)
        columns["busted"].append(busted)
        own = np.where(busted, np.nan, draws.astype(float))
        banked = np.fmax(banked, own)
    group = np.repeat(np.arange(groups), trials)
    trial = np.tile(np.arange(1, trials + 1), groups)
    frames = [
        pd.DataFrame(
            {
                "subject": [f"g{g}p{j + 1}" for g in group],
                "trial": trial,
                "p_survive": p_survive,
                "gain": 1.0,
                "draws": columns["draws"][j],
                "busted": columns["busted"][j].astype(int),
                "task": "contest",
                "group": [f"g{g}" for g in group],
                "n_players": players,
                "prize": float(prize),
                "keep_bank": int(keep_bank),
                "order": j + 1,
                "rival_bank": columns["rival"][j],
            }
        )
        for j in range(players)
    ]
    return pd.concat(frames).sort_values(["group", "trial", "order"]).reset_index(drop=True)
