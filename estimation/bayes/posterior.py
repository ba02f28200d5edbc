"""The result of a Bayesian fit: an ArviZ InferenceData plus a ``Posterior`` record.

Reported quantities (posterior group of the InferenceData, and rows of ``Posterior.params``):

  <k>            pooled: the parameter on its natural scale, to_natural(intercept of z_k)
  <k>:<column>   a covariate effect on the unconstrained scale (as the ML engine names it)
  hierarchical:  "<k>: population median", "<k>: population mean", "<k>: between-subject
                 sd", "<k>: between-subject sd (unconstrained scale)" and "<j>, <k>:
                 between-subject correlation (unconstrained scale)"; see
                 estimation/bayes_labels.py. The population mean and sd of the natural-scale
                 parameter are E[to_natural(mu_k + sd_k e)], e ~ Normal(0, 1), and its sd, by
                 40-point Gauss-Hermite quadrature
  <k>_subject    hierarchical: each subject's natural-scale parameter (at the covariates of
                 the subject's first row)

estimate = posterior mean, se = posterior sd, [ci_low, ci_high] = the highest-density interval
of probability ``hdi_prob`` (default 0.95). ``loglik`` is the log-likelihood at the posterior
mean of each cell's natural-scale parameters. AIC/BIC are not defined for posteriors (null);
the "diagnostics" block carries PSIS-LOO (Vehtari, Gelman & Gabry 2017) instead.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from itertools import combinations
from typing import Any

import arviz as az
import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.errors import StopwiseInputError
from stopwise.estimation.bayes import labels as bayes_labels
from stopwise.estimation.bayes.draws import flatten_chains
from stopwise.estimation.bayes.priors import hyperprior_text
from stopwise.estimation.bayes.subject_estimates import subject_lines, subject_records
from stopwise.estimation.bayes.truncation import truncation_warnings

RHAT_MAX = 1.01  # Vehtari et al. 2021 recommend R-hat < 1.01
ESS_MIN = 400  # Vehtari et al. 2021: bulk and tail ESS > 400 (100 per chain with 4 chains)
EBFMI_MIN = 0.3  # Betancourt 2016: E-BFMI below 0.3 signals poor exploration
PARETO_K_MAX = 0.7  # Vehtari et al. 2017/2024: k > 0.7 makes the PSIS estimate unreliable
DISCLAIMER = (
    "Research estimates, not a basis for individual financial, clinical or hiring decisions."
)


def package_versions() -> dict[str, str]:
    """Versions of the packages behind a Bayesian result."""
    import importlib.metadata as md
    import platform

    out = {"python": platform.python_version()}
    for name in (
        "stopwise",
        "numpy",
        "scipy",
        "pandas",
        "jax",
        "jaxlib",
        "numpyro",
        "arviz",
        "patsy",
    ):
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            out[name] = "not installed"
    return out


# ---------------------------------------------------------------------------------------
# Derived draws.


def gauss_hermite_moments(spec: Any, mu: Any, sd: Any, n: int = 40) -> tuple[Any, Any]:
    """Mean and sd of x = to_natural(mu + sd e), e ~ Normal(0, 1):
    E[g] ~= sum_j w_j g(mu + sqrt(2) sd t_j) / sqrt(pi)   (Gauss-Hermite nodes t, weights w)."""
    t, w = np.polynomial.hermite.hermgauss(n)
    w = jnp.asarray(w / math.sqrt(math.pi))
    x = spec.to_natural(
        jnp.asarray(mu)[..., None] + math.sqrt(2.0) * jnp.asarray(sd)[..., None] * jnp.asarray(t)
    )
    mean = jnp.sum(w * x, axis=-1)
    var = jnp.sum(w * (x - mean[..., None]) ** 2, axis=-1)
    return mean, jnp.sqrt(jnp.maximum(var, 0.0))


def derived_draws(
    setup: Any, samples: Mapping[str, Any], args: Any, first_cell_of_subject: np.ndarray | None
) -> dict[str, np.ndarray]:
    """Reported quantities (module docstring) for every draw, shape (chains, draws, ...);
    one compiled call (eager JAX would compile every primitive separately)."""
    first = None if first_cell_of_subject is None else tuple(map(int, first_cell_of_subject))
    out = _derived_jit(setup, first, {k: jnp.asarray(v) for k, v in samples.items()}, args)
    return {k: np.asarray(v) for k, v in out.items()}


def _derived_draws(
    setup: Any, samples: Mapping[str, Any], args: Any, first: tuple[int, ...] | None
) -> dict[str, Any]:
    from stopwise.estimation.bayes.density import cell_z

    out: dict[str, Any] = {}
    for k, spec in enumerate(setup.specs):
        name = spec.name
        if setup.has_intercept(name):
            label = bayes_labels.population_median(name) if setup.hierarchical else name
            out[label] = spec.to_natural(samples[f"z_{name}"])
        effects = [c for c in setup.coef_names[name] if c != "Intercept"]
        for e, column in enumerate(effects):
            out[bayes_labels.covariate_effect(name, column)] = samples[f"b_{name}"][..., e]
        if setup.hierarchical:
            sd = samples["sd_z"][..., k]
            if setup.has_intercept(name):
                mean, sd_nat = gauss_hermite_moments(spec, samples[f"z_{name}"], sd)
                out[bayes_labels.population_mean(name)] = mean
                out[bayes_labels.between_subject_sd(name)] = sd_nat
            out[bayes_labels.between_subject_sd_unconstrained(name)] = sd
    if setup.hierarchical and len(setup.names) > 1:
        chol = samples["L_corr"]
        corr = chol @ jnp.swapaxes(chol, -1, -2)
        for i, j in combinations(range(len(setup.names)), 2):
            label = bayes_labels.between_subject_correlation(setup.names[i], setup.names[j])
            out[label] = corr[..., i, j]
    if setup.hierarchical and first is not None:
        z = jax.vmap(jax.vmap(lambda s: cell_z(setup, s, args)))(dict(samples))
        index = jnp.asarray(first)
        for spec in setup.specs:
            out[f"{spec.name}_subject"] = spec.to_natural(z[spec.name][..., index])
    return out


_derived_jit = jax.jit(
    lambda setup, first, samples, args: _derived_draws(setup, samples, args, first),
    static_argnums=(0, 1),
)


def sample_stats(extra: Mapping[str, Any], max_tree_depth: int) -> dict[str, np.ndarray]:
    """NumPyro's extra fields under ArviZ's sample_stats names."""
    steps = np.asarray(extra["num_steps"])
    return {
        "diverging": np.asarray(extra["diverging"]).astype(bool),
        "energy": np.asarray(extra["energy"]),
        "n_steps": steps,
        "tree_depth": np.ceil(np.log2(steps + 1.0)).astype(int),
        "reached_max_treedepth": steps >= 2**max_tree_depth - 1,
        "acceptance_rate": np.asarray(extra["accept_prob"]),
        "step_size": np.asarray(extra["adapt_state.step_size"]),
        "lp": -np.asarray(extra["potential_energy"]),
    }


def observed_data(data: Any) -> dict[str, np.ndarray]:
    if isinstance(data, LotteryData):
        return {"choice_b": np.asarray(data.choice_b), "subject": np.asarray(data.subject)}
    return {
        name: np.asarray(getattr(data, name))
        for name in ("draw", "bust", "step", "cond", "subject", "trial")
    }


# ---------------------------------------------------------------------------------------
# Diagnostics and warnings.


def diagnostics_table(idata: Any, var_names: Sequence[str]) -> pd.DataFrame:
    """R-hat (rank-normalised), bulk and tail ESS for every scalar element of ``var_names``."""
    table = az.summary(idata, var_names=list(var_names), kind="diagnostics")
    return table[["r_hat", "ess_bulk", "ess_tail"]]


def sampler_warnings(
    diag: pd.DataFrame, stats: Mapping[str, np.ndarray], ebfmi: np.ndarray, max_tree_depth: int
) -> list[str]:
    """One warning per problem, naming the worst quantities and what to try."""
    out: list[str] = []
    if not np.any(np.isfinite(diag["r_hat"].to_numpy(dtype=float))):
        out.append(
            "R-hat cannot be computed (one chain, or draws that never changed): convergence "
            "is not checked; run at least 2 chains (4 recommended)"
        )
    bad = diag[diag["r_hat"] > RHAT_MAX].sort_values("r_hat", ascending=False)
    if len(bad):
        out.append(
            f"R-hat above {RHAT_MAX} for {_worst(bad, 'r_hat')}: the chains disagree; run "
            "longer (more warmup and draws), start from init='mle', or check that the "
            "parameter is identified by the design"
        )
    for column, what in (("ess_bulk", "bulk"), ("ess_tail", "tail")):
        low = diag[diag[column] < ESS_MIN].sort_values(column)
        if len(low):
            out.append(
                f"{what} ESS below {ESS_MIN} for {_worst(low, column)}: too few effective "
                "draws for stable means and intervals; increase draws (or chains)"
            )
    n_div = int(np.sum(stats["diverging"]))
    if n_div:
        out.append(
            f"{n_div} divergent transitions after warm-up: the posterior has regions NUTS "
            "cannot explore; raise target_accept (e.g. 0.95), give tighter priors, or use a "
            "pooled model if a between-subject sd is near zero"
        )
    for chain, value in enumerate(np.atleast_1d(ebfmi)):
        if value < EBFMI_MIN:
            out.append(
                f"E-BFMI {value:.2f} below {EBFMI_MIN} in chain {chain}: the momentum resampling "
                "explores the energy poorly (often heavy tails or a funnel); try longer warm-up "
                "or tighter priors on the between-subject sds"
            )
    hits = int(np.sum(stats["reached_max_treedepth"]))
    if hits:
        out.append(
            f"{hits} transitions hit the maximum tree depth {max_tree_depth}: sampling is "
            "inefficient (strongly correlated or badly scaled parameters); raise "
            "max_tree_depth or reparameterise"
        )
    return out


IMPOSSIBLE_LOGLIK = -1e10  # a log-likelihood this low means "zero probability" in practice


def data_fit_warnings(loglik: float, pointwise_ll: np.ndarray, params: pd.DataFrame) -> list[str]:
    """Observations the model cannot produce, and chains that never moved."""
    out = []
    worst = np.min(pointwise_ll, axis=0)
    bad = int(np.sum(~np.isfinite(worst) | (worst < IMPOSSIBLE_LOGLIK)))
    if bad or not math.isfinite(loglik) or loglik < IMPOSSIBLE_LOGLIK:
        out.append(
            f"{bad} pointwise units have (near) zero probability under the model for some "
            f"draws (log-likelihood at the posterior mean {loglik:.3g}): the model cannot "
            "produce some observed choices (e.g. CRRA utility of losses or of a zero bank at "
            "r >= 1); the posterior is not trustworthy -- choose a model that covers the data"
        )
    scale = np.maximum(1.0, np.abs(params["estimate"].to_numpy()))
    stuck = [n for n, sd, m in zip(params.index, params["se"], scale) if not sd > 1e-12 * m]
    if stuck:
        out.append(
            f"the draws of {', '.join(stuck)} never changed: the sampler did not move "
            "(too short a warm-up, or a likelihood without finite gradients)"
        )
    return out


def _nan_extreme(reduce: Any, values: Any) -> float:
    """reduce (np.nanmax / np.nanmin) over the finite values, NaN when there are none."""
    values = np.asarray(values, dtype=float)
    return float(reduce(values)) if np.any(np.isfinite(values)) else math.nan


def _worst(frame: pd.DataFrame, column: str, n: int = 3) -> str:
    items = [f"{name} ({value:.3g})" for name, value in frame[column].head(n).items()]
    more = f" and {len(frame) - n} more" if len(frame) > n else ""
    return ", ".join(items) + more


# ---------------------------------------------------------------------------------------
# The result record.


@dataclass
class Posterior:
    """A Bayesian fit: InferenceData, reported table, diagnostics (module docstring)."""

    model: Any
    idata: Any
    params: pd.DataFrame
    subject_params: pd.DataFrame | None
    diagnostics: dict[str, Any]
    warnings: list[str]
    run: dict[str, Any]
    priors: dict[str, str]
    hierarchical: bool
    hdi_prob: float
    n_obs: int
    n_subjects: int
    loglik: float
    unit_name: str
    notes: list[str] = field(default_factory=list)
    versions: dict[str, str] = field(default_factory=package_versions)
    setup: Any = field(default=None, repr=False)
    args: Any = field(default=None, repr=False)
    cells: Any = field(default=None, repr=False)
    data: Any = field(default=None, repr=False)
    _loo: Any = field(default=None, repr=False)
    loo_repair: Any = field(default=None, repr=False)  # estimation/loo_subject.SubjectLoo

    @property
    def converged(self) -> bool:
        d = self.diagnostics
        return bool(
            d["max_rhat"] <= RHAT_MAX
            and d["min_ess_bulk"] >= ESS_MIN
            and d["min_ess_tail"] >= ESS_MIN
            and d["divergences"] == 0
        )

    @property
    def name(self) -> str:
        return self.model.name + (" (hierarchical)" if self.hierarchical else "")

    def loo(self) -> Any:
        """PSIS-LOO (ArviZ) over the pointwise units; cached."""
        if self._loo is None:
            with warnings.catch_warnings():
                # ArviZ's generic advice on large Pareto k; stopwise reports the count of
                # units with k > 0.7 itself (loo_summary, summary(), compare notes)
                warnings.filterwarnings("ignore", message="Estimated shape parameter of Pareto")
                self._loo = az.loo(self.idata, pointwise=True)
        return self._loo

    def loo_summary(self) -> dict[str, Any]:
        res = self.loo()
        k = np.asarray(res.pareto_k)
        repair = self.loo_repair
        return {
            "elpd_loo": float(res.elpd_loo),
            "se": float(res.se),
            "p_loo": float(res.p_loo),
            "unit": self.unit_name,
            "n_units": int(k.size),
            "n_pareto_k_above_0.7": int(np.sum(k > PARETO_K_MAX)),
            "method": repair.method if repair is not None else "PSIS-LOO",
            "refits": repair.refits if repair is not None else 0,
        }

    def draws(self, name: str) -> np.ndarray:
        """All draws of a reported quantity, chains stacked: shape (chains * draws, ...)."""
        values = np.asarray(self.idata.posterior[name].values)
        return values.reshape(-1, *values.shape[2:])

    def to_dict(self) -> dict[str, Any]:
        """DESIGN.md result keys plus "diagnostics", "priors" and run settings."""
        rows = self.params
        params = [
            {
                "name": n,
                "estimate": _num(r["estimate"]),
                "se": _num(r["se"]),
                "ci_low": _num(r["ci_low"]),
                "ci_high": _num(r["ci_high"]),
            }
            for n, r in rows.iterrows()
        ]
        diagnostics = dict(self.diagnostics)
        diagnostics["loo"] = self.loo_summary()
        return {
            "model": self.model.name,
            "method": "bayes",
            "converged": self.converged,
            "n_obs": int(self.n_obs),
            "n_subjects": int(self.n_subjects),
            "loglik": _num(self.loglik),
            "aic": None,
            "bic": None,
            "params": params,
            "se_method": "posterior",
            "warnings": list(self.warnings),
            "versions": dict(self.versions),
            "seed": int(self.run["seed"]),
            "hierarchical": self.hierarchical,
            "interval": f"{self.hdi_prob:g} highest-density interval",
            "loglik_at": "posterior mean of each cell's natural-scale parameters",
            "priors": dict(self.priors),
            "diagnostics": diagnostics,
            "sampler": {k: v for k, v in self.run.items() if k != "seed"},
            "notes": list(self.notes),
            "subjects": subject_records(self.subject_params),
        }

    def to_json(self) -> str:
        from stopwise._io import dumps_json

        return dumps_json(self.to_dict())

    def summary(self) -> str:
        """A plain-text table: settings, priors, estimates with HDIs and diagnostics."""
        d = self.diagnostics
        r = self.run
        lines = [
            f"Bayesian fit: {self.model.name}"
            + (
                f" (hierarchical, {r.get('parametrisation') or 'non-centred'})"
                if self.hierarchical
                else " (pooled)"
            ),
            f"observations: {self.n_obs}   subjects: {self.n_subjects}   "
            f"log-likelihood at posterior mean: {self.loglik:.2f}",
            f"NUTS: {r['chains']} chains ({r['chain_method']}) x {r['draws']} draws after "
            f"{r['warmup']} warm-up, seed {r['seed']}, target accept {r['target_accept']}, "
            f"start: {r['init']}, {r['sampling_seconds']:.1f} s"
            + (", dense mass matrix for the population" if r.get("dense_mass") else ""),
        ]
        if r.get("formulas"):
            lines.append("formulas: " + "; ".join(r["formulas"]))
        lines.append("priors (natural scale):")
        width = max(len(k) for k in self.priors) + 2
        lines += [f"  {k:<{width}}{v}" for k, v in self.priors.items()]
        lines.append("")
        table = self.params[
            ["estimate", "se", "ci_low", "ci_high", "r_hat", "ess_bulk", "ess_tail"]
        ].copy()
        table.columns = [
            "mean",
            "sd",
            f"hdi{self.hdi_prob:.0%}_lo",
            f"hdi{self.hdi_prob:.0%}_hi",
            "r_hat",
            "ess_bulk",
            "ess_tail",
        ]
        lines.append(table.to_string(float_format=lambda v: f"{v:.4g}"))
        lines.append("")
        lines.append(
            f"divergences: {d['divergences']}   max R-hat: {d['max_rhat']:.3f}   "
            f"min bulk/tail ESS: {d['min_ess_bulk']:.0f}/{d['min_ess_tail']:.0f}   "
            f"min E-BFMI: {min(d['ebfmi']):.2f}   max tree depth hits: {d['max_treedepth_hits']}"
        )
        loo = self.loo_summary()
        lines.append(
            f"leave-one-{loo['unit']}-out elpd {loo['elpd_loo']:.2f} (se {loo['se']:.2f}),"
            f" p_loo {loo['p_loo']:.1f}, Pareto k > 0.7: {loo['n_pareto_k_above_0.7']}; "
            f"{loo['method']}"
        )
        check = r.get("truncation_check")
        if check:
            lines.append(
                f"planner cap max_target={check['max_target']}: largest |log-likelihood "
                f"difference| from the default cap over {check['draws_checked']} draws "
                f"{check['max_abs_loglik_difference']:.2g} (tolerance {check['tolerance']:g})"
            )
        lines += subject_lines(self.subject_params, self.hdi_prob)
        lines.append(f"converged: {'yes' if self.converged else 'NO'}")
        lines += [f"warning: {w}" for w in self.warnings]
        lines += [f"note: {n}" for n in self.notes]
        lines.append(DISCLAIMER)
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    # -- predictions --------------------------------------------------------------------

    def cell_theta_draws(self, n_draws: int | None = 200) -> dict[str, np.ndarray]:
        """Natural-scale parameters per cell for evenly spaced draws: name -> (n, n_cells)."""
        from stopwise.estimation.bayes.density import cell_z

        samples = self._samples
        total = next(iter(samples.values())).shape[0]
        pick = (
            np.arange(total)
            if n_draws is None or n_draws >= total
            else np.unique(np.linspace(0, total - 1, n_draws).round().astype(int))
        )
        chosen = {k: jnp.asarray(v[pick]) for k, v in samples.items()}
        z = jax.jit(jax.vmap(lambda s: cell_z(self.setup, s, self.args)))(chosen)
        return {spec.name: np.asarray(spec.to_natural(z[spec.name])) for spec in self.setup.specs}

    def predict(self, n_draws: int = 200) -> pd.DataFrame:
        """Posterior mean and sd of the modelled response probability per fitted row:
        P(draw) for stopping rows, P(choose B) for lottery rows (``n_draws`` evenly spaced
        posterior draws)."""
        theta = self.cell_theta_draws(n_draws)
        prob = np.asarray(
            jax.jit(
                jax.vmap(
                    lambda t: jax.vmap(lambda tc, dc: response_probability(self.model, tc, dc))(
                        t, self.args.data
                    )
                )
            )({k: jnp.asarray(v) for k, v in theta.items()})
        )
        at = (np.asarray(self.args.row_cell), np.asarray(self.args.row_pos))
        mean = prob.mean(axis=0)[at]
        sd = prob.std(axis=0)[at]
        data = self.data
        labels = (
            np.asarray(data.subject_labels)[np.asarray(data.subject)]
            if data.subject_labels is not None
            else np.asarray(data.subject)
        )
        if isinstance(data, LotteryData):
            return pd.DataFrame(
                {
                    "subject": labels,
                    "p_choose_b": mean,
                    "p_choose_b_sd": sd,
                    "chose_b": np.asarray(data.choice_b),
                }
            )
        return pd.DataFrame(
            {
                "subject": labels,
                "cond": np.asarray(data.cond),
                "step": np.asarray(data.step),
                "p_draw": mean,
                "p_draw_sd": sd,
                "drew": np.asarray(data.draw),
            }
        )

    _samples: dict[str, np.ndarray] = field(default_factory=dict, repr=False)


def response_probability(model: Any, theta: Mapping[str, Any], data: Any) -> Any:
    """P(modelled response) per row (pure JAX): model.predict, else exp(loglik_obs) with the
    response set to draw without bust (stopping) or to B (lottery)."""
    from dataclasses import replace

    if model.predict is not None:
        return model.predict(theta, data)
    if isinstance(data, StoppingData):
        probe = replace(data, draw=jnp.ones_like(data.draw), bust=jnp.zeros_like(data.bust))
    else:
        probe = replace(data, choice_b=jnp.ones_like(data.choice_b))
    return jnp.exp(model.loglik_obs(theta, probe))


def _num(x: Any) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


# ---------------------------------------------------------------------------------------
# Assembly.


def build_posterior(
    *,
    setup: Any,
    data: Any,
    args: Any,
    cells: Any,
    samples: Mapping[str, Any],
    extra: Mapping[str, Any],
    pointwise_ll: np.ndarray,
    unit_labels: np.ndarray,
    unit_name: str,
    run: dict[str, Any],
    hdi_prob: float,
    notes: list[str],
) -> Posterior:
    """Assemble the InferenceData, the reported table, diagnostics and warnings."""
    chains, draws = np.asarray(next(iter(samples.values()))).shape[:2]
    subjects = (
        np.asarray(data.subject_labels)
        if data.subject_labels is not None
        else np.arange(data.n_subjects)
    )
    first_cell = None
    if setup.hierarchical:
        cell_subject = np.asarray(args.cell_subject)
        first_cell = np.array(
            [int(np.flatnonzero(cell_subject == s)[0]) for s in range(setup.n_subjects)]
        )
    derived = derived_draws(setup, samples, args, first_cell)
    subject_vars = [k for k in derived if k.endswith("_subject")]
    population_vars = [k for k in derived if k not in subject_vars]
    coords = {"subject": subjects, unit_name: unit_labels}
    dims = {k: ["subject"] for k in subject_vars}
    dims["obs"] = [unit_name]
    idata = az.from_dict(
        posterior=derived,
        log_likelihood={"obs": pointwise_ll.reshape(chains, draws, -1)},
        observed_data=observed_data(data),
        sample_stats=sample_stats(extra, run["max_tree_depth"]),
        coords=coords,
        dims=dims,
    )
    diag = diagnostics_table(idata, list(derived))
    stats = sample_stats(extra, run["max_tree_depth"])
    ebfmi = np.atleast_1d(az.bfmi(idata))
    params = population_table(idata, population_vars, diag, hdi_prob)
    subject_params = (
        subject_table(idata, subject_vars, diag, hdi_prob, subjects) if subject_vars else None
    )
    diagnostics = {
        "divergences": int(np.sum(stats["diverging"])),
        "max_rhat": _nan_extreme(np.nanmax, diag["r_hat"]),
        "min_ess_bulk": float(np.nanmin(diag["ess_bulk"])),
        "min_ess_tail": float(np.nanmin(diag["ess_tail"])),
        "ebfmi": [float(v) for v in ebfmi],
        "max_treedepth_hits": int(np.sum(stats["reached_max_treedepth"])),
        "mean_step_size": float(np.mean(stats["step_size"])),
        "mean_accept": float(np.mean(stats["acceptance_rate"])),
        "ess_bulk_per_second": float(
            np.nanmin(diag["ess_bulk"]) / max(run["sampling_seconds"], 1e-9)
        ),
        "quantities_checked": len(diag),
    }
    warnings_ = sampler_warnings(diag, stats, ebfmi, run["max_tree_depth"])
    priors = {name: p.text for name, p in setup.priors.items()}
    hyper = hyperprior_text()
    if setup.hierarchical:
        priors.update(
            {
                "population median": hyper["location"],
                "between-subject sd (unconstrained scale)": hyper["sd"],
                "between-subject correlation (unconstrained scale)": hyper["correlation"],
            }
        )
    if any(setup.effect_columns(n) for n in setup.names):
        priors["covariate effects"] = hyper["covariate effects"]
    loglik = loglik_at_posterior_mean(setup, samples, args)
    warnings_ += data_fit_warnings(loglik, pointwise_ll, params)
    warnings_ += truncation_warnings(run.get("truncation_check"))
    flat_samples = flatten_chains(samples)
    post = Posterior(
        model=setup.model,
        idata=idata,
        params=params,
        subject_params=subject_params,
        diagnostics=diagnostics,
        warnings=warnings_,
        run=run,
        priors=priors,
        hierarchical=setup.hierarchical,
        hdi_prob=hdi_prob,
        n_obs=int(data.n_obs),
        n_subjects=int(data.n_subjects),
        loglik=loglik,
        unit_name=unit_name,
        notes=notes,
        setup=setup,
        args=args,
        cells=cells,
        data=data,
    )
    post._samples = flat_samples
    return post


def _hdi(values: np.ndarray, prob: float) -> tuple[float, float]:
    lo, hi = az.hdi(np.asarray(values).reshape(-1), hdi_prob=prob)
    return float(lo), float(hi)


def population_table(
    idata: Any, names: Sequence[str], diag: pd.DataFrame, hdi_prob: float
) -> pd.DataFrame:
    rows = []
    for name in names:
        v = np.asarray(idata.posterior[name].values)
        lo, hi = _hdi(v, hdi_prob)
        rows.append(
            {
                "name": name,
                "estimate": float(v.mean()),
                "se": float(v.std(ddof=1)),
                "ci_low": lo,
                "ci_high": hi,
                "r_hat": float(diag.loc[name, "r_hat"]),
                "ess_bulk": float(diag.loc[name, "ess_bulk"]),
                "ess_tail": float(diag.loc[name, "ess_tail"]),
                "scale": bayes_labels.scale_of(name),
            }
        )
    return pd.DataFrame(rows).set_index("name")


def subject_table(
    idata: Any, names: Sequence[str], diag: pd.DataFrame, hdi_prob: float, subjects: np.ndarray
) -> pd.DataFrame:
    """Long frame: subject, param, estimate (posterior mean), se (sd), HDI, R-hat, ESS."""
    rows = []
    for name in names:
        v = np.asarray(idata.posterior[name].values)  # (chains, draws, n_subjects)
        flat = v.reshape(-1, v.shape[-1])
        for s, label in enumerate(subjects):
            lo, hi = _hdi(flat[:, s], hdi_prob)
            key = f"{name}[{label}]"
            rows.append(
                {
                    "subject": label,
                    "param": name.removesuffix("_subject"),
                    "estimate": float(flat[:, s].mean()),
                    "se": float(flat[:, s].std(ddof=1)),
                    "ci_low": lo,
                    "ci_high": hi,
                    "r_hat": float(diag.loc[key, "r_hat"]) if key in diag.index else np.nan,
                    "ess_bulk": float(diag.loc[key, "ess_bulk"]) if key in diag.index else np.nan,
                }
            )
    return pd.DataFrame(rows)


def loglik_at_posterior_mean(setup: Any, samples: Mapping[str, Any], args: Any) -> float:
    """sum_c sum_i weight * loglik_obs(mean over draws of theta_c, data_c)[i]."""
    from stopwise.estimation.bayes.density import cell_z

    flat = {k: jnp.reshape(jnp.asarray(v), (-1, *np.shape(v)[2:])) for k, v in samples.items()}

    @jax.jit
    def value(flat: Mapping[str, Any]) -> Any:
        z = jax.vmap(lambda s: cell_z(setup, s, args))(flat)
        theta = {spec.name: jnp.mean(spec.to_natural(z[spec.name]), axis=0) for spec in setup.specs}
        ll = jax.vmap(setup.model.loglik_obs)(theta, args.data)
        return jnp.sum(args.weight * jnp.where(args.weight > 0, ll, 0.0))

    return float(value(flat))


# ---------------------------------------------------------------------------------------
# Comparison by PSIS-LOO.


@dataclass
class LooComparison:
    """Models ranked by ELPD (PSIS-LOO): a tidy frame, notes and a printed table."""

    table: pd.DataFrame
    notes: list[str]
    unit: str = "trial"

    def __str__(self) -> str:
        cols = [
            "rank",
            "elpd_loo",
            "se",
            "elpd_diff",
            "dse",
            "p_loo",
            "weight",
            "n_pareto_k_above_0.7",
        ]
        text = self.table[cols].to_string(float_format=lambda v: f"{v:.2f}")
        return "\n".join(
            [
                f"Model comparison by leave-one-{self.unit}-out elpd (higher is better)",
                text,
                *[f"note: {n}" for n in self.notes],
            ]
        )

    def summary(self) -> str:
        return str(self)

    def to_dict(self) -> dict[str, Any]:
        records = self.table.reset_index().to_dict(orient="records")
        return {
            "method": "bayes",
            "criterion": "elpd_loo",
            "unit": self.unit,
            "models": records,
            "notes": list(self.notes),
        }


def loo_compare(fits: Sequence[Posterior], names: Sequence[str] | None = None) -> LooComparison:
    """Rank by ELPD with differences and their SEs (ArviZ compare, stacking weights); flag
    Pareto k > 0.7 (Vehtari, Gelman & Gabry 2017)."""
    if len(fits) < 2:
        raise StopwiseInputError("comparison needs at least two models")
    names = list(names) if names is not None else [f.name for f in fits]
    if len(set(names)) != len(names):
        names = [f"{n} #{i + 1}" for i, n in enumerate(names)]
    units = {f.unit_name for f in fits}
    sizes = {f.idata.log_likelihood["obs"].shape[-1] for f in fits}
    if len(units) > 1 or len(sizes) > 1:
        raise StopwiseInputError(
            "models compared by LOO must be fitted to the same data with the same pointwise "
            f"unit; got units {sorted(units)} and sizes {sorted(sizes)}"
        )
    loos = {n: f.loo() for n, f in zip(names, fits)}
    table = az.compare(loos, ic="loo")
    table = table.rename(columns={"elpd_loo": "elpd_loo", "d_loo": "elpd_diff"})
    if "elpd_diff" not in table.columns and "elpd_loo" in table.columns:
        table["elpd_diff"] = table["elpd_loo"].max() - table["elpd_loo"]
    table["n_pareto_k_above_0.7"] = [
        int(np.sum(np.asarray(loos[n].pareto_k) > PARETO_K_MAX)) for n in table.index
    ]
    table.index.name = "model"
    notes = []
    for n in table.index:
        bad = int(table.loc[n, "n_pareto_k_above_0.7"])
        if bad:
            notes.append(
                f"{n}: {bad} of {np.asarray(loos[n].pareto_k).size} units have Pareto k > "
                f"{PARETO_K_MAX}; PSIS-LOO is unreliable for this model (refit leaving those "
                "units out, or use K-fold cross-validation)"
            )
    unit = units.pop()
    methods = {f.loo_summary()["method"] for f in fits}
    notes.insert(
        0,
        f"every model scored by the same unit: leave-one-{unit}-out ({'; '.join(sorted(methods))})",
    )
    best = table.index[0]
    for n in table.index[1:]:
        diff, dse = float(table.loc[n, "elpd_diff"]), float(table.loc[n, "dse"])
        if dse > 0 and diff < 2 * dse:
            notes.append(
                f"{best} vs {n}: the ELPD difference {diff:.1f} is within two SEs "
                f"({dse:.1f}); the data do not clearly separate them"
            )
    unconverged = [n for n, f in zip(names, fits) if not f.converged]
    if unconverged:
        notes.append(f"not converged (see their warnings): {', '.join(unconverged)}")
    return LooComparison(table=table, notes=notes, unit=unit)
