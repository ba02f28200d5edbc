"""Nash equilibria of two-player games and symmetric N-player contests.

* ``constant_sum_split``: a two-player game (A, B) is *constant-sum up to separable terms*
  when A[t, s] + B[t, s] = alpha_t + beta_s (t the row player's choice, s the column
  player's). Subtracting from each player's payoff the term that depends only on the
  *rival's* choice changes no best response: A'[t, s] = A[t, s] - beta_s and
  B'[t, s] = B[t, s] - alpha_t, and A' + B' = 0, so (A', -A') is a zero-sum game with the
  same equilibria as (A, B). (Removing a player's *own*-choice term would change that
  player's best responses.) With linear utility, or without ``keep_bank``, the contest is of
  this kind: A[t, s] + A[s, t] = prize + kb*(E bank_t + E bank_s).
* ``zero_sum_lp``: max v s.t. A'^T x >= v, sum x = 1, x >= 0 (and the dual for y), by
  scipy's HiGHS, then polished on the supports (``polish_on_supports``).
* ``support_enumeration``: every equilibrium with supports of equal size (all equilibria of a
  nondegenerate game): on supports I, J solve A[I, J] y = v 1, x^T B[I, J] = w 1, sums 1.
* ``lemke_howson``: complementary pivoting on the polytopes P = {x >= 0: B^T x <= 1} and
  Q = {y >= 0: A y <= 1} (payoffs shifted positive) from the artificial equilibrium (0, 0),
  dropping one label (0..m-1 rows, m..m+n-1 columns).
* ``symmetric_nash``: symmetric equilibrium sigma of the N-player contest: the logit QRE
  principal branch locates the support S, then Newton solves the indifference system
  U_t(sigma) = v (t in S), sum sigma = 1; the result carries its certificate, the maximum
  regret max_t U_t(sigma) - sigma . U(sigma), goal <= 1e-9.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from scipy.optimize import linprog

from stopwise.models.contest.game import ContestGame, payoff_matrix, target_payoffs
from stopwise.models.contest.qre import trace_symmetric

REGRET_GOAL = 1e-9


@dataclass(frozen=True)
class BimatrixEquilibrium:
    row: np.ndarray
    col: np.ndarray
    max_regret: float
    method: str
    notes: list[str] = field(default_factory=list)


def bimatrix_regret(a: np.ndarray, b: np.ndarray, x: np.ndarray, y: np.ndarray) -> float:
    """max over players of (best pure payoff - payoff of the mixed strategy)."""
    u1, u2 = a @ y, b.T @ x
    return float(max(u1.max() - x @ u1, u2.max() - y @ u2))


def constant_sum_split(
    a: np.ndarray, b: np.ndarray, tol: float = 1e-10
) -> tuple[bool, np.ndarray, np.ndarray]:
    """Whether S = A + B = alpha_t + beta_s (module docstring), with
    alpha_t = mean_s S[t, s] - mean S / 2 and beta_s = mean_t S[t, s] - mean S / 2."""
    s = a + b
    alpha = s.mean(axis=1) - s.mean() / 2.0
    beta = s.mean(axis=0) - s.mean() / 2.0
    residual = s - alpha[:, None] - beta[None, :]
    scale = 1.0 + float(np.max(np.abs(s)))
    return bool(np.max(np.abs(residual)) <= tol * scale), alpha, beta


def zero_sum_lp(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Optimal strategies (x, y) and value of the zero-sum game with row payoff a."""
    m, n = a.shape
    # variables (x_1..x_m, v): minimise -v s.t. v - (A^T x)_s <= 0, sum x = 1
    row = linprog(
        np.r_[np.zeros(m), -1.0],
        A_ub=np.c_[-a.T, np.ones(n)],
        b_ub=np.zeros(n),
        A_eq=np.r_[np.ones(m), 0.0][None, :],
        b_eq=[1.0],
        bounds=[(0, None)] * m + [(None, None)],
        method="highs",
    )
    # column: minimise w s.t. (A y)_t - w <= 0, sum y = 1
    col = linprog(
        np.r_[np.zeros(n), 1.0],
        A_ub=np.c_[a, -np.ones(m)],
        b_ub=np.zeros(m),
        A_eq=np.r_[np.ones(n), 0.0][None, :],
        b_eq=[1.0],
        bounds=[(0, None)] * n + [(None, None)],
        method="highs",
    )
    if row.status != 0 or col.status != 0:
        raise RuntimeError(f"zero-sum LP failed: {row.message} / {col.message}")
    x = np.clip(row.x[:m], 0.0, None)
    y = np.clip(col.x[:n], 0.0, None)
    return x / x.sum(), y / y.sum(), float(-row.fun)


def _indifference(payoff: np.ndarray) -> np.ndarray | None:
    """Mixed strategy z over the columns of `payoff` (k x l) making every row equal:
    payoff z = v 1, sum z = 1 (least squares when not square)."""
    k, l_ = payoff.shape
    system = np.zeros((k + 1, l_ + 1))
    system[:k, :l_] = payoff
    system[:k, l_] = -1.0
    system[k, :l_] = 1.0
    rhs = np.zeros(k + 1)
    rhs[k] = 1.0
    if k == l_:
        try:
            solution = np.linalg.solve(system, rhs)
        except np.linalg.LinAlgError:
            return None
    else:
        solution, *_ = np.linalg.lstsq(system, rhs, rcond=None)
        if np.max(np.abs(system @ solution - rhs)) > 1e-9:
            return None
    return solution[:l_]


def _on_supports(
    a: np.ndarray, b: np.ndarray, rows: tuple[int, ...], cols: tuple[int, ...]
) -> tuple[np.ndarray, np.ndarray] | None:
    """The profile with the given supports whose players are indifferent on them, if any."""
    y_s = _indifference(a[np.ix_(rows, cols)])
    x_s = _indifference(b[np.ix_(rows, cols)].T)
    if y_s is None or x_s is None:
        return None
    x = np.zeros(a.shape[0])
    y = np.zeros(a.shape[1])
    x[list(rows)] = x_s
    y[list(cols)] = y_s
    return x, y


def polish_on_supports(
    a: np.ndarray, b: np.ndarray, x: np.ndarray, y: np.ndarray, threshold: float = 1e-7
) -> tuple[np.ndarray, np.ndarray]:
    """Re-solve the indifference equations on the supports of (x, y); keep the better."""
    rows = tuple(np.flatnonzero(x > threshold))
    cols = tuple(np.flatnonzero(y > threshold))
    candidate = _on_supports(a, b, rows, cols)
    if candidate is None or min(candidate[0].min(), candidate[1].min()) < -1e-12:
        return x, y
    cx, cy = np.clip(candidate[0], 0, None), np.clip(candidate[1], 0, None)
    cx, cy = cx / cx.sum(), cy / cy.sum()
    if bimatrix_regret(a, b, cx, cy) <= bimatrix_regret(a, b, x, y):
        return cx, cy
    return x, y


def support_enumeration(
    a: np.ndarray, b: np.ndarray, tol: float = 1e-10
) -> list[tuple[np.ndarray, np.ndarray]]:
    """All equilibria with equal-size supports (every equilibrium of a nondegenerate game)."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    m, n = a.shape
    found = []
    for k in range(1, min(m, n) + 1):
        for rows in itertools.combinations(range(m), k):
            for cols in itertools.combinations(range(n), k):
                profile = _on_supports(a, b, rows, cols)
                if profile is None:
                    continue
                x, y = profile
                if x.min() < -tol or y.min() < -tol:
                    continue
                if bimatrix_regret(a, b, x, y) <= tol * (1.0 + np.ptp(a) + np.ptp(b)):
                    found.append((x, y))
    return found


def _pivot(tableau: np.ndarray, basis: list[int], entering: int) -> int:
    """Min-ratio pivot of column `entering` (first row on ties); returns the leaving var."""
    column = tableau[:, entering]
    ratios = np.full(len(basis), np.inf)
    positive = column > 1e-15
    ratios[positive] = tableau[positive, -1] / column[positive]
    row = int(np.argmin(ratios))
    if not np.isfinite(ratios[row]):
        raise RuntimeError("Lemke-Howson: unbounded ray (degenerate game)")
    tableau[row] /= tableau[row, entering]
    for other in range(tableau.shape[0]):
        if other != row:
            tableau[other] -= tableau[other, entering] * tableau[row]
    leaving = basis[row]
    basis[row] = entering
    return leaving


def lemke_howson(
    a: np.ndarray, b: np.ndarray, dropped_label: int = 0
) -> tuple[np.ndarray, np.ndarray]:
    """One Nash equilibrium by Lemke-Howson dropping `dropped_label` (module docstring).

    Variables are numbered by their labels: in the P tableau (B^T x + s = 1) x_i has label i
    and s_j label m+j; in the Q tableau (A y + r = 1) r_i has label i and y_j label m+j.
    """
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    m, n = a.shape
    a = a - a.min() + 1.0
    b = b - b.min() + 1.0
    # P: rows j (n of them), columns = variables by label (m+n) + rhs
    p_tab = np.zeros((n, m + n + 1))
    p_tab[:, :m] = b.T
    p_tab[:, m : m + n] = np.eye(n)
    p_tab[:, -1] = 1.0
    p_basis = list(range(m, m + n))
    q_tab = np.zeros((m, m + n + 1))
    q_tab[:, :m] = np.eye(m)
    q_tab[:, m : m + n] = a
    q_tab[:, -1] = 1.0
    q_basis = list(range(m))
    in_p = dropped_label < m  # x_k (label k < m) enters P; y_j (label >= m) enters Q
    entering = dropped_label
    for _ in range(10 * (m + n) ** 2 + 100):
        if in_p:
            leaving = _pivot(p_tab, p_basis, entering)
        else:
            leaving = _pivot(q_tab, q_basis, entering)
        if leaving == dropped_label:
            break
        entering = leaving
        in_p = not in_p
    else:
        raise RuntimeError("Lemke-Howson did not terminate")
    x = np.zeros(m)
    y = np.zeros(n)
    for row, var in enumerate(p_basis):
        if var < m:
            x[var] = p_tab[row, -1]
    for row, var in enumerate(q_basis):
        if var >= m:
            y[var - m] = q_tab[row, -1]
    return x / x.sum(), y / y.sum()


def bimatrix_nash(a: np.ndarray, b: np.ndarray) -> BimatrixEquilibrium:
    """One Nash equilibrium: by LP if constant-sum up to separable terms (the zero-sum game
    A'[t, s] = A[t, s] - beta_s, module docstring), else by Lemke-Howson (each label until the
    regret goal is met); polished on the supports. The regret is measured on (A, B)."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    constant, _, beta = constant_sum_split(a, b)
    if constant:
        x, y, _ = zero_sum_lp(a - beta[None, :])
        x, y = polish_on_supports(a, b, x, y)
        note = (
            "the game is constant-sum after removing from each player's payoff the term that "
            "depends on the rival's target alone; solved as that zero-sum game by LP"
        )
        return BimatrixEquilibrium(x, y, bimatrix_regret(a, b, x, y), "zero-sum LP", [note])
    best: tuple[float, np.ndarray, np.ndarray] | None = None
    for label in range(sum(a.shape)):
        try:
            x, y = lemke_howson(a, b, label)
        except RuntimeError:
            continue
        x, y = polish_on_supports(a, b, x, y)
        regret = bimatrix_regret(a, b, x, y)
        if best is None or regret < best[0]:
            best = (regret, x, y)
        if regret <= REGRET_GOAL:
            break
    if best is None:
        raise RuntimeError("Lemke-Howson failed from every label")
    return BimatrixEquilibrium(best[1], best[2], best[0], "Lemke-Howson")


# ----------------------------------------------------------------------------- symmetric N


@dataclass(frozen=True)
class SymmetricEquilibrium:
    sigma: np.ndarray
    max_regret: float
    converged: bool
    method: str


def _support_equations(z: Any, game: ContestGame, mask: Any) -> Any:
    """Indifference system on the support mask: for t in S, U_t(sigma) - v; for t outside
    S, sigma_t; and sum sigma - 1 (z = (sigma, v))."""
    sigma, v = z[:-1], z[-1]
    u = target_payoffs(game, sigma)
    return jnp.concatenate([jnp.where(mask, u - v, sigma), jnp.array([jnp.sum(sigma) - 1.0])])


@jax.jit
def _newton_on_support(z: Any, game: ContestGame, mask: Any) -> tuple[Any, Any]:
    """50 Newton steps on the indifference system (least-squares steps, so a continuum of
    equilibria does not stall it); returns z and the final residual max-norm."""

    def step(_: int, z: Any) -> Any:
        jac = jax.jacfwd(_support_equations)(z, game, mask)
        delta = jnp.linalg.lstsq(jac, _support_equations(z, game, mask))[0]
        return jnp.where(jnp.all(jnp.isfinite(delta)), z - delta, z)

    z = jax.lax.fori_loop(0, 50, step, z)
    return z, jnp.max(jnp.abs(_support_equations(z, game, mask)))


def _solve_on_support(
    game: ContestGame, support: np.ndarray, start: np.ndarray
) -> np.ndarray | None:
    """sigma with support S solving the indifference system, or None."""
    mask = np.zeros(game.n_targets, dtype=bool)
    mask[support] = True
    s0 = np.where(mask, start, 0.0)
    s0 = s0 / s0.sum()
    v0 = float(s0 @ np.asarray(target_payoffs(game, jnp.asarray(s0))))
    z, residual = _newton_on_support(jnp.asarray(np.r_[s0, v0]), game, jnp.asarray(mask))
    z = np.asarray(z)
    if not np.all(np.isfinite(z)) or float(residual) > 1e-11:
        return None
    return z[:-1]


def symmetric_regret(game: ContestGame, sigma: np.ndarray) -> float:
    u = np.asarray(target_payoffs(game, jnp.asarray(sigma)))
    return float(u.max() - sigma @ u)


def symmetric_nash(game: ContestGame, goal: float = REGRET_GOAL) -> SymmetricEquilibrium:
    """Symmetric Nash equilibrium with its certificate (module docstring)."""
    best: tuple[float, np.ndarray] | None = None
    for tolerance in (1e-5, 1e-8):
        branch = trace_symmetric(game, tolerance=tolerance)
        qre_sigma = np.exp(branch.last.log_probs)
        best = _best_on_supports(game, qre_sigma, goal, best)
        if best[0] <= goal:
            break
    assert best is not None
    regret, sigma = best
    return SymmetricEquilibrium(
        sigma,
        regret,
        regret <= goal,
        "logit QRE branch to locate the support, Newton on the indifference system",
    )


def _best_on_supports(
    game: ContestGame, qre_sigma: np.ndarray, goal: float, best: tuple[float, np.ndarray] | None
) -> tuple[float, np.ndarray]:
    """Try supports suggested by a QRE profile; keep the profile of least regret."""
    regret0 = symmetric_regret(game, qre_sigma)
    if best is None or regret0 < best[0]:
        best = (regret0, qre_sigma)
    u = np.asarray(target_payoffs(game, jnp.asarray(qre_sigma)))
    candidates = []
    for threshold in (1e-3, 1e-4, 1e-5, 1e-6, 1e-8, 1e-10):
        candidates.append(np.flatnonzero(qre_sigma > threshold))
    for slack in (1e-6, 1e-8, 1e-10):
        candidates.append(np.flatnonzero(u >= u.max() - slack * (1 + np.ptp(u))))
    seen: set[tuple[int, ...]] = set()
    for support in candidates:
        key = tuple(int(i) for i in support)
        if not key or key in seen:
            continue
        seen.add(key)
        sigma = _solve_on_support(game, support, qre_sigma)
        if sigma is None or sigma.min() < -1e-12:
            continue
        sigma = np.clip(sigma, 0.0, None)
        sigma /= sigma.sum()
        regret = symmetric_regret(game, sigma)
        if regret < best[0]:
            best = (regret, sigma)
        if regret <= goal:
            break
    return best


def contest_nash(game: ContestGame) -> tuple[np.ndarray, float, str, list[str]]:
    """Symmetric Nash of a contest: (sigma, max regret, method, notes). Two players whose
    game is constant-sum up to own-target terms: the zero-sum LP; otherwise
    ``symmetric_nash``."""
    if round(float(game.n_players)) == 2:
        a = np.asarray(payoff_matrix(game))
        if constant_sum_split(a, a.T)[0]:
            eq = bimatrix_nash(a, a.T)
            return eq.row, eq.max_regret, eq.method, eq.notes
    sym = symmetric_nash(game)
    return (
        sym.sigma,
        sym.max_regret,
        sym.method,
        []
        if sym.converged
        else [f"regret goal {REGRET_GOAL:g} not met (max regret {sym.max_regret:.3g})"],
    )
