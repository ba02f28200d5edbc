"""The result of a Bayesian fit: an ArviZ InferenceData plus a ``Posterior`` record.

Reported quantities (posterior group of the InferenceData, and rows of ``Posterior.params``):

  <k>            pooled: the parameter on its natural scale, to_natural(intercept of z_k)
  <k>:<column>   a covariate effect on the unconstrained scale (as the ML engine names it)
  hierarchical:  "<k>: population median", "<k>: population mean", "<k>: between-subject
                 sd", "<k>: between-subject sd (unconstrained scale)" and "<j>, <k>:
                 between-subject correlation (unconstrained scale)"; see
                 estimation/bayes/labels.py. The population mean and sd of the natural-scale
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

import importlib.metadata as md
import math
import platform
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from typing import Any

import arviz as az
import jax
import jax.numpy as jnp
import numpy as np
import pandas as pd

from stopwise.data_schemas.arrays import LotteryData, StoppingData
from stopwise.data_schemas.json_text import dumps_json
from stopwise.estimation.bayes.density import cell_z
from stopwise.estimation.bayes.diagnostics import ESS_MIN, PARETO_K_MAX, RHAT_MAX
from stopwise.estimation.bayes.subject_estimates import subject_lines, subject_records

DISCLAIMER = (
    "Research estimates, not a basis for individual financial, clinical or hiring decisions."
)


def package_versions() -> dict[str, str]:
    """Versions of the packages behind a Bayesian result."""
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
    loo_repair: Any = field(default=None, repr=False)  # estimation/bayes/loo_subject.SubjectLoo

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
