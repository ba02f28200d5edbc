"""One compiled NUTS program for every replication of a calibration study.

Why: ``fit_bayes`` builds a new NumPyro MCMC for every fit and releases JAX's compiled
programs after it (estimation/bayes/sampler.py, ``release_compiled_programs``), so each fit
compiles its sampler loop, its start-up and its post-processing again: measured 45-62 s per
crra+logit replication of 200 choices, of which about 21 s is XLA compilation alone (191
programs) and most of the rest tracing (cProfile, 2026-12-02). The sampling itself is well
under a second.

What is the same as a user's pooled fit (``fit_bayes`` with its defaults, no formulas):
the steps before sampling are the product's own functions in the product's order
(``sampling_model``, ``sample_below_cliff``, ``ml_start``, ``initial_natural``,
``cells_for_sampling``, ``sampler_start``); the density is the product's ``numpyro_model``;
the sampler is NumPyro's NUTS (``numpyro.infer.hmc.hmc``, the functions its ``NUTS`` class
calls) with the product's settings: start at the mode z* of the Laplace posterior
N(ML, C) x prior moved by U(-1, 1) x its sd per chain, the dense inverse mass matrix
(H + P(z*))^-1 from the ML Hessian H and the prior's curvature P as the warm-up's starting
metric (``laplace_start``; where that start is more than ten prior sds wide, the exact
posterior mode, estimation/bayes/mode_start.py), adapted in the warm-up like the step size (the product's
``mass_matrix_settings``, estimation/bayes/sampler.py, gives both the same keywords),
target acceptance 0.8, maximum tree depth 10.

What differs (settings, stated): the chain counts and lengths (the study's ``Sampling``);
the chains' starting jitter is drawn from the study's key instead of NumPyro's init-strategy
key (same distribution); a chain whose start has a potential or gradient that is not finite
is drawn again up to 100 times, as NumPyro's init strategy does (numpyro/infer/util.py,
``find_valid_initial_params``; the harness did not redraw before the fifteenth session). With the former start (ML point, jitter of one ML sd, which
reached about 2,000 in z on short contest data) chains of the crra+ch study started
thousands of units out and diverged on every transition in 72 replications, while the
product's own fit of replication 8 with that start did not diverge (4 seeds, 2026-12-03):
the calibration study then measured the harness more than the product. The data are
padded to one shape so one compiled program serves every replication: every leaf of the
cell bundle whose second axis is the row axis is padded by repeating its last row with
weight 0 (the density sums weight x log-likelihood and zeroes weight-0 rows,
estimation/bayes/density.py), and the stopping data's static ``horizon`` is rounded up
(``padded_shape``: a few shapes per study). ``row_sum_residual`` compares the padded cell
sum with the plain sum of the model's row log-likelihoods over the data rows at the start
point (relative difference), so a replication whose aggregation or padding changes the
likelihood fails with a message instead of being ranked.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from functools import partial
from typing import Any

import jax
import jax.numpy as jnp
import numpy as np
from numpyro.infer.hmc import hmc
from numpyro.infer.util import initialize_model

from stopwise.data_schemas.arrays import StoppingData
from stopwise.estimation.bayes.density import (
    CellArgs,
    Setup,
    jitted_total_loglik,
    numpyro_model,
    pooled_log_prior,
    population_sites,
)
from stopwise.estimation.bayes.fit_steps import pointwise_unit, sampling_model
from stopwise.estimation.bayes.initial import initial_natural, initial_values
from stopwise.estimation.bayes.laplace_mode import PriorTerms, prior_terms
from stopwise.estimation.bayes.mode_start import checked_pooled_start
from stopwise.estimation.bayes.pooled_start import (
    PooledStart,
    ml_start,
    start_sites,
)
from stopwise.estimation.bayes.prepare import as_bundle, prepare
from stopwise.estimation.bayes.sampler import mass_matrix_settings, release_compiled_programs
from stopwise.estimation.bayes.support import sample_below_cliff

TARGET_ACCEPT = 0.8  # fit_bayes's default
MAX_TREE_DEPTH = 10  # fit_bayes's default


@dataclass(frozen=True)
class Shape:
    """The common shape every replication is padded to: rows per cell and the horizon."""

    rows: int
    horizon: int | None = None


@dataclass(frozen=True)
class Prepared:
    """One replication ready for the compiled sampler: the setup and cell arrays, the start
    sites, their jitter scales, the dense inverse mass block (None: identity, adapted in
    warm-up), the data bundle and the notes of the product's steps."""

    setup: Setup
    args: CellArgs
    values: dict[str, Any]
    scales: dict[str, Any]
    inverse_mass: dict[tuple[str, ...], Any] | None
    data: Any
    notes: tuple[str, ...]

    @property
    def laplace(self) -> bool:
        """Warm-up started from the Laplace mass matrix (else the identity); both adapted."""
        return self.inverse_mass is not None


def prepare_replication(model: Any, data: Any, point_fits: Any) -> Prepared:
    """The product's pooled-fit steps before sampling, in fit_bayes's order: planner cap,
    CRRA cliff, ML start, start values, cells. ``cells_for_sampling``'s aggregation check and
    ``sampler_start``'s prior curvature are done here with programs compiled once per
    signature (``row_sum_residual``, ``start_for``) instead of once per fit."""
    notes: list[str] = []
    data = as_bundle(data)
    model, _ = sampling_model(model, data, "auto", notes)
    model, cliff = sample_below_cliff(model, data, hierarchical=False, formulas=None, priors=None)
    notes += [cliff] if cliff else []
    pooled = ml_start(model, data, None, point_fits)
    notes += pooled.notes
    natural = initial_natural(model, data, pooled.natural, None, notes, point_fits)
    setup, args, _, _, _ = prepare(
        model,
        data,
        hierarchical=False,
        formulas=None,
        priors=None,
        pointwise=pointwise_unit(None, data),
        aggregate=model.data_kind != "contest",
        centred=(),
    )
    values, scales, inverse_mass, start_notes = start_for(setup, args, natural, pooled)
    return Prepared(setup, args, values, scales, inverse_mass, data, (*notes, *start_notes))


def signature(setup: Setup) -> tuple:
    """What must agree for two replications to share one compiled program: the parameters
    (names and bounds: a cut at the CRRA cliff changes r's bounds) and the model's name."""
    return (setup.model.name, tuple((p.name, p.lower, p.upper) for p in setup.specs))


_CANONICAL: dict[tuple, Setup] = {}


def canonical(setup: Setup) -> Setup:
    """The first setup seen with this signature: jitted functions take the setup as a static
    argument compared by identity, so equal setups must be the same object to share code."""
    return _CANONICAL.setdefault(signature(setup), setup)


_PRIOR_TERMS: dict[tuple, PriorTerms] = {}


def shared_prior_terms(setup: Setup) -> PriorTerms:
    """The product's ``prior_terms`` (estimation/bayes/laplace_mode.py) of the pooled
    population sites, built once per setup signature so that every replication of a study
    calls one compiled program instead of compiling its own, as a user's fit does."""
    key = signature(setup)
    if key not in _PRIOR_TERMS:
        shared = canonical(setup)
        sites = population_sites(shared)
        log_prior = partial(pooled_log_prior, shared)
        _PRIOR_TERMS[key] = prior_terms(log_prior, sites, [1] * len(sites))
    return _PRIOR_TERMS[key]


def start_for(
    setup: Setup, args: CellArgs, natural: Any, pooled: PooledStart
) -> tuple[dict[str, Any], dict[str, Any], dict[tuple[str, ...], Any] | None, tuple[str, ...]]:
    """``sampler_start``'s pooled branch (estimation/bayes/fit_steps.py): values, jitter
    scales and the inverse mass the warm-up starts from, all from ``checked_pooled_start``
    (the mode of the Laplace posterior, or where that is refused the exact posterior mode,
    estimation/bayes/mode_start.py), None where the product starts from the identity (some
    direction that neither the ML Hessian's positive part nor the prior curves), and the
    notes of a refused start. Pooled fits without formulas only."""
    sites = population_sites(setup)
    if any(not s.startswith("z_") for s in sites):
        raise ValueError("only pooled fits without formulas are supported")
    values, scales = initial_values(setup, natural), {}
    if pooled.coef is None:
        return values, scales, None, ()
    values, scales = start_sites(pooled, setup.names, setup.coef_names)
    if not pooled.has_curvature:
        return values, scales, None, ()
    checked = checked_pooled_start(setup, args, pooled, shared_prior_terms(setup))
    return checked.values, checked.scales, checked.inverse_mass, checked.notes


def pad_rows(leaf: Any, rows: int, width: int) -> Any:
    """Pad axis 1 (the row axis, length ``width``) to ``rows`` by repeating the last row."""
    a = np.asarray(leaf)
    if a.ndim < 2 or a.shape[1] != width or rows == width:
        return leaf
    extra = np.repeat(a[:, -1:], rows - width, axis=1)
    return np.concatenate([a, extra], axis=1)


def pad_args(args: CellArgs, shape: Shape) -> CellArgs:
    """The cell arrays at the common shape: rows padded with weight 0 and the horizon set;
    the per-row index arrays (used only by the pointwise log-likelihood) dropped."""
    width = int(np.shape(args.weight)[1])
    if width > shape.rows:
        raise ValueError(f"{width} distinct rows exceed the padded shape {shape.rows}")
    data = jax.tree_util.tree_map(lambda a: pad_rows(a, shape.rows, width), args.data)
    if shape.horizon is not None and hasattr(data, "horizon"):
        if data.horizon > shape.horizon:
            raise ValueError(f"horizon {data.horizon} exceeds the padded {shape.horizon}")
        data = dataclasses.replace(data, horizon=shape.horizon)
    weight = np.zeros((np.shape(args.weight)[0], shape.rows))
    weight[:, :width] = np.asarray(args.weight)
    none = np.zeros(1, np.int64)
    return CellArgs(data, weight, args.designs, args.cell_subject, none, none, none)


_ROW_SUMS: dict[tuple, Any] = {}


def row_sum_residual(prepared: Prepared, padded: CellArgs) -> float:
    """|sum of the model's row log-likelihoods over the plain data rows - the padded cell
    sum| / max(1, |row sum|) at the start sites: checks aggregation (as the product's
    ``aggregation_is_exact``) and padding together; inf when either is not finite."""
    setup = canonical(prepared.setup)
    key = signature(setup)
    if key not in _ROW_SUMS:
        model = setup.model
        _ROW_SUMS[key] = jax.jit(lambda t, d: jnp.sum(model.loglik_obs(t, d)))
    labels = ("trial_labels",) if isinstance(prepared.data, StoppingData) else ("item_labels",)
    plain = dataclasses.replace(
        prepared.data, covariates={}, subject_labels=None, **dict.fromkeys(labels)
    )
    theta = {s.name: s.to_natural(jnp.asarray(prepared.values[f"z_{s.name}"])) for s in setup.specs}
    direct = float(_ROW_SUMS[key](theta, plain))
    sites = {k: jnp.asarray(v) for k, v in prepared.values.items()}
    cells = float(jitted_total_loglik(setup, sites, padded))
    both = np.isfinite(direct) and np.isfinite(cells)
    return abs(direct - cells) / max(1.0, abs(direct)) if both else float("inf")


class CompiledSampler:
    """NUTS chains for one setup signature, compiled once: ``draw(key, prepared, padded)``
    returns the post-warm-up draws per site (chains, draws) and the divergent transitions."""

    def __init__(
        self,
        setup: Setup,
        padded: CellArgs,
        laplace: bool,
        chains: int,
        warmup: int,
        draws: int,
    ):
        self.chains, self.warmup, self.draws, self.laplace = chains, warmup, draws, laplace
        info = initialize_model(
            jax.random.PRNGKey(0),
            partial(numpyro_model, setup),
            model_args=(padded,),
            dynamic_args=True,
        )
        init_kernel, sample_kernel = hmc(potential_fn_gen=info.potential_fn, algo="NUTS")

        def chain(key: Any, z0: Any, inverse_mass: Any, args: CellArgs) -> Any:
            state = init_kernel(
                z0,
                num_warmup=warmup,
                adapt_step_size=True,
                **mass_matrix_settings(setup, laplace, inverse_mass),
                target_accept_prob=TARGET_ACCEPT,
                max_tree_depth=MAX_TREE_DEPTH,
                model_args=(args,),
                rng_key=key,
            )

            def step(s: Any, _: Any) -> Any:
                s = sample_kernel(s, model_args=(args,))
                return s, (s.z, s.diverging)

            _, (z, diverging) = jax.lax.scan(step, state, None, length=warmup + draws)
            kept = jax.tree_util.tree_map(lambda x: x[warmup:], z)
            return kept, jnp.sum(diverging[warmup:])

        self._run = jax.jit(jax.vmap(chain, in_axes=(0, 0, None, None)))

        def finite_start(z0: Any, args: CellArgs) -> Any:
            energy, grad = jax.value_and_grad(info.potential_fn(args))(z0)
            leaves = [jnp.all(jnp.isfinite(g)) for g in jax.tree_util.tree_leaves(grad)]
            return jnp.isfinite(energy) & jnp.all(jnp.stack(leaves))

        self._finite = jax.jit(jax.vmap(finite_start, in_axes=(0, None)))

    def start_points(self, key: Any, prepared: Prepared) -> dict[str, Any]:
        """Per chain: start value + U(-1, 1) x scale per site (init_near's rule)."""
        out = {}
        keys = jax.random.split(key, len(prepared.values))
        for k, (name, value) in zip(keys, sorted(prepared.values.items())):
            value = jnp.asarray(value, jnp.float64)
            scale = jnp.asarray(prepared.scales.get(name, 0.1), jnp.float64)
            u = jax.random.uniform(k, (self.chains, *value.shape), minval=-1.0, maxval=1.0)
            out[name] = value + scale * u
        return out

    def finite_start_points(
        self, key: Any, prepared: Prepared, padded: CellArgs
    ) -> tuple[dict[str, Any], int]:
        """``start_points``, with every chain whose potential or gradient is not finite
        there drawn again (key fold_in(key, attempt)) up to MAX_REDRAWS times, as NumPyro's
        init strategy does for a user's fit (numpyro/infer/util.py,
        ``find_valid_initial_params``); the chains' starts and the number of redraws. A
        chain still not finite after them is left to NUTS, whose transitions then diverge
        (counted)."""
        z0 = self.start_points(key, prepared)
        redraws = 0
        for attempt in range(1, MAX_REDRAWS + 1):
            ok = np.asarray(self._finite(z0, padded))
            if ok.all():
                break
            fresh = self.start_points(jax.random.fold_in(key, attempt), prepared)
            z0 = {k: keep_where(ok, v, fresh[k]) for k, v in z0.items()}
            redraws += int(np.sum(~ok))
        return z0, redraws

    def draw(self, key: Any, prepared: Prepared, padded: CellArgs) -> tuple[dict, int, int]:
        """Post-warm-up draws per site, divergent transitions and start redraws."""
        k_start, k_run = jax.random.split(key)
        z0, redraws = self.finite_start_points(k_start, prepared, padded)
        if prepared.laplace != self.laplace:
            raise ValueError("this program was compiled for the other mass-matrix start")
        mass = dict(prepared.inverse_mass) if prepared.laplace else None
        z, divergent = self._run(jax.random.split(k_run, self.chains), z0, mass, padded)
        return {k: np.asarray(v) for k, v in z.items()}, int(np.sum(divergent)), redraws


MAX_REDRAWS = 100  # NumPyro's init strategy tries up to 100 starts (find_valid_initial_params)


def keep_where(ok: np.ndarray, kept: Any, fresh: Any) -> Any:
    """Per chain (leading axis): ``kept`` where ``ok``, else ``fresh``."""
    mask = jnp.asarray(ok).reshape((-1,) + (1,) * (jnp.ndim(kept) - 1))
    return jnp.where(mask, kept, fresh)


def padded_shape(
    args: CellArgs, step: int = 32, horizon_step: int = 8, pad_horizon: bool = True
) -> Shape:
    """The rows rounded up to a multiple of ``step`` and the horizon to one of
    ``horizon_step``: a few shapes, hence a few compiled programs, serve a whole study.
    ``pad_horizon`` False keeps the data's horizon (a model whose likelihood a longer
    horizon changes: option ``horizon_invariant`` not set, estimation/ml/recovery.py)."""
    rows = int(np.shape(args.weight)[1])
    horizon = getattr(args.data, "horizon", None)
    if horizon is not None and pad_horizon:
        horizon = -(-int(horizon) // horizon_step) * horizon_step
    return Shape(-(-rows // step) * step, None if horizon is None else int(horizon))


_PROGRAMS: dict[tuple, CompiledSampler] = {}


def sampler_for(
    prepared: Prepared, padded: CellArgs, shape: Shape, chains: int, warmup: int, draws: int
) -> CompiledSampler:
    """The compiled sampler of this replication's signature, shape and start kind (built
    on first use, then reused by every replication that shares them)."""
    key = (signature(prepared.setup), shape, prepared.laplace, chains, warmup, draws)
    if key not in _PROGRAMS:
        _PROGRAMS[key] = CompiledSampler(
            prepared.setup, padded, prepared.laplace, chains, warmup, draws
        )
        _BUILT[0] += 1
    return _PROGRAMS[key]


_BUILT = [0]  # sampler programs built in this process, released ones included
MAPPINGS_LIMIT = 40_000  # of Linux's default ceiling of 65,530 per process (vm.max_map_count)


def compiled_programs() -> int:
    """How many sampler programs this process has compiled (reported beside the study)."""
    return _BUILT[0]


def memory_mappings() -> int | None:
    """The memory mappings this process holds (lines of /proc/self/maps; None elsewhere)."""
    try:
        with open("/proc/self/maps", encoding="ascii", errors="replace") as maps:
            return sum(1 for _ in maps)
    except OSError:
        return None


def release_when_crowded(limit: int = MAPPINGS_LIMIT) -> bool:
    """Drop every compiled program (JAX's and NumPyro's caches, this module's samplers and
    row sums) when the process holds more than ``limit`` memory mappings; True when it did.
    Each compiled program keeps mappings of its own, and a study that compiles programs per
    data shape (a contest model's ML start) reached Linux's ceiling after 170 replications
    and died inside LLVM ("Unable to allocate section memory"). What runs next compiles
    again."""
    held = memory_mappings()
    if held is None or held <= limit:
        return False
    release_compiled_programs()
    _PROGRAMS.clear()
    _ROW_SUMS.clear()
    return True
