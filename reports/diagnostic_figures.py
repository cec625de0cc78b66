"""The diagnostics figures of the report: trace and rank plots, prior against posterior, Pareto k.

Drawn like every figure of the report (:mod:`tallyfit.reports.figures`: off-screen, on
Figure objects, the report's style and colours).
"""
from __future__ import annotations

import warnings
from collections.abc import Sequence
from typing import Any

import matplotlib
import numpy as np
import xarray as xr
from matplotlib.figure import Figure

from .bands import SAMPLE_DIMS
from .figures import DEATH, MAIN, SERIES, grid_shape, new_figure, plain_text, style

__all__ = ["trace_rank_figure", "prior_posterior_figure", "pareto_k_figure"]


def trace_rank_figure(idata: Any, var_names: Sequence[str]) -> Figure:
    """Trace (left, density per chain) and rank bars per chain (right) of each variable (ArviZ plot_trace, kind="rank_bars").

    Args:
        idata: InferenceData.
        var_names: posterior variables to draw (vector variables share a panel).

    Returns:
        Figure.

    Raises:
        ValueError: no variable in ``var_names`` is in the posterior.
    """
    import arviz as az

    names = [v for v in var_names if v in idata.posterior]
    if not names:
        raise ValueError("none of the variables to draw is in the posterior: " + ", ".join(var_names))
    with style():
        fig = new_figure(8.2, 1.75 * len(names) + 0.3, len(names), 2, left=0.3, top=0.35, bottom=0.5,
                      wgap=0.75, hgap=0.8)
        axes = np.array([[fig.add_subplot(len(names), 2, 2 * i + j + 1) for j in range(2)] for i in range(len(names))])
        with warnings.catch_warnings():  # ArviZ's own use of a matplotlib API it deprecates
            warnings.simplefilter("ignore", matplotlib.MatplotlibDeprecationWarning)
            az.plot_trace(idata, var_names=names, kind="rank_bars", compact=True, axes=axes,
                          chain_prop={"color": list(SERIES)}, show=False)
        for ax in axes.ravel():
            ax.title.set_fontsize(9)
            ax.title.set_fontweight("normal")
        return fig


def _flat_draws(group: xr.Dataset, name: str) -> list[tuple[str, np.ndarray]]:
    da = group[name]
    extra = [d for d in da.dims if d not in SAMPLE_DIMS]
    if not extra:
        return [(name, np.asarray(da.values, dtype=float).ravel())]
    st = da.stack(_element=extra).transpose(*[d for d in SAMPLE_DIMS if d in da.dims], "_element")
    vals = np.asarray(st.values, dtype=float)
    vals = vals.reshape(-1, vals.shape[-1])
    labels = [f"{name}[{', '.join(str(v) for v in (idx if isinstance(idx, tuple) else (idx,)))}]"
              for idx in st["_element"].values]
    return [(lab, vals[:, i]) for i, lab in enumerate(labels)]


def prior_posterior_figure(idata: Any, var_names: Sequence[str], max_panels: int = 16) -> Figure:
    """Prior and posterior densities of each parameter (histograms; positive parameters on a log axis when wide).

    Args:
        idata: InferenceData with posterior and prior groups.
        var_names: variables to draw (vector variables: one panel per element).
        max_panels: most panels drawn.

    Returns:
        Figure.

    Raises:
        ValueError: no prior group, or no variable in both groups.
    """
    if "prior" not in idata.groups():
        raise ValueError("posterior.nc has no prior group")
    pairs = []
    for name in var_names:
        if name in idata.posterior and name in idata.prior:
            post = dict(_flat_draws(idata.posterior, name))
            for lab, q in _flat_draws(idata.prior, name):
                if lab in post:
                    pairs.append((lab, q, post[lab]))
    if not pairs:
        raise ValueError("no parameter is in both the prior and the posterior groups")
    pairs = pairs[:max_panels]
    with style():
        nrow, ncol = grid_shape(len(pairs), 3)
        fig = new_figure(8.2, 2.1 * nrow + 0.3, nrow, ncol, left=0.2, top=0.35, bottom=0.45, wgap=0.3, hgap=0.7)
        for i, (lab, prior, post) in enumerate(pairs):
            ax = fig.add_subplot(nrow, ncol, i + 1)
            prior, post = prior[np.isfinite(prior)], post[np.isfinite(post)]
            both = np.concatenate([prior, post])
            lo, hi = np.quantile(both, [0.005, 0.995])
            logx = bool(both.size and np.all(both > 0) and hi / max(lo, 1e-300) > 20)
            if logx:
                bins = np.geomspace(lo, hi, 40)
                ax.set_xscale("log")
            else:
                bins = np.linspace(lo, hi, 40) if hi > lo else 20
            ax.hist(prior, bins=bins, density=True, histtype="stepfilled", color="#d4d4d4", label="prior")
            ax.hist(post, bins=bins, density=True, histtype="stepfilled", color=MAIN, alpha=0.75, label="posterior")
            ax.set_title(plain_text(lab), fontsize=8.5)
            ax.set_yticks([])
            ax.grid(False)
            if i == 0:
                ax.legend(loc="upper right")
        return fig


def pareto_k_figure(pareto_k: np.ndarray, threshold: float = 0.7) -> Figure:
    """Pareto k of each observation's PSIS-LOO estimate, with the threshold line.

    Args:
        pareto_k: one k per observation.
        threshold: k above this is flagged (Vehtari, Gelman & Gabry 2017).

    Returns:
        Figure.

    Raises:
        ValueError: no Pareto k values.
    """
    k = np.asarray(pareto_k, dtype=float)
    if k.size == 0:
        raise ValueError("no Pareto k values to draw")
    with style():
        fig = new_figure(7.5, 2.6)
        ax = fig.add_subplot(1, 1, 1)
        bad = k > threshold
        idx = np.arange(k.size)
        ax.plot(idx[~bad], k[~bad], "o", color=MAIN, markersize=3.5, label="k")
        if bad.any():
            ax.plot(idx[bad], k[bad], "X", color=DEATH, markersize=6, label=f"k > {threshold:g}")
        ax.axhline(threshold, color=DEATH, linestyle="--", linewidth=0.9, label=f"limit {threshold:g}")
        ax.set_xlabel("observation (transition between consecutive surveys)")
        ax.set_ylabel("Pareto k")
        ax.set_title("PSIS-LOO reliability per observation")
        ax.set_ylim(min(-0.1, float(np.nanmin(k)) - 0.05), max(1.0, float(np.nanmax(k)) + 0.1))
        ax.legend(loc="upper right")
        return fig
