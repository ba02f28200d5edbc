"""Telling two models apart with a planned design: expected log-likelihood ratio per
participant and the participants AIC needs.

Both models are read as decision tables on the design: per condition (stopping) or item
(lottery) and step s, log P(yes) (draw / choose B) and log P(no), with continuation chance
p after a yes (the survival chance; 0 for a lottery item). Under the true model A (at theta_A)
the reach probabilities are R_0 = 1, R_{s+1} = R_s d^A_s p.

Pseudo-true parameters of the rival B: theta_B* = argmax_theta E_A[log L_B(theta)] with
E_A[log L_B] = sum_c n_c sum_s R_s [d^A_s log d^B_s + (1 - d^A_s) log(1 - d^B_s)]
(the expected data, no simulation), found by L-BFGS on B's unconstrained scale.

Per trial the log-ratio L = sum of l_s over the decisions taken (l = log P_A - log P_B*).
Its mean and second moment follow backwards from M1_H = M2_H = 0:
    M1_s = d (l^yes_s + p M1_{s+1}) + (1 - d) l^no_s
    M2_s = d ((l^yes_s)^2 + 2 l^yes_s p M1_{s+1} + p M2_{s+1}) + (1 - d) (l^no_s)^2,
so per participant mu = sum_c n_c M1_0, sigma^2 = sum_c n_c (M2_0 - M1_0^2).
With N participants the ratio is about Normal(N mu, N sigma^2) and AIC picks A when it
exceeds k_A - k_B: P(N) = Phi((N mu - (k_A - k_B)) / (sigma sqrt N)). This ignores the
estimation of the parameters (asymptotic; the simulation test checks it).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from scipy import optimize, stats

from stopwise.data_schemas.bundle import to_lottery_data
from stopwise.estimation import design_info as D
from stopwise.estimation.design_study import Plan
from stopwise.models.base import Model

TARGET_PROBABILITIES = (0.8, 0.95)
MAX_PARTICIPANTS = 10**7
GRADIENT_TOLERANCE = 1e-5
NONFINITE_WALL = 1e100
INDISTINGUISHABLE = 1e-9  # mean log-ratio per participant below this: the rival mimics


@dataclass(frozen=True)
class DecisionTables:
    """A model on a design as a JAX function z (unconstrained) -> (log_yes, log_no), each
    (n_cond, H), with continuation chances (n_cond,) and trials per condition (n_cond,)."""

    log_probs: Callable[[Any], tuple[Any, Any]]
    continuation: np.ndarray
    counts: np.ndarray


def _natural(model: Model, z: Any) -> dict[str, Any]:
    return {spec.name: spec.to_natural(z[i]) for i, spec in enumerate(model.params)}


def decision_tables(model: Model, plan: Plan, n_steps: int) -> DecisionTables:
    """The model's decision tables on the plan (module docstring)."""
    prepare = model.options.get("prepare")
    if model.data_kind == "lottery":
        frames = [plan.items.assign(subject=0, choice=c) for c in ("B", "A")]
        datasets = [to_lottery_data(f.assign(item=np.arange(1, len(f) + 1))) for f in frames]
        for data in datasets:
            if prepare is not None:
                prepare(data)

        def lottery_probs(z: Any) -> tuple[Any, Any]:
            theta = _natural(model, z)
            yes, no = (model.loglik_obs(theta, d)[:, None] for d in datasets)
            return yes, no

        n_items = len(plan.items)
        return DecisionTables(lottery_probs, np.zeros(n_items), np.ones(n_items))
    probe = D.condition_probe(plan.p_survive, plan.condition_gains(), plan.start, n_steps)
    if prepare is not None:
        prepare(probe)
    shape = (2, len(plan.p_survive), n_steps)

    def stopping_probs(z: Any) -> tuple[Any, Any]:
        values = model.loglik_obs(_natural(model, z), probe).reshape(shape)
        return values[0], values[1]

    counts = plan.condition_counts()
    return DecisionTables(stopping_probs, np.asarray(plan.p_survive, float), counts)


def unconstrained(model: Model, theta: Mapping[str, float]) -> np.ndarray:
    return np.array([float(s.to_unconstrained(theta[s.name])) for s in model.params])


def reach_log_probs(log_yes: np.ndarray, continuation: np.ndarray) -> np.ndarray:
    """log R_s: R_0 = 1, R_{s+1} = R_s P(yes at s) p."""
    with np.errstate(divide="ignore"):
        log_cont = np.log(continuation)[:, None]
    steps = np.cumsum(log_yes + log_cont, axis=1)
    return np.concatenate([np.zeros((len(continuation), 1)), steps[:, :-1]], axis=1)


def pseudo_true(
    rival: Model,
    rival_tables: DecisionTables,
    true_yes: np.ndarray,
    true_no: np.ndarray,
    reach: np.ndarray,
    starts: list[np.ndarray],
) -> tuple[dict[str, float], float, float]:
    """(theta_B*, E_A[log L_B(theta_B*)] per participant, gradient norm there)."""
    weight_yes = jnp.asarray(rival_tables.counts[:, None] * np.exp(reach + true_yes))
    weight_no = jnp.asarray(rival_tables.counts[:, None] * np.exp(reach + true_no))

    def negative_expected(z: Any) -> Any:
        log_yes, log_no = rival_tables.log_probs(z)
        terms = weight_yes * log_yes + weight_no * log_no
        return -jnp.sum(jnp.where((weight_yes + weight_no) > 0, terms, 0.0))

    objective = jax.jit(jax.value_and_grad(negative_expected))

    def scipy_objective(z: np.ndarray) -> tuple[float, np.ndarray]:
        """Non-finite values (a singular point of the rival, e.g. log utility at r = 1
        reached by a step) become a wall the line search backs away from."""
        value, grad = objective(jnp.asarray(z))
        grad = np.asarray(grad)
        if not (np.isfinite(value) and np.all(np.isfinite(grad))):
            return NONFINITE_WALL, np.zeros_like(grad)
        return float(value), grad

    best = None
    for start in starts:
        for method in ("BFGS", "L-BFGS-B"):  # BFGS copes with steep walls of far steps
            found = optimize.minimize(scipy_objective, start, jac=True, method=method)
            if np.isfinite(found.fun) and (best is None or found.fun < best.fun):
                best = found
    grad_norm = float(np.max(np.abs(scipy_objective(best.x)[1])))
    theta = {k: float(v) for k, v in _natural(rival, jnp.asarray(best.x)).items()}
    return theta, -float(best.fun), grad_norm


def ratio_moments(
    true_yes: np.ndarray,
    true_no: np.ndarray,
    rival_yes: np.ndarray,
    rival_no: np.ndarray,
    continuation: np.ndarray,
    counts: np.ndarray,
) -> tuple[float, float]:
    """(mu, sigma^2) of the per-participant log-likelihood ratio (module docstring)."""
    l_yes = true_yes - rival_yes
    l_no = true_no - rival_no
    d = np.exp(true_yes)
    q = np.exp(true_no)
    m1 = np.zeros(len(continuation))
    m2 = np.zeros(len(continuation))
    for s in range(true_yes.shape[1] - 1, -1, -1):
        ly = np.where(d[:, s] > 0, l_yes[:, s], 0.0)
        ln = np.where(q[:, s] > 0, l_no[:, s], 0.0)
        p = continuation
        m2 = d[:, s] * (ly**2 + 2 * ly * p * m1 + p * m2) + q[:, s] * ln**2
        m1 = d[:, s] * (ly + p * m1) + q[:, s] * ln
    return float(counts @ m1), float(counts @ (m2 - m1**2))


def aic_pick_probability(n: int, mu: float, var: float, extra_params: int) -> float:
    """P(N) = Phi((N mu - (k_A - k_B)) / (sigma sqrt N))."""
    return float(stats.norm.cdf((n * mu - extra_params) / math.sqrt(max(var, 1e-300) * n)))


def participants_needed(mu: float, var: float, extra_params: int, target: float) -> int | None:
    """Smallest N with P(N) >= target (doubling, then bisection); None if it exceeds
    MAX_PARTICIPANTS or mu <= 0 (the rival fits as well)."""
    if mu <= 0:
        return None
    high = 1
    while aic_pick_probability(high, mu, var, extra_params) < target:
        high *= 2
        if high > MAX_PARTICIPANTS:
            return None
    low = high // 2
    while high - low > 1:
        mid = (low + high) // 2
        if aic_pick_probability(mid, mu, var, extra_params) >= target:
            high = mid
        else:
            low = mid
    return high


def discrimination(
    truth: Model, theta: Mapping[str, float], rival: Model, plan: Plan
) -> dict[str, Any]:
    """One direction: ``truth`` at ``theta`` against ``rival`` at its pseudo-true values."""
    n_steps = 1 if plan.items is not None else D.cap_steps(plan.p_survive)
    true_tables = decision_tables(truth, plan, n_steps)
    rival_tables = decision_tables(rival, plan, n_steps)
    true_yes, true_no = (np.asarray(t) for t in true_tables.log_probs(unconstrained(truth, theta)))
    reach = reach_log_probs(true_yes, true_tables.continuation)
    shared = {**rival.start_theta(), **{k: v for k, v in theta.items() if k in rival.param_names}}
    starts = [unconstrained(rival, rival.start_theta()), unconstrained(rival, shared)]
    rival_theta, expected_loglik, grad_norm = pseudo_true(
        rival, rival_tables, true_yes, true_no, reach, starts
    )
    rival_yes, rival_no = (
        np.asarray(t) for t in rival_tables.log_probs(unconstrained(rival, rival_theta))
    )
    mu, var = ratio_moments(
        true_yes, true_no, rival_yes, rival_no, true_tables.continuation, true_tables.counts
    )
    extra = len(truth.param_names) - len(rival.param_names)
    indistinguishable = mu < INDISTINGUISHABLE
    converged = grad_norm < GRADIENT_TOLERANCE * max(1.0, plan.trials)
    needed = {
        f"aic_{round(100 * t)}": participants_needed(mu, var, extra, t) if converged else None
        for t in TARGET_PROBABILITIES
    }
    at_plan = aic_pick_probability(plan.subjects, mu, var, extra) if converged else math.nan
    return {
        "truth": truth.name,
        "truth_params": dict(theta),
        "rival": rival.name,
        "rival_pseudo_true": rival_theta,
        "pseudo_true_gradient_max": grad_norm,
        "pseudo_true_converged": converged,
        "rival_expected_loglik_per_subject": expected_loglik,
        "llr_mean_per_subject": mu,
        "llr_sd_per_subject": math.sqrt(max(var, 0.0)),
        "participants_needed": needed,
        "indistinguishable": indistinguishable,
        f"aic_pick_probability_at_{plan.subjects}": at_plan,
    }


def both_directions(
    model_a: Model, theta_a: Mapping[str, float], model_b: Model, plan: Plan
) -> list[dict[str, Any]]:
    """A true at theta_a against B at its pseudo-true values; then B true at those values
    against A at its own pseudo-true values."""
    first = discrimination(model_a, theta_a, model_b, plan)
    second = discrimination(model_b, first["rival_pseudo_true"], model_a, plan)
    return [first, second]


def discrimination_text(rows: list[dict[str, Any]], subjects: int) -> str:
    """Readable lines for the summary."""
    lines = ["Model discrimination (expected log-likelihood ratio per participant; AIC)"]
    for row in rows:
        needed = row["participants_needed"]
        lines.append(
            f"  truth {row['truth']} vs {row['rival']} (pseudo-true "
            + ", ".join(f"{k}={v:.4g}" for k, v in row["rival_pseudo_true"].items())
            + f"): mean {row['llr_mean_per_subject']:.4g}, sd {row['llr_sd_per_subject']:.4g}; "
            f"P(AIC picks truth | {subjects}) = "
            f"{row[f'aic_pick_probability_at_{subjects}']:.3f}; participants for 80%: "
            f"{needed['aic_80']}, 95%: {needed['aic_95']}; pseudo-true converged: "
            f"{row['pseudo_true_converged']}"
        )
        if not row["pseudo_true_converged"]:
            lines.append(
                "    REFUSED: the rival's pseudo-true values did not converge (largest "
                f"gradient {row['pseudo_true_gradient_max']:.2g}); no sample size is given"
            )
        elif row["indistinguishable"]:
            lines.append(
                "    the rival reproduces the truth at its pseudo-true values (it nests it): "
                "no number of participants separates them; AIC then prefers the smaller model"
            )
    return "\n".join(lines)
