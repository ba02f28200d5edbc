"""Sequential contests for researchers: the certified normative solution and its comparison
with simultaneous play (``stopwise equilibrium --sequential``), and agent logit play.

    sequential_equilibrium(p_survive, players, prize, ...) -> dict
    sequential_logit(p_survive, players, prize, precision, ...) -> dict

Risk-neutral (or CRRA, ``r``) players move in order 1..N; each later mover sees the best bank already banked
(and how many share it) before running their own stopping task. The solver is backward
induction (stopwise.models.contest.sequential); the certificate is the largest regret of any
mover in any state: max over targets of the target's exact expected payoff minus the
solver's value, as a share of the payoff range (0 at the solution up to rounding).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from stopwise.contest_solve import (
    EFFICIENCY_LOSS_DEFINITION,
    _check_setup,
    equilibrium,
)
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.models.contest.certify import (
    DEFAULT_TOLERANCE,
    EXACT,
    Certificate,
    UncertifiedAnswer,
    nash_certificate,
)
from stopwise.models.contest.sequential import (
    NONE,
    SequentialSolution,
    crra,
    make_sequential_game,
    mover_summaries,
    outcome_matrix,
    payoff_range,
    solve_sequential,
    state_distributions,
    target_values,
)
from stopwise.models.contest.sequential_qre import logit_mover_summaries, solve_sequential_logit

MAX_SEQUENTIAL_PLAYERS = 6


def max_regret(solution: SequentialSolution) -> tuple[float, float]:
    """(largest regret over movers and states, largest |Q[t*] . pay - V|): the first is
    max_t U_t(state) - V(state), the second checks the DP value against its own target."""
    game = solution.game
    q = outcome_matrix(game)
    regret = mismatch = 0.0
    for j in range(game.players):
        for b_plus, c in zip(*np.nonzero(solution.targets[j] >= 0)):
            b = int(b_plus) - 1
            values = target_values(game, solution, j, b, int(c), q)
            value = float(solution.values[j][b_plus, c])
            regret = max(regret, float(values.max()) - value)
            mismatch = max(mismatch, abs(float(values[solution.targets[j][b_plus, c]]) - value))
    return max(regret, 0.0), mismatch


def response_table(solution: SequentialSolution) -> list[dict[str, Any]]:
    """Later movers' rule in every reachable state: mover (1-based), what they saw (best bank
    banked before them, how many share it), the chance of seeing it, and the target."""
    game = solution.game
    states = state_distributions(solution)
    rows = []
    for j in range(1, game.players):
        for (b, c), prob in sorted(states[j].items()):
            if prob <= 0 or b == NONE:
                continue
            rows.append(
                {
                    "mover": j + 1,
                    "rival_bank": float(game.score_values[b]),
                    "tied_at_best": int(c),
                    "prob_seen": float(prob),
                    "target": int(solution.targets[j][b + 1, c]),
                }
            )
    return rows


def _simultaneous(
    p_survive: float, players: int, prize: float, keep_bank: bool, gain: float, cap: int, **kw: Any
) -> dict[str, Any]:
    """The certified symmetric Nash equilibrium of the simultaneous contest (contest_solve)."""
    result = equilibrium(
        p_survive, players, prize, keep_bank=keep_bank, gain=gain, max_target=cap, **kw
    )
    return {
        key: result[key]
        for key in ("expected_bank", "win_prob", "efficiency_loss", "bust_rate", "certified")
    } | {"max_regret_share": result["max_regret_share"]}


def sequential_equilibrium(
    p_survive: float,
    players: int,
    prize: float,
    keep_bank: bool = False,
    gain: float = 1.0,
    max_target: int | None = None,
    start: float = 0.0,
    bust_keep: float = 0.0,
    tolerance: float = DEFAULT_TOLERANCE,
    allow_approximate: bool = False,
    compare: bool = True,
    r: float | None = None,
) -> dict[str, Any]:
    """The subgame-perfect solution of the sequential contest, certified, and (compare) the
    simultaneous Nash equilibrium of the same setting.

    Keys: first_mover (targets, probs: the first mover's target distribution, degenerate at
    the optimum; values: expected payoff of each target), responses (response_table), movers
    (per mover expected_bank, win_prob, bust_rate), efficiency_loss
    (EFFICIENCY_LOSS_DEFINITION with the N movers' total bank), max_regret_share,
    certificate, certified, simultaneous (expected_bank, win_prob, efficiency_loss, ...).
    ``r``: CRRA curvature of every mover over the contest's money (None: risk neutral).
    """
    cap = _check_setup(p_survive, players, prize, gain, max_target, bust_keep, start)
    if players > MAX_SEQUENTIAL_PLAYERS:
        raise StopwiseInputError(
            f"players must be at most {MAX_SEQUENTIAL_PLAYERS} for sequential contests, "
            f"got {players}"
        )
    game = make_sequential_game(
        p_survive, players, prize, keep_bank, cap, gain, start, bust_keep, utility=crra(r)
    )
    solution = solve_sequential(game)
    movers = mover_summaries(solution)
    regret, mismatch = max_regret(solution)
    certificate = _certificate(regret, mismatch, payoff_range(game), tolerance)
    solo = float(np.max(outcome_matrix(game) @ game.score_values))
    total = sum(m["expected_bank"] for m in movers)
    first_target = int(solution.targets[0][0, 0])
    notes = [
        ("risk-neutral players" if r is None else f"CRRA players, r = {r:g}")
        + "; a mover indifferent between stopping and drawing stops",
        f"win probabilities sum to {sum(m['win_prob'] for m in movers):.12f}",
    ]
    if not certificate.certified:
        message = f"the sequential solver failed its certificate: {certificate.statement}"
        if not allow_approximate:
            raise UncertifiedAnswer(message)
        notes.insert(0, f"APPROXIMATE, NOT CERTIFIED: {message}")
    result: dict[str, Any] = {
        "concept": "sequential",
        "players": int(players),
        "prize": float(prize),
        "keep_bank": bool(keep_bank),
        "p_survive": float(p_survive),
        "gain": float(gain),
        "r": r,
        "cap": cap,
        "first_mover": {
            "targets": list(range(cap + 1)),
            "probs": [1.0 if t == first_target else 0.0 for t in range(cap + 1)],
            "target": first_target,
            "values": target_values(game, solution, 0, NONE, 0).tolist(),
        },
        "responses": response_table(solution),
        "movers": movers,
        "efficiency_loss": 1.0 - total / (players * solo),
        "efficiency_loss_definition": EFFICIENCY_LOSS_DEFINITION,
        "max_regret_share": certificate.value,
        "certificate": certificate.as_dict(),
        "certified": certificate.certified,
        "method": "backward induction over exact outcome distributions (stopping recursion "
        "per mover and state); certified by every target's exact value in every state",
        "notes": notes,
    }
    if compare:
        result["simultaneous"] = _simultaneous(
            p_survive, players, prize, keep_bank, gain, cap, start=start, bust_keep=bust_keep, r=r
        )
    return result


def _certificate(
    regret: float, mismatch: float, payoff_range: float, tolerance: float
) -> Certificate:
    """Nash-style certificate on the largest regret; the DP/target mismatch must also be
    within tolerance of the payoff range."""
    base = nash_certificate(regret, payoff_range, 0.0, tolerance)
    share = mismatch / payoff_range
    ok = base.certified and share <= tolerance
    statement = (
        f"largest regret of any mover in any state {regret:.3g} = {base.value:.3g} of the "
        f"payoff range; solver value vs its target's exact value differ by {share:.3g} "
        f"({'<=' if ok else '>'} tolerance {tolerance:g})"
    )
    return Certificate(base.kind, base.value, tolerance, ok, statement)


def format_sequential(result: dict[str, Any]) -> str:
    """A readable table of a ``sequential_equilibrium`` result: the first mover's target,
    the later movers' response rule (what they saw -> how far they go), per-mover banks and
    the simultaneous comparison."""
    scheme = " + own bank" if result["keep_bank"] else " (winner takes the prize only)"
    lines = [
        f"sequential play, {result['players']} players, prize {result['prize']:g}{scheme}, "
        f"p_survive {result['p_survive']:g}, targets 0..{result['cap']}",
        f"method: {result['method']}",
        f"check: {result['certificate']['statement']} -> "
        + ("CERTIFIED" if result["certified"] else "NOT CERTIFIED (approximate answer)"),
        "",
        f"first mover: target {result['first_mover']['target']} with probability 1",
        "",
        "later movers' response rule (rows seen with probability >= 1e-6):",
        f"{'mover':>5}  {'rival_bank':>10}  {'tied':>4}  {'P(seen)':>8}  {'target':>6}",
    ]
    for row in result["responses"]:
        if row["prob_seen"] >= 1e-6:
            lines.append(
                f"{row['mover']:>5}  {row['rival_bank']:>10g}  {row['tied_at_best']:>4}  "
                f"{row['prob_seen']:>8.4f}  {row['target']:>6}"
            )
    lines += ["", f"{'':<22}{'expected bank':>14}  {'win prob':>8}  {'bust rate':>9}"]
    for j, mover in enumerate(result["movers"], start=1):
        lines.append(
            f"{'mover ' + str(j):<22}{mover['expected_bank']:>14.4f}  "
            f"{mover['win_prob']:>8.4f}  {mover['bust_rate']:>9.4f}"
        )
    simultaneous = result.get("simultaneous")
    if simultaneous:
        lines.append(
            f"{'simultaneous (Nash)':<22}{simultaneous['expected_bank']:>14.4f}  "
            f"{simultaneous['win_prob']:>8.4f}  {simultaneous['bust_rate']:>9.4f}"
        )
    lines += ["", f"efficiency loss  sequential {result['efficiency_loss']:.4f}"]
    if simultaneous:
        lines[-1] += f", simultaneous {simultaneous['efficiency_loss']:.4f}"
    lines += [f"note: {n}" for n in result["notes"]]
    return "\n".join(lines)


def sequential_logit(
    p_survive: float,
    players: int,
    prize: float,
    precision: float,
    keep_bank: bool = False,
    gain: float = 1.0,
    max_target: int | None = None,
    tolerance: float = DEFAULT_TOLERANCE,
    r: float | None = None,
) -> dict[str, Any]:
    """Agent logit QRE of the sequential contest (models.contest.sequential_qre): per-mover
    expected bank, win probability, bust rate, and each later mover's expected bank and bust
    rate by what they saw. Exact by construction (a finite backward recursion); the check is
    that every state's outcome distribution sums to 1 within tolerance."""
    cap = _check_setup(p_survive, players, prize, gain, max_target, 0.0, 0.0)
    if players > MAX_SEQUENTIAL_PLAYERS:
        raise StopwiseInputError(
            f"players must be at most {MAX_SEQUENTIAL_PLAYERS} for sequential contests, "
            f"got {players}"
        )
    if not (np.isfinite(precision) and precision >= 0):
        raise StopwiseInputError(f"precision must be finite and >= 0, got {precision}")
    game = make_sequential_game(p_survive, players, prize, keep_bank, cap, gain, utility=crra(r))
    solution = solve_sequential_logit(game, precision)
    gap = 0.0
    for j in range(players):
        sums = solution.outcomes[j].sum(axis=2)
        used = sums > 0
        gap = max(gap, float(np.abs(sums[used] - 1.0).max()))
    certificate = Certificate(
        EXACT,
        gap,
        tolerance,
        bool(np.isfinite(gap) and gap <= tolerance),
        "exact by construction (a finite backward recursion, no equation solved); every "
        f"state's outcome probabilities sum to 1 within {gap:.3g}",
    )
    if not certificate.certified:
        raise UncertifiedAnswer(f"sequential logit play failed its check: {certificate.statement}")
    movers = logit_mover_summaries(solution)
    solo = float(np.max(outcome_matrix(game) @ game.score_values))
    total = sum(m["expected_bank"] for m in movers)
    responses = [
        {
            "mover": 2,
            "rival_bank": float(value),
            "expected_bank": float(solution.outcomes[1][b + 1, 1] @ game.score_values),
            "bust_rate": float(solution.bust[1][b + 1, 1]),
        }
        for b, value in enumerate(game.score_values)
    ]
    return {
        "concept": "sequential-aqre",
        "precision": float(precision),
        "r": r,
        "players": int(players),
        "prize": float(prize),
        "keep_bank": bool(keep_bank),
        "p_survive": float(p_survive),
        "cap": cap,
        "first_mover_stop_probs": solution.stop_probs[0][0, 0].tolist(),
        "second_mover_responses": responses,
        "movers": movers,
        "efficiency_loss": 1.0 - total / (players * solo),
        "efficiency_loss_definition": EFFICIENCY_LOSS_DEFINITION,
        "certificate": certificate.as_dict(),
        "certified": certificate.certified,
        "method": "agent logit QRE by backward recursion over movers and bank levels",
    }


def format_sequential_logit(result: dict[str, Any]) -> str:
    """Readable text of a ``sequential_logit`` result: per-mover banks and the second
    mover's expected bank and bust rate by the rival bank they saw (the 12 lowest)."""
    scheme = " + own bank" if result["keep_bank"] else " (winner takes the prize only)"
    lines = [
        f"sequential agent logit play, precision {result['precision']:g}, "
        f"{result['players']} players, prize {result['prize']:g}{scheme}, "
        f"p_survive {result['p_survive']:g}, targets 0..{result['cap']}",
        f"check: {result['certificate']['statement']} -> "
        + ("CERTIFIED" if result["certified"] else "NOT CERTIFIED"),
        "",
        f"{'':<10}{'expected bank':>14}  {'win prob':>8}  {'bust rate':>9}",
    ]
    for j, mover in enumerate(result["movers"], start=1):
        lines.append(
            f"{'mover ' + str(j):<10}{mover['expected_bank']:>14.4f}  "
            f"{mover['win_prob']:>8.4f}  {mover['bust_rate']:>9.4f}"
        )
    lines += ["", "second mover by the rival bank seen (the 12 lowest; --json has all):"]
    lines.append(f"{'rival_bank':>10}  {'expected bank':>13}  {'bust rate':>9}")
    for row in result["second_mover_responses"][:12]:
        lines.append(
            f"{row['rival_bank']:>10g}  {row['expected_bank']:>13.4f}  {row['bust_rate']:>9.4f}"
        )
    lines.append(f"\nefficiency loss  {result['efficiency_loss']:.4f}")
    return "\n".join(lines)
