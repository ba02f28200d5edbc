"""Readable text of contest results (``stopwise equilibrium``)."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

DEFAULT_MIN_PROB = 1e-4


def format_equilibrium(result: Mapping[str, Any], min_prob: float = DEFAULT_MIN_PROB) -> str:
    """A readable table of an ``equilibrium`` result; targets with probability below
    `min_prob` are hidden and counted."""
    certified = result["certified"]
    lines = [
        f"{result['concept']} play, {result['players']} players, prize {result['prize']:g}"
        f"{' + own bank' if result['keep_bank'] else ' (winner takes the prize only)'}, "
        f"p_survive {result['p_survive']:g}, utility {result['utility']}, "
        f"targets 0..{result['cap']}",
        f"method: {result['method']}",
        f"check: {result['certificate']['statement']} -> "
        + ("CERTIFIED" if certified else "NOT CERTIFIED (approximate answer)"),
        "",
        f"{'target':>6}  {'prob':>8}",
    ]
    hidden, hidden_mass = 0, 0.0
    for t, q in zip(result["targets"], result["probs"]):
        if q >= min_prob:
            lines.append(f"{t:>6}  {q:>8.4f}")
        else:
            hidden, hidden_mass = hidden + 1, hidden_mass + q
    if hidden:
        lines.append(
            f"({hidden} targets with probability below {min_prob:g} not shown; "
            f"together {hidden_mass:.2g})"
        )
    lines += [
        "",
        f"expected bank    {result['expected_bank']:.4f}",
        f"bust rate        {result['bust_rate']:.4f}",
        f"win probability  {result['win_prob']:.4f}",
        f"efficiency loss  {result['efficiency_loss']:.4f}  (1 - expected bank / best solo "
        "risk-neutral expected bank)",
        f"max regret       {result['max_regret']:.3g}  ({result['max_regret_share']:.3g} of the "
        "payoff range)",
    ]
    if result["dominated"]:
        lines.append(f"strictly dominated targets (iterated): {ranges(result['dominated'])}")
    lines += [f"note: {n}" for n in result["notes"]]
    return "\n".join(lines)


def ranges(values: Sequence[int]) -> str:
    """Sorted integers as runs: [0, 1, 2, 5] -> "0-2, 5"."""
    values = sorted(values)
    out, start = [], values[0]
    for prev, cur in zip(values, [*values[1:], None]):
        if cur != prev + 1:
            out.append(f"{start}" if start == prev else f"{start}-{prev}")
            start = cur
    return ", ".join(out)
