"""Contest play: logit QRE with its gradient, and the principal branch to a Nash limit, on a
two-player stopping contest with 41 targets, against pygambit's logit solvers on the same
normal form in the same process.

Goals (issue 5): QRE + gradient at one precision <= 20 ms after compile; the branch until
maximum regret <= 1e-6 (as a share of the payoff range) <= 2 s. Issue 11: whole-process
``stopwise equilibrium`` two-player Nash at the default cap within 2x a whole-process numpy +
scipy LP script on the same matrix.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

import stopwise  # noqa: F401  (float64 JAX)
from benchmarks._common import best_time
from stopwise.models.contest import game as G
from stopwise.models.contest import qre

P_SURVIVE, CAP = 0.9, 40  # 41 targets


def _gambit_game(a: np.ndarray, b: np.ndarray):  # type: ignore[no-untyped-def]
    import pygambit as gbt

    return gbt.Game.from_arrays(a, b)


def _gambit_row(profile, game) -> np.ndarray:  # type: ignore[no-untyped-def]
    player = next(iter(game.players))
    return np.array([float(profile[s]) for s in player.strategies])


def bench_qre_gradient() -> tuple[str, float]:
    """QRE of a keep-bank contest with CRRA utility at lambda = 5, plus d(mean target)/d
    (lambda, r) through the implicit-function rule; pygambit solves the same QRE (no
    gradient) by tracing its branch to lambda = 5."""
    import pygambit as gbt

    crra = G.resolve_utility("crra")
    lam, r = 5.0, 0.5

    def mean_target(lam: jnp.ndarray, r: jnp.ndarray) -> jnp.ndarray:
        game = G.make_game(P_SURVIVE, 2, 10.0, 1.0, CAP, utility=crra, theta={"r": r})
        a = G.payoff_matrix(game)
        s1, _ = qre.qre_bimatrix(lam, a, a.T)
        return jnp.arange(CAP + 1.0) @ s1

    value_and_grad = jax.jit(jax.value_and_grad(mean_target, argnums=(0, 1)))
    t0 = time.perf_counter()
    jax.block_until_ready(value_and_grad(lam, r))
    compile_s = time.perf_counter() - t0
    ours = best_time(lambda: jax.block_until_ready(value_and_grad(lam, r)), repeat=7)
    a = np.asarray(
        G.payoff_matrix(G.make_game(P_SURVIVE, 2, 10.0, 1.0, CAP, utility=crra, theta={"r": r}))
    )
    game = _gambit_game(a, a.T)
    results = []
    baseline = best_time(lambda: results.append(gbt.qre.logit_solve_lambda(game, [lam])), repeat=3)
    ref = _gambit_row(results[-1][0].profile, game)
    s1, _ = qre.qre_bimatrix(lam, jnp.asarray(a), jnp.asarray(a.T))
    diff = float(np.max(np.abs(np.asarray(s1) - ref)))
    rows = (
        f"| QRE + gradient (lambda, r) at lambda = 5, CRRA, keep bank | {ours * 1e3:.1f} ms "
        f"(compile {compile_s:.1f} s) | {baseline * 1e3:.1f} ms (QRE only) | "
        f"{baseline / ours:.1f}x | max abs difference of the QRE {diff:.1e} |"
    )
    return rows, ours


def bench_branch() -> tuple[str, float]:
    """Principal branch of the winner-take-all contest until max regret <= 1e-6."""
    import pygambit as gbt

    a = np.asarray(G.payoff_matrix(G.make_game(P_SURVIVE, 2, 1.0, 0.0, CAP)))
    qre.trace_bimatrix(a, a.T, tolerance=1e-6)  # compile
    branches = []
    ours = best_time(lambda: branches.append(qre.trace_bimatrix(a, a.T, tolerance=1e-6)), repeat=3)
    branch = branches[-1]
    game = _gambit_game(a, a.T)
    results = []
    baseline = best_time(
        lambda: results.append(gbt.nash.logit_solve(game, maxregret=1e-6)), repeat=3
    )
    ref = _gambit_row(results[-1].equilibria[0], game)
    ends = np.exp(branch.last.log_probs[: CAP + 1])
    diff = float(np.max(np.abs(ends - ref)))
    rows = (
        f"| principal branch to max regret <= 1e-6, winner takes all | {ours:.2f} s "
        f"({len(branch.points)} points, lambda {branch.last.precision:.3g}) | "
        f"{baseline:.2f} s | {baseline / ours:.1f}x | max abs difference of the end points "
        f"{diff:.1e} |"
    )
    return rows, ours


BASELINE_SCRIPT = """
import numpy as np
from scipy.optimize import linprog
p, prize, cap = {p}, {prize}, {cap}
t = np.arange(cap + 1.0)
reach = p ** t
zero = np.where(t == 0, 1.0, 1.0 - reach)
own, rival = t[:, None], t[None, :]
beats = np.where(own >= 1, reach[:, None] * np.where(rival < own, 1.0, zero[None, :]), 0.0)
level = zero[:, None] * zero[None, :] + np.where((own == rival) & (own >= 1), reach ** 2, 0.0)
a = prize * (beats + 0.5 * level)
m = a.shape[0]
res = linprog(np.r_[np.zeros(m), -1.0], A_ub=np.c_[-a.T, np.ones(m)], b_ub=np.zeros(m),
              A_eq=np.r_[np.ones(m), 0.0][None, :], b_eq=[1.0],
              bounds=[(0, None)] * m + [(None, None)], method="highs")
x = res.x[:m]
print(int(np.argmax(x)))
"""


def _whole_process(argv: list[str]) -> float:
    start = time.perf_counter()
    subprocess.run(argv, check=True, capture_output=True, cwd=Path(__file__).parent.parent)
    return time.perf_counter() - start


def bench_equilibrium_command() -> str:
    """Whole-process ``stopwise equilibrium`` two-player winner-take-all Nash at the default
    cap (p 0.9: 264 targets; certificate and dominance included) against a whole-process
    script that builds the same payoff matrix with numpy and solves the LP with scipy (no
    certificate, no dominance). One run each (issue 11 goal: ratio <= 2)."""
    p, prize, cap = 0.9, 10.0, 263
    stopwise_bin = str(Path(sys.executable).with_name("stopwise"))
    ours = _whole_process(
        [
            stopwise_bin,
            "equilibrium",
            "--p-survive",
            str(p),
            "--players",
            "2",
            "--prize",
            str(prize),
            "--json",
            "-",
        ]
    )
    script = BASELINE_SCRIPT.format(p=p, prize=prize, cap=cap)
    baseline = _whole_process([sys.executable, "-c", script])
    return (
        f"| `stopwise equilibrium` 2 players, Nash, p {p}, prize {prize:g}, default cap "
        f"({cap + 1} targets), whole process | {ours:.2f} s | {baseline:.2f} s (numpy matrix + "
        f"scipy LP, whole process) | {ours / baseline:.2f} (goal <= 2) |"
    )


def main() -> str:
    command_row = bench_equilibrium_command()
    qre_row, qre_s = bench_qre_gradient()
    branch_row, branch_s = bench_branch()
    verdict = (
        f"Goals: QRE + gradient <= 20 ms ({'met' if qre_s <= 0.02 else 'missed'}: "
        f"{qre_s * 1e3:.1f} ms); branch <= 2 s ({'met' if branch_s <= 2 else 'missed'}: "
        f"{branch_s:.2f} s)."
    )
    return "\n".join(
        [
            "## Contest play: logit QRE and its principal branch (2 players, 41 targets)",
            "",
            f"Two-player stopping contest, p_survive {P_SURVIVE}, targets 0..{CAP}. Baseline: "
            "pygambit's logit solvers (logit_solve_lambda, logit_solve with maxregret 1e-6, "
            "regret as a share of the payoff range as in ours) on the same payoff matrices, "
            "same process. Times are the best of several runs after compilation; ratio = "
            "baseline / ours (above 1: ours faster).",
            "",
            "| task | stopwise | pygambit | ratio | agreement |",
            "|---|---|---|---|---|",
            qre_row,
            branch_row,
            "",
            verdict,
            "",
            "### Whole-process two-player Nash (issue 11, Speed)",
            "",
            "| task | stopwise | baseline | ours / baseline |",
            "|---|---|---|---|",
            command_row,
        ]
    )


if __name__ == "__main__":
    print(main())
