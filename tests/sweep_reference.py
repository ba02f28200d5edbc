"""Independent references for the sweep tests: contest payoffs built directly from the
game's definition (DESIGN.md: the top final bank wins the prize, ties split at random, with
keep_bank everyone also keeps their bank), by brute force over outcome slots, and a
zero-sum LP by scipy. Nothing here imports the sweep or the contest solvers."""

from __future__ import annotations

import itertools

import numpy as np
from scipy.optimize import linprog


def slots(p: float, cap: int, gain: float = 1.0, start: float = 0.0, bust_keep: float = 0.0):
    """q[t, i] = P(slot i | aim for t) and the slot banks: reach t (p^t), bust after k < t
    (p^k (1 - p)); a slot list written out one outcome at a time."""
    banks, q_columns = [], []
    for t in range(cap + 1):
        banks.append(start + t * gain)
        q_columns.append([p**t if s == t else 0.0 for s in range(cap + 1)])
    for k in range(cap):
        banks.append(bust_keep * (start + k * gain))
        q_columns.append([p**k * (1 - p) if s > k else 0.0 for s in range(cap + 1)])
    return np.array(q_columns).T, np.array(banks)


def utility(x: np.ndarray, r: float | None) -> np.ndarray:
    return x if r is None else (x ** (1 - r) - 1) / (1 - r)


def brute_two_player(
    p: float,
    prize: float,
    keep_bank: bool,
    cap: int,
    gain: float = 1.0,
    start: float = 0.0,
    bust_keep: float = 0.0,
    r: float | None = None,
) -> tuple[np.ndarray, float]:
    """A[t, s] = sum_{i, j} q[t, i] q[s, j] payoff(i vs j) and the payoff range."""
    q, banks = slots(p, cap, gain, start, bust_keep)
    higher = banks[:, None] > banks[None, :] + 1e-12
    level = np.abs(banks[:, None] - banks[None, :]) <= 1e-12
    share = higher + 0.5 * level  # my share of the prize from slot i against slot j
    money = keep_bank * banks
    lose, win = utility(money, r), utility(money + prize, r)
    payoff = share * (win - lose)[:, None] + lose[:, None]
    return q @ payoff @ q.T, float(win.max() - lose.min())


def brute_three_player_payoffs(
    p: float, prize: float, keep_bank: bool, cap: int, sigma: np.ndarray
) -> tuple[np.ndarray, float]:
    """U_t(sigma) of one player when both rivals play sigma, by enumerating slot triples
    (the prize is split equally among the tied top banks), and the payoff range."""
    q, banks = slots(p, cap)
    f = sigma @ q  # a rival's slot distribution
    n = banks.size
    share = np.zeros(n)
    for j, k in itertools.product(range(n), repeat=2):
        top = max(banks[j], banks[k])
        mine = banks >= top - 1e-12
        tied = 1 + (np.abs(banks[j] - banks) <= 1e-12) + (np.abs(banks[k] - banks) <= 1e-12)
        share += f[j] * f[k] * np.where(mine, 1.0 / tied, 0.0)
    money = keep_bank * banks
    return q @ (share * prize + money), float(prize + money.max())


def zero_sum_value_strategy(a: np.ndarray) -> np.ndarray:
    """Row player's optimal strategy of the zero-sum game a (scipy HiGHS LP):
    max v s.t. a^T x >= v, sum x = 1, x >= 0."""
    m, n = a.shape
    result = linprog(
        np.r_[np.zeros(m), -1.0],
        A_ub=np.c_[-a.T, np.ones(n)],
        b_ub=np.zeros(n),
        A_eq=np.r_[np.ones(m), 0.0][None, :],
        b_eq=[1.0],
        bounds=[(0, None)] * m + [(None, None)],
        method="highs",
    )
    assert result.status == 0
    return np.clip(result.x[:m], 0.0, None) / np.clip(result.x[:m], 0.0, None).sum()


def symmetric_regret(a: np.ndarray, sigma: np.ndarray) -> float:
    u = a @ sigma
    return float(u.max() - sigma @ u)
