"""Likelihood of sequential-contest decisions under agent logit play (pure JAX).

The game is that of stopwise.models.contest.sequential, written over outcome *slots* (as in
stopwise.models.contest.game: slot t <= cap is "reach t", slot cap+1+k is "bust after k"),
so no score merging is needed: a later mover's state is (b, c), b a slot holding the best
earlier bank and c the number of earlier movers at it; slots with equal banks give equal
states. With below[y, x] = [s_y < s_x], equal[y, x] = [s_y = s_x] and G_N(b, c) = 1/c,
from the last mover j = N-1 back to the first:

    win_j(x | b, c) = below[b, x] G_{j+1}(x, 1) + equal[b, x] G_{j+1}(b, c+1)
                      (first mover: win_0(x) = G_1(x, 1))
    pay_j(x)        = u(kb s_x) + win_j(x) (u(kb s_x + prize) - u(kb s_x))
    D_k = p V(k+1) + (1-p) pay(bust after k),  z_k = lambda (pay(reach k) - D_k),
    P(stop at k) = sigmoid(z_k) (k < cap; forced stop at cap),
    V(k) = P(stop) pay(reach k) + (1 - P(stop)) D_k,   V(cap) = pay(reach cap)
    G_j(b, c) = sum_x P_j(x | b, c) (below[x, b] G_{j+1}(b, c) + equal[x, b] G_{j+1}(b, c+1))

(agent logit QRE: every node expects its own later nodes and all later movers to play the
same noisy way; the concepts levelk and ch replace the first mover's beliefs about later
movers by level-k / cognitive-hierarchy ones: sequential_beliefs). A row of mover j who saw (b, c) at step s contributes log P(stop at s) or
log P(draw at s) = log sigmoid(-z_s): the decisions factorise, and a bust after k successes
contributes the k + 1 draw decisions only (exact censoring).

The games (survival chance, gain, start, bust_keep, players, prize, keep_bank) of the
sequential conditions are read from concrete data once (``SequentialPart.prepare``) and
solved once per likelihood evaluation each; conditions pick their game, their mover and
their state from those tables.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np

from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.game import Utility, make_game, slot_scores
from stopwise.models.contest.sequential_beliefs import Beliefs, beliefs_for, mixture_hazard

GAME_FIELDS = (
    "cond_p_survive",
    "cond_gain",
    "cond_start",
    "cond_bust_keep",
    "cond_n_players",
    "cond_prize",
    "cond_keep_bank",
)
SEQUENTIAL_CONCEPTS = ("qre", "aqre", "levelk", "ch")
MATCH_RELATIVE = 1e-9


def logit_stopping(pay: Any, p: float, precision: Any, cap: int) -> tuple[Any, Any]:
    """(log P(stop at k), log P(draw at k)) for k = 0..cap from the slot payoffs ``pay``
    by the backward logit recursion of the module docstring (draw at the cap: log 0)."""
    stop_value, bust_value = pay[: cap + 1], pay[cap + 1 :]

    def back(v_next: Any, k: Any) -> tuple[Any, Any]:
        draw = p * v_next + (1.0 - p) * bust_value[k]
        z = precision * (stop_value[k] - draw)
        stop = jax.nn.sigmoid(z)
        return stop * stop_value[k] + (1.0 - stop) * draw, z

    _, z = jax.lax.scan(back, stop_value[cap], jnp.arange(cap - 1, -1, -1))
    z = z[::-1]
    log_stop = jnp.concatenate([jax.nn.log_sigmoid(z), jnp.zeros(1)])
    log_draw = jnp.concatenate([jax.nn.log_sigmoid(-z), jnp.full(1, -jnp.inf)])
    return log_stop, log_draw


def slot_distribution_of_play(log_stop: Any, log_draw: Any, p: float, cap: int) -> Any:
    """P(end in slot x): reach k with alive_k P(stop at k), bust after k with
    alive_k P(draw at k) (1 - p), alive_k = prod_{s<k} P(draw at s) p."""
    steps = log_draw[:cap] + np.log(p)
    log_alive = jnp.concatenate([jnp.zeros(1), jnp.cumsum(steps)])
    reach = jnp.exp(log_alive + log_stop)
    bust = jnp.exp(log_alive[:cap] + log_draw[:cap] + np.log1p(-p))
    return jnp.concatenate([reach, bust])


def later_mover_tables(
    game: Any, following: Any, p: float, precision: Any, cap: int, n_states: int
) -> tuple[Any, Any, Any]:
    """Mover j's play in every state (b, c), c = 1..n_states, given G_{j+1} (``following``,
    indexed [slot, c]): (log P(stop), log P(draw)) of shape (L, n_states, cap+1) and G_j
    of shape (L, n_states + 2) (column 0 unused, columns above n_states are 0)."""
    pay_scale = game.du

    def one(b: Any, c: Any) -> tuple[Any, Any, Any]:
        win = game.below[b] * following[:, 1] + game.equal[b] * following[b, c + 1]
        log_stop, log_draw = logit_stopping(game.u0 + pay_scale * win, p, precision, cap)
        dist = slot_distribution_of_play(log_stop, log_draw, p, cap)
        g = (
            dist @ game.below[:, b] * following[b, c]
            + dist @ game.equal[:, b] * following[b, c + 1]
        )
        return log_stop, log_draw, g

    slots = jnp.arange(game.u0.shape[0])
    counts = jnp.arange(1, n_states + 1)
    log_stop, log_draw, g = jax.vmap(lambda b: jax.vmap(lambda c: one(b, c))(counts))(slots)
    table = jnp.zeros((slots.shape[0], n_states + 2)).at[:, 1 : n_states + 1].set(g)
    return log_stop, log_draw, table


def later_movers(
    game: Any, p: float, precision: Any, cap: int, players: int, n_max: int
) -> tuple[Any, Any, Any]:
    """Backward induction over the later movers (module docstring): their tables of shape
    (n_max - 1, L, n_max - 1, cap+1) indexed [j - 1, b, c - 1, k] (zeros for movers and
    counts beyond this game's players) and G_1, the second mover's continuation table."""
    n_slots = game.u0.shape[0]
    states = max(n_max - 1, 1)
    following = jnp.zeros((n_slots, states + 2))
    terminal = 1.0 / jnp.arange(1, players + 1, dtype=jnp.float64)
    following = following.at[:, 1 : players + 1].set(jnp.broadcast_to(terminal, (n_slots, players)))
    later_stop = jnp.zeros((states, n_slots, states, cap + 1))
    later_draw = jnp.zeros((states, n_slots, states, cap + 1))
    for j in range(players - 1, 0, -1):
        log_stop, log_draw, following = later_mover_tables(
            game, following, p, precision, cap, states
        )
        later_stop = later_stop.at[j - 1].set(log_stop)
        later_draw = later_draw.at[j - 1].set(log_draw)
    return later_stop, later_draw, following


def solve_game_tables(
    game: Any,
    p: float,
    precision: Any,
    cap: int,
    players: int,
    n_max: int,
    beliefs: Beliefs | None = None,
) -> tuple[Any, Any, Any, Any]:
    """The first mover's (log P(stop), log P(draw)) over k, shape (cap+1,), and the later
    movers' tables (``later_movers``): agent logit play, or with ``beliefs`` a population of
    level-k / cognitive-hierarchy types moving by the mixture's hazard
    (sequential_beliefs)."""
    later_stop, later_draw, logit_g = later_movers(game, p, precision, cap, players, n_max)
    if beliefs is None:
        first = logit_stopping(game.u0 + game.du * logit_g[:, 1], p, precision, cap)
        return first[0], first[1], later_stop, later_draw
    uniform_g = later_movers(game, p, 0.0, cap, players, n_max)[2]

    def first_type(thinks: Any, a: Any) -> tuple[Any, Any]:
        win = a * uniform_g[:, 1] + (1.0 - a) * logit_g[:, 1]
        return logit_stopping(game.u0 + game.du * win, p, thinks * precision, cap)

    type_stop, type_draw = jax.vmap(first_type)(beliefs.thinks, beliefs.level0_belief)
    first_stop, first_draw = mixture_hazard(jnp.log(beliefs.weights), type_stop, type_draw)
    random_stop = jnp.concatenate([jnp.full(cap, -jnp.log(2.0)), jnp.zeros(1)])
    random_draw = jnp.concatenate([jnp.full(cap, -jnp.log(2.0)), jnp.full(1, -jnp.inf)])
    log_w = jnp.log(jnp.stack([beliefs.later_level0, 1.0 - beliefs.later_level0]))

    def later_mix(log_stop: Any, log_draw: Any) -> tuple[Any, Any]:
        return mixture_hazard(
            log_w, jnp.stack([random_stop, log_stop]), jnp.stack([random_draw, log_draw])
        )

    mixed = jax.vmap(jax.vmap(jax.vmap(later_mix)))(later_stop, later_draw)
    return first_stop, first_draw, mixed[0], mixed[1]


def game_index(data: Any, games: tuple[tuple[float, ...], ...]) -> Any:
    """Per condition, the index of its game among ``games`` (0 where none matches)."""
    columns = jnp.stack([jnp.asarray(getattr(data, f), jnp.float64) for f in GAME_FIELDS], 1)
    table = jnp.asarray(np.asarray(games, dtype=np.float64))
    close = jnp.abs(columns[:, None, :] - table[None]) <= MATCH_RELATIVE * (1.0 + jnp.abs(table))
    return jnp.argmax(jnp.all(close, axis=2), axis=1)


def seen_slot(data: Any, cap: int) -> Any:
    """Per condition, a slot whose bank equals the best earlier bank (0 for first movers)."""
    scores = jax.vmap(lambda g, s, k: slot_scores(g, s, k, cap))(
        jnp.asarray(data.cond_gain, jnp.float64),
        jnp.asarray(data.cond_start, jnp.float64),
        jnp.asarray(data.cond_bust_keep, jnp.float64),
    )
    seen = jnp.asarray(data.cond_seen_best, jnp.float64)[:, None]
    close = jnp.abs(scores - seen) <= MATCH_RELATIVE * (1.0 + jnp.abs(seen))
    return jnp.argmax(close, axis=1)


def condition_tables(
    theta: Mapping[str, Any],
    data: Any,
    cap: int,
    games: tuple[tuple[float, ...], ...],
    utility: Utility,
    beliefs: Beliefs | None = None,
) -> tuple[Any, Any]:
    """Per condition (log P(stop at k), log P(draw at k)), shape (n_cond, cap+1): the
    condition's mover in the state it saw, in its game (zeros for simultaneous ones);
    ``beliefs``: level-k / cognitive-hierarchy types (sequential_beliefs)."""
    n_max = max(round(g[4]) for g in games)
    per_game = []
    for p, gain, start, keep, players, prize, keep_bank in games:
        game = make_game(p, players, prize, keep_bank, cap, gain, start, keep, utility, theta)
        per_game.append(
            solve_game_tables(
                game, float(p), theta["precision"], cap, round(players), n_max, beliefs
            )
        )
    first_stop, first_draw, later_stop, later_draw = (
        jnp.stack([t[i] for t in per_game]) for i in range(4)
    )
    gi = game_index(data, games)
    mover = jnp.clip(jnp.asarray(data.cond_order).astype(jnp.int32) - 2, 0, max(n_max - 2, 0))
    slot = seen_slot(data, cap)
    tied = jnp.clip(jnp.asarray(data.cond_seen_tied).astype(jnp.int32) - 1, 0, max(n_max - 2, 0))
    first = jnp.asarray(data.cond_order) < 1.5
    log_stop = jnp.where(first[:, None], first_stop[gi], later_stop[gi, mover, slot, tied])
    log_draw = jnp.where(first[:, None], first_draw[gi], later_draw[gi, mover, slot, tied])
    return log_stop, log_draw


def sequential_rows(data: Any) -> Any:
    """Per row: True where the row belongs to a sequential contest (cond_order >= 1)."""
    if getattr(data, "cond_order", None) is None:
        return jnp.zeros(jnp.shape(data.step), dtype=bool)
    return (jnp.asarray(data.cond_contest) > 0.5)[data.cond] & (
        jnp.asarray(data.cond_order)[data.cond] > 0.5
    )


_compiled_tables = jax.jit(condition_tables, static_argnums=(2, 3, 4))


def sequential_loglik(
    theta: Mapping[str, Any],
    data: Any,
    cap: int,
    games: tuple[tuple[float, ...], ...],
    utility: Utility,
    beliefs: Beliefs | None = None,
) -> Any:
    """log P(decision) of every row under agent logit play or ``beliefs`` (0 on other
    rows)."""
    log_stop, log_draw = condition_tables(theta, data, cap, games, utility, beliefs)
    step = jnp.clip(data.step, 0, cap)
    ll = jnp.where(data.draw > 0.5, log_draw[data.cond, step], log_stop[data.cond, step])
    return jnp.where(sequential_rows(data), ll, 0.0)


def sequential_stop_probabilities(
    theta: Mapping[str, Any],
    data: Any,
    cap: int,
    games: tuple[tuple[float, ...], ...],
    utility: Utility,
    beliefs: Beliefs | None = None,
) -> np.ndarray:
    """P(stop at k | reached k), k = 0..cap, per condition (NaN rows for simultaneous
    conditions)."""
    log_stop, _ = _compiled_tables(theta, data, cap, games, utility, beliefs)
    out = np.exp(np.asarray(log_stop))
    seq = np.asarray(data.cond_contest) > 0.5
    seq &= np.asarray(data.cond_order) > 0.5
    return np.where(seq[:, None], out, np.nan)


def read_games(
    data: Any, concept: str, tremble: bool, level0: str = "uniform"
) -> tuple[tuple[float, ...], ...]:
    """The distinct games of the sequential conditions of concrete data, after checking
    that the model can score them: a logit concept, no tremble, every later mover's state
    known (data_schemas.sequential_state)."""
    if getattr(data, "cond_order", None) is None:
        return ()
    order = np.asarray(data.cond_order)
    contest = np.asarray(data.cond_contest) > 0.5
    used = np.zeros(order.shape, dtype=bool)
    used[np.unique(np.asarray(data.cond))] = True
    seq = contest & (order > 0.5) & used
    if not seq.any():
        return ()
    if concept not in SEQUENTIAL_CONCEPTS or tremble or level0 != "uniform":
        raise StopwiseInputError(
            "the data hold sequential contests (an 'order' column); stopwise fits them with "
            "logit play at every decision node, concepts "
            f"{', '.join(SEQUENTIAL_CONCEPTS)} without tremble and with level-0 movers "
            f"stopping at random (e.g. crra+qre); got the concept {concept}"
            f"{' with tremble' if tremble else ''}"
            f"{' with level0=' + level0 if level0 != 'uniform' else ''}"
        )
    unknown = seq & (np.asarray(data.cond_seen_tied) < 0)
    if unknown.any():
        raise StopwiseInputError(
            f"{_trials_of(data, unknown)} of later movers in sequential contests lack what "
            "the mover saw: give the rows of every earlier mover of the contest (same group "
            "and trial) or, for second movers, rival_bank"
        )
    table = np.stack([np.asarray(getattr(data, f), float)[seq] for f in GAME_FIELDS], 1)
    return tuple(tuple(float(v) for v in row) for row in np.unique(table, axis=0))


def check_seen_on_grid(data: Any, cap: int) -> None:
    """Refuse later movers whose best earlier bank is no bank of the game's grid."""
    if getattr(data, "cond_order", None) is None:
        return
    seq = (np.asarray(data.cond_contest) > 0.5) & (np.asarray(data.cond_order) > 1.5)
    gain, start, keep = (np.asarray(getattr(data, f), float) for f in GAME_FIELDS[1:4])
    seen = np.asarray(data.cond_seen_best, float)
    off = np.zeros(seq.shape, dtype=bool)
    for i in np.flatnonzero(seq):
        scores = np.asarray(slot_scores(gain[i], start[i], keep[i], cap))
        off[i] = not np.any(np.abs(scores - seen[i]) <= MATCH_RELATIVE * (1.0 + abs(seen[i])))
    if off.any():
        raise StopwiseInputError(
            f"{_trials_of(data, off)} of later movers saw a best earlier bank that no mover "
            f"can end with (start + k * gain or bust_keep times that, k <= {cap})"
        )


def _trials_of(data: Any, conditions: np.ndarray) -> str:
    """'N trial(s) (e.g. subject S, trial T)' for rows in the given conditions."""
    rows = np.flatnonzero(conditions[np.asarray(data.cond)])
    trials = np.unique(np.asarray(data.trial)[rows])
    example = ""
    labels = getattr(data, "trial_labels", None)
    if labels is not None and len(trials):
        subject, trial = labels[int(trials[0])]
        example = f" (e.g. subject {subject}, trial {trial})"
    return f"{len(trials)} trial(s){example}"


class SequentialPart:
    """The sequential games a contest model has read from concrete data (``prepare``) and
    scores with agent logit play; data without an ``order`` column need none."""

    def __init__(
        self, concept: str, tremble: bool, utility: Utility, options: Mapping[str, Any]
    ) -> None:
        self.concept, self.tremble, self.utility = concept, tremble, utility
        self.options = dict(options)
        self.games: tuple[tuple[float, ...], ...] | None = None
        self.only_sequential = False  # every contest condition read so far is sequential

    def prepare(self, data: Any, cap: int) -> None:
        """Read (and check) the sequential games of concrete data; a model keeps the games
        (and whether it met simultaneous contests) it first read, so other data must bring
        no new game and, after only sequential contests, no simultaneous one."""
        games = read_games(data, self.concept, self.tremble, self.options.get("level0", "uniform"))
        check_seen_on_grid(data, cap)
        only = bool(games) and not _simultaneous_conditions(data).any()
        if self.games is None:
            self.games, self.only_sequential = games, only
        elif not set(games) <= set(self.games) or (self.only_sequential and not only):
            raise StopwiseInputError(
                "this contest model was prepared for other sequential contests (survival "
                "chance, gain, start, bust_keep, players, prize, keep_bank, or contests that "
                "were all sequential); build a new model for these data"
            )

    def games_for(self, data: Any) -> tuple[tuple[float, ...], ...]:
        """The games to solve for ``data`` (none without sequential columns)."""
        if getattr(data, "cond_order", None) is None:
            return ()
        if self.games is None:
            raise StopwiseInputError(
                "the data hold sequential contests but the contest model has not read them; "
                "call model.options['prepare'](data) on concrete data first"
            )
        return self.games

    def loglik(self, theta: Mapping[str, Any], data: Any, cap: int, simultaneous: Any) -> Any:
        """Row log-likelihoods: ``simultaneous`` on other rows, agent logit play on
        sequential rows."""
        games = self.games_for(data)
        if not games:
            return simultaneous
        beliefs = beliefs_for(self.concept, theta, self.options)
        seq = sequential_loglik(theta, data, cap, games, self.utility, beliefs)
        return jnp.where(sequential_rows(data), seq, simultaneous)

    def draw_probability(
        self, theta: Mapping[str, Any], data: Any, cap: int, simultaneous: Any
    ) -> Any:
        """P(draw) per row: ``simultaneous`` on other rows, agent logit on sequential rows."""
        games = self.games_for(data)
        if not games:
            return simultaneous
        beliefs = beliefs_for(self.concept, theta, self.options)
        _, log_draw = condition_tables(theta, data, cap, games, self.utility, beliefs)
        step = jnp.clip(data.step, 0, cap)
        return jnp.where(sequential_rows(data), jnp.exp(log_draw[data.cond, step]), simultaneous)


def sequential_conditions(data: Any) -> np.ndarray:
    """Per condition of concrete data: True for sequential contest conditions."""
    contest = np.asarray(data.cond_contest) > 0.5
    if getattr(data, "cond_order", None) is None:
        return np.zeros(contest.shape, dtype=bool)
    return contest & (np.asarray(data.cond_order) > 0.5)


def _simultaneous_conditions(data: Any) -> np.ndarray:
    """Per condition of concrete data: True for simultaneous contest conditions in use."""
    used = np.zeros(np.shape(data.cond_contest), dtype=bool)
    used[np.unique(np.asarray(data.cond))] = True
    contest = (np.asarray(data.cond_contest) > 0.5) & used
    return contest & ~sequential_conditions(data)
