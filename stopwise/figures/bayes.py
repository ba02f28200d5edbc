"""Bayesian diagnostics through ArviZ: rank plots (Vehtari et al. 2021) and posterior
densities of the population parameters, drawn on one Figure of our own."""

from __future__ import annotations

import textwrap
from collections.abc import Mapping, Sequence
from typing import Any

import arviz as az
import numpy as np
from matplotlib.figure import Figure

from stopwise.figures.palette import MODELS, new_figure

TITLE_CHARACTERS = 56  # per line: a panel title at font size 9 fits half of a 9-inch figure


def panel_title(name: str, what: str) -> str:
    """``name: what``, wrapped onto lines of at most TITLE_CHARACTERS characters (a long
    parameter name such as a between-subject correlation otherwise runs off the figure)."""
    return textwrap.fill(f"{name}: {what}", TITLE_CHARACTERS)


def idata_from_draws(draws: Mapping[str, np.ndarray]) -> Any:
    """An ArviZ InferenceData whose posterior holds ``draws`` (name -> (chains, draws))."""
    return az.from_dict(posterior={name: np.asarray(v, dtype=float) for name, v in draws.items()})


def posterior_figure(idata: Any, var_names: Sequence[str]) -> Figure:
    """Per parameter: the chains' rank histograms (left; near uniform when the chains
    agree) and the posterior density with its 95% HDI (right)."""
    names = list(var_names)
    fig = new_figure(9.0, 2.4 * len(names))
    axes = fig.subplots(len(names), 2, squeeze=False)
    for i, name in enumerate(names):
        az.plot_rank(idata, var_names=[name], ax=axes[i, 0], colors=list(MODELS))
        az.plot_posterior(
            idata,
            var_names=[name],
            ax=axes[i, 1],
            hdi_prob=0.95,
            color=MODELS[0],
            point_estimate="mean",
            textsize=8,
        )
        axes[i, 0].set_xlabel("rank (all chains)", fontsize=8)
        axes[i, 0].set_ylabel("chain", fontsize=8)
        axes[i, 0].tick_params(labelsize=8)
        axes[i, 0].set_title(panel_title(name, "rank plot by chain"), fontsize=9)
        axes[i, 1].set_title(panel_title(name, "posterior (95% HDI)"), fontsize=9)
    fig.suptitle("Bayesian fit: chain ranks and posterior densities")
    return fig
