"""Sweeps of contest equilibria over grids of survival chances and prizes.

``sweep_contests(p_survive, prize, players, cold_solve, ...)`` solves the symmetric play of
every setting of the grid (public entry: ``stopwise.contest.sweep``, which passes
``stopwise.contest.equilibrium`` as the cold solver) and returns one row per setting:

    p_survive, prize, players, keep_bank, concept, cap, prob_0..prob_cap (target
    probabilities), mean_target, expected_bank, bust_rate, efficiency_loss, win_prob,
    max_regret, regret_share, residual, certified, check, method, tv_prev

``efficiency_loss`` = 1 - E[bank] / max_t E[bank of target t];
``max_regret`` = max_t U_t(sigma) - sigma . U(sigma) on the full (unreduced) game,
``regret_share`` = max_regret / payoff range; ``residual`` (QRE) = max_t |sigma_t -
softmax(lambda U(sigma))_t|; ``tv_prev`` = (1/2) sum_t |sigma_t - sigma'_t|, the total
variation distance to the previous point along the swept axis (p_survive when it takes
several values, else prize), which locates the jumps of the equilibrium (NaN at the first
point of each line of the grid and after an uncertified point).

Every point starts from its neighbour along the swept axis (module stopwise.sweep_solvers):
two-player Nash first re-solves the indifference system on the neighbour's support, then
grows a restricted game from it; N-player Nash and QRE run Newton from the neighbour. A point
the warm start cannot certify is solved cold; an answer is certified when its regret is at
most ``tolerance`` times the payoff range (Nash) or its fixed-point residual at most
``tolerance`` (QRE). Level-k and cognitive hierarchy are exact by construction (the check
confirms a finite probability distribution). Uncertified rows raise UncertifiedSweepError
unless ``allow_approximate``, which keeps them, marked ``certified = False``.

One cap on targets serves the whole sweep (``max_target``, default the default cap at the
largest p_survive): targets beyond a point's own default cap are payoff-equivalent to it up
to 1e-12 of the payoff range, so Nash answers do not depend on it; QRE, level-k and CH do,
and the cap is recorded in every row.
"""

from __future__ import annotations

import inspect
import math
import sys
from collections.abc import Callable, Sequence
from typing import Any, NamedTuple

import jax.numpy as jnp
import numpy as np
import pandas as pd
from tqdm import tqdm

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.distributed import plan_for, run_tasks
from stopwise.models.contest.game import (
    ContestGame,
    default_max_target,
    expected_bank,
    make_game,
    resolve_utility,
    target_distribution_stats,
    target_payoffs,
)
from stopwise.models.contest.levelk import ch_population, level0_strategy, levelk_strategies
from stopwise.sweep_grid import check_grid, grid_lines, grid_settings, total_variation
from stopwise.sweep_solvers import (
    TwoPlayerTables,
    certified_on_support,
    n_player_regret,
    n_player_support_search,
    qre_newton,
    qre_residual,
    restricted_game_search,
    symmetric_lemke_howson,
    symmetric_regret,
    two_player_tables,
)
from stopwise.sweep_table import probability_columns, refusal_message, sweep_frame

CH_DEPTH = 15  # levels of cognitive hierarchy, as stopwise.contest.equilibrium
SUPPORT_THRESHOLD = 1e-12
SWEEP_CONCEPTS = ("nash", "qre", "levelk", "ch")


class UncertifiedSweepError(RuntimeError):
    """Some points of a sweep failed their certificate; ``table`` holds every row."""

    def __init__(self, message: str, table: pd.DataFrame) -> None:
        super().__init__(message)
        self.table = table


class Point(NamedTuple):
    sigma: np.ndarray
    method: str


def support_of(sigma: np.ndarray) -> list[int]:
    return [int(t) for t in np.flatnonzero(sigma > SUPPORT_THRESHOLD)]


# ----------------------------------------------------------------------------- one point


class Setting(NamedTuple):
    """Everything that defines one point of the sweep besides p_survive and prize."""

    players: int
    keep_bank: bool
    concept: str
    precision: float | None
    tau: float | None
    level: int | None
    r: float | None
    cap: int
    user_cap: bool
    gain: float
    start: float
    bust_keep: float
    tolerance: float


class Game(NamedTuple):
    """The point's game: two-player tables or the N-player normal form, its payoff
    function U(sigma) and payoff range."""

    tables: TwoPlayerTables | None
    game: ContestGame | None
    payoffs: Callable[[np.ndarray], np.ndarray]
    payoff_range: float


def build_game(p: float, prize: float, s: Setting) -> Game:
    """The full game of one point (two players: numpy tables; more: the JAX normal form)."""
    if s.players == 2 and s.concept == "nash":
        tables = two_player_tables(p, prize, s.keep_bank, s.cap, s.gain, s.start, s.bust_keep, s.r)
        return Game(tables, None, lambda sigma: tables.payoff @ sigma, tables.payoff_range)
    utility = resolve_utility("linear" if s.r is None else "crra")
    theta = {} if s.r is None else {"r": s.r}
    game = make_game(
        p, s.players, prize, float(s.keep_bank), s.cap, s.gain, s.start, s.bust_keep, utility, theta
    )
    u0, du = np.asarray(game.u0), np.asarray(game.du)
    return Game(
        None,
        game,
        lambda sigma: np.asarray(target_payoffs(game, jnp.asarray(sigma))),
        float(np.max(u0 + du) - np.min(u0)),
    )


def regret(g: Game, sigma: np.ndarray) -> float:
    """max_t U_t(sigma) - sigma . U(sigma) on the full game."""
    if g.tables is not None:
        return symmetric_regret(g.tables.payoff, sigma)
    assert g.game is not None
    return n_player_regret(g.game, sigma)


def cold_answer(
    p: float, prize: float, s: Setting, cold_solve: Callable[..., Any]
) -> tuple[np.ndarray | None, str]:
    """The cold solver's strategy padded to the sweep's cap, and a label. Nash is solved at
    the point's own default cap (targets beyond it are payoff-equivalent), other concepts at
    the sweep's cap. Input errors propagate; any other failure is reported, not raised."""
    own_cap = s.cap if s.user_cap or s.concept != "nash" else min(s.cap, default_max_target(p))
    options: dict[str, Any] = dict(
        p_survive=p,
        players=s.players,
        prize=prize,
        keep_bank=s.keep_bank,
        gain=s.gain,
        concept=s.concept,
        precision=s.precision,
        tau=s.tau,
        level=s.level,
        r=s.r,
        max_target=own_cap,
        start=s.start,
        bust_keep=s.bust_keep,
    )
    if "allow_approximate" in inspect.signature(cold_solve).parameters:
        options["allow_approximate"] = True  # we certify the answer ourselves
    try:
        result = cold_solve(**options)
    except StopwiseInputError:
        raise
    except Exception as exc:  # a solver failure marks the point, it does not end the sweep
        return None, f"cold solve failed ({type(exc).__name__}: {exc})"
    sigma = np.zeros(s.cap + 1)
    probs = np.asarray(result["probs"], dtype=float)
    sigma[: probs.size] = probs
    return sigma / sigma.sum(), f"cold: equilibrium ({result.get('method', s.concept)})"


def nash_candidates(
    p: float,
    prize: float,
    s: Setting,
    g: Game,
    previous: np.ndarray | None,
    cold_solve: Callable[..., Any],
) -> list[Point]:
    """Nash answers tried in order until one is certified (module docstring)."""
    goal = s.tolerance * g.payoff_range
    tried: list[Point] = []

    def found(sigma: np.ndarray | None, method: str) -> bool:
        if sigma is not None:
            tried.append(Point(sigma, method))
        return sigma is not None and regret(g, sigma) <= goal

    if previous is not None:
        if g.tables is not None:
            seed = support_of(previous)
            if found(certified_on_support(g.tables.payoff, seed, goal), "warm: same support"):
                return tried
            if found(restricted_game_search(g.tables.payoff, seed, goal), "warm: restricted game"):
                return tried
        else:
            assert g.game is not None
            if found(n_player_support_search(g.game, previous, goal), "warm: Newton on support"):
                return tried
    cold, label = cold_answer(p, prize, s, cold_solve)
    if found(cold, label) or (cold is None and g.tables is None):
        return tried
    if g.tables is not None:
        seed = support_of(cold) if cold is not None else [0]
        if found(restricted_game_search(g.tables.payoff, seed, goal), "rescue: restricted game"):
            return tried
        try:
            full = symmetric_lemke_howson(g.tables.payoff)
        except ArithmeticError:
            full = None
        found(full, "rescue: symmetric Lemke-Howson")
    elif cold is not None:
        assert g.game is not None
        found(n_player_support_search(g.game, cold, goal), "rescue: Newton on support")
    return tried


def qre_candidates(
    p: float,
    prize: float,
    s: Setting,
    g: Game,
    previous: np.ndarray | None,
    cold_solve: Callable[..., Any],
) -> list[Point]:
    """QRE: Newton from the neighbour, else the cold solver."""
    assert s.precision is not None
    if previous is not None:
        assert g.game is not None
        sigma = qre_newton(s.precision, previous, game=g.game)
        if qre_residual(sigma, g.payoffs(sigma), s.precision) <= s.tolerance:
            return [Point(sigma, "warm: Newton from neighbour")]
    cold, label = cold_answer(p, prize, s, cold_solve)
    return [] if cold is None else [Point(cold, label)]


def constructed(s: Setting, g: Game) -> list[Point]:
    """Level-k (level-0 uniform, logit responses) or Poisson cognitive hierarchy."""
    assert g.game is not None and s.precision is not None
    game = g.game

    def payoffs(sigma: Any) -> Any:
        return target_payoffs(game, sigma)

    sigma0 = level0_strategy(game, "uniform")
    if s.concept == "levelk":
        assert s.level is not None
        sigma = levelk_strategies(payoffs, sigma0, s.precision, int(s.level))[-1]
        return [Point(np.asarray(sigma), f"level-k recursion, level {s.level}")]
    assert s.tau is not None
    sigma = ch_population(payoffs, sigma0, s.precision, s.tau, CH_DEPTH)
    return [Point(np.asarray(sigma), f"cognitive hierarchy, {CH_DEPTH} levels")]


def certify(s: Setting, g: Game, point: Point) -> dict[str, Any]:
    """The point's certificate: regret (all concepts), residual (QRE), verdict and check."""
    sigma = point.sigma
    is_distribution = bool(
        np.all(np.isfinite(sigma)) and sigma.min() >= -1e-12 and abs(sigma.sum() - 1) <= 1e-9
    )
    max_regret = regret(g, sigma) if is_distribution else math.nan
    share = max_regret / g.payoff_range
    residual = math.nan
    if s.concept == "nash":
        ok, check = is_distribution and share <= s.tolerance, "max regret"
    elif s.concept == "qre":
        assert s.precision is not None
        residual = qre_residual(sigma, g.payoffs(sigma), s.precision)
        ok, check = is_distribution and residual <= s.tolerance, "fixed-point residual"
    else:
        ok, check = is_distribution, "exact by construction (a probability distribution)"
    return {
        "max_regret": max_regret,
        "regret_share": share,
        "residual": residual,
        "certified": ok,
        "check": check,
    }


def point_stats(g: Game, sigma: np.ndarray) -> dict[str, float]:
    """Expected bank, bust rate, win probability and efficiency loss of symmetric play."""
    if g.tables is not None:
        t = g.tables
        bank, banks = float(sigma @ t.bank), t.bank
        bust, win = float(sigma @ (1.0 - t.reach)), float(sigma @ t.win @ sigma)
    else:
        assert g.game is not None
        stats = target_distribution_stats(g.game, jnp.asarray(sigma))
        bank, banks = float(stats["expected_bank"]), np.asarray(expected_bank(g.game))
        bust, win = float(stats["bust_rate"]), float(stats["win_prob"])
    return {
        "mean_target": float(sigma @ np.arange(sigma.size)),
        "expected_bank": bank,
        "bust_rate": bust,
        "efficiency_loss": 1.0 - bank / float(banks.max()),
        "win_prob": win,
    }


def solve_point(
    p: float,
    prize: float,
    s: Setting,
    previous: np.ndarray | None,
    cold_solve: Callable[..., Any],
) -> dict[str, Any]:
    """One row of the sweep: the first certified candidate, else the least-regret one."""
    g = build_game(p, prize, s)
    if s.concept == "nash":
        candidates = nash_candidates(p, prize, s, g, previous, cold_solve)
    elif s.concept == "qre":
        candidates = qre_candidates(p, prize, s, g, previous, cold_solve)
    else:
        candidates = constructed(s, g)
    if not candidates:
        sigma = np.full(s.cap + 1, math.nan)
        return {"sigma": sigma, "method": "no solver returned an answer", "certified": False}
    checked = [(certify(s, g, c), c) for c in candidates]
    good = [pair for pair in checked if pair[0]["certified"]]
    cert, chosen = good[0] if good else min(checked, key=lambda pair: pair[0]["regret_share"])
    return {"sigma": chosen.sigma, "method": chosen.method, **cert, **point_stats(g, chosen.sigma)}


# ----------------------------------------------------------------------------- the sweep


def sweep_contests(
    p_survive: float | Sequence[float],
    prize: float | Sequence[float],
    players: int,
    cold_solve: Callable[..., Any],
    keep_bank: bool = False,
    concept: str = "nash",
    precision: float | None = None,
    tau: float | None = None,
    level: int | None = None,
    r: float | None = None,
    max_target: int | None = None,
    gain: float = 1.0,
    start: float = 0.0,
    bust_keep: float = 0.0,
    tolerance: float = 1e-6,
    allow_approximate: bool = False,
    progress: bool = False,
    workers: int | None = 0,
    scheduler: str | None = None,
) -> pd.DataFrame:
    """Symmetric play at every (p_survive, prize) of the grid (module docstring). Each line
    of the grid (``grid_lines``) is one task of the study runner: ``workers``/``scheduler``
    say where (estimation/distributed.py); the rows do not depend on where a line ran."""
    p_values = [float(v) for v in np.atleast_1d(p_survive)]
    prizes = [float(v) for v in np.atleast_1d(prize)]
    check_grid(p_values, prizes)
    setting = make_setting(
        p_values,
        players,
        keep_bank,
        concept,
        (precision, tau, level, r),
        max_target,
        (gain, start, bust_keep),
        tolerance,
    )
    axis, points = grid_settings(p_values, prizes)
    lines = grid_lines(axis, points)
    show = progress and sys.stderr.isatty()
    here = plan_for(workers, scheduler, len(lines)).kind == "in-process"
    bar = tqdm(total=len(points), desc="sweep", file=sys.stderr, disable=not (show and here))
    run = run_tasks(  # in-process: a bar over points; on a cluster: the runner's over lines
        solve_line,
        [{"line": line} for line in lines],
        workers=workers,
        scheduler=scheduler,
        progress=show and not here,
        desc="sweep lines",
        shared={"setting": setting, "cold_solve": cold_solve, "tick": bar.update if here else None},
    )
    bar.close()
    if not run.complete:
        raise RuntimeError("not every line of the sweep was solved: " + run.summary_line("lines"))
    rows = [row for line_rows in run.results for row in line_rows]
    table = sweep_frame(rows, setting)
    if not allow_approximate and not table["certified"].all():
        raise UncertifiedSweepError(refusal_message(table, concept), table)
    return table


def solve_line(
    line: list[tuple[float, float]],
    setting: Setting,
    cold_solve: Callable[..., Any],
    tick: Callable[[], Any] | None = None,
) -> list[dict[str, Any]]:
    """The rows of one line of the grid, each point warm-started from the previous certified
    one (the first point, and a point after an uncertified one, start cold); ``tv_prev`` is
    the total variation distance to that previous point (NaN without one). ``tick()`` is
    called after every point (a progress bar in-process)."""
    rows: list[dict[str, Any]] = []
    previous: np.ndarray | None = None
    for p, x in line:
        row = solve_point(p, x, setting, previous, cold_solve)
        sigma = row.pop("sigma")
        tv = math.nan if previous is None else total_variation(sigma, previous)
        rows.append(
            {"p_survive": p, "prize": x, **probability_columns(sigma), **row, "tv_prev": tv}
        )
        previous = sigma if row["certified"] else None
        if tick is not None:
            tick()
    return rows


def make_setting(
    p_values: list[float],
    players: int,
    keep_bank: bool,
    concept: str,
    concept_options: tuple[float | None, float | None, int | None, float | None],
    max_target: int | None,
    banks: tuple[float, float, float],
    tolerance: float,
) -> Setting:
    """Check the options of a sweep and fix the cap (module docstring); `concept_options`
    are (precision, tau, level, r), `banks` (gain, start, bust_keep)."""
    precision, tau, level, r = concept_options
    gain, start, bust_keep = (float(v) for v in banks)
    if concept not in SWEEP_CONCEPTS:
        raise StopwiseInputError(f"unknown concept {concept!r}; choose {', '.join(SWEEP_CONCEPTS)}")
    if int(players) != players or players < 2:
        raise StopwiseInputError(f"players must be an integer >= 2, got {players}")
    needs = {"qre": ("precision",), "levelk": ("precision", "level"), "ch": ("precision", "tau")}
    given = {"precision": precision, "tau": tau, "level": level}
    for name in needs.get(concept, ()):
        if given[name] is None:
            raise StopwiseInputError(f"concept {concept!r} needs {name} (--{name})")
    if r is not None and not r < 1:
        raise StopwiseInputError(f"r must be below 1 in contests (money can be 0), got {r}")
    if max_target is not None and (int(max_target) != max_target or max_target < 1):
        raise StopwiseInputError(f"max_target must be an integer >= 1, got {max_target}")
    if not (gain > 0 and start >= 0 and 0 <= bust_keep <= 1):
        raise StopwiseInputError(
            f"expected gain > 0, start >= 0 and bust_keep in [0, 1], got {gain}, {start}, "
            f"{bust_keep}"
        )
    if not tolerance > 0:
        raise StopwiseInputError(f"tolerance must be positive, got {tolerance}")
    cap = int(max_target) if max_target is not None else default_max_target(max(p_values))
    return Setting(
        int(players),
        bool(keep_bank),
        concept,
        precision,
        tau,
        level,
        r,
        cap,
        max_target is not None,
        gain,
        start,
        bust_keep,
        float(tolerance),
    )
