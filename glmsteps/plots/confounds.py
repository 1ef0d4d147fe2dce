"""Figure of a run's confounds: selected traces, censoring measure and censored volumes."""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from matplotlib.ticker import MaxNLocator

from .style import INK, ROLE_COLOURS, SIGNED_CMAP, new_figure

#: Shading of censored volumes and of dropped initial volumes.
CENSORED_COLOUR = "#b23a1e"
DROPPED_COLOUR = "#b8b8d1"
#: Most traces that get a legend entry.
_MAX_LEGEND = 12


def true_runs(mask: npt.ArrayLike) -> list[tuple[int, int]]:
    """Contiguous runs of True as ``(start, stop)`` volume indices (stop exclusive).

    Examples
    --------
    >>> true_runs([False, True, True, False, True])
    [(1, 3), (4, 5)]
    """
    m = np.concatenate([[False], np.asarray(mask, dtype=bool), [False]])
    edges = np.flatnonzero(np.diff(m.astype(np.int8)))
    return [(int(a), int(b)) for a, b in zip(edges[::2], edges[1::2])]


def trace_colours(n: int) -> list[Any]:
    """``n`` line colours from the signed palette, skipping its pale middle."""
    if n <= 1:
        return [ROLE_COLOURS["confound"]] * n
    positions = np.linspace(0.0, 1.0, n)
    # map [0, 1] onto [0, 0.3] U [0.7, 1] so that no line is drawn in paper white
    positions = np.where(positions < 0.5, positions * 0.6, 0.7 + (positions - 0.5) * 0.6)
    return [SIGNED_CMAP(x) for x in positions]


def _shade(ax: Any, censored: npt.NDArray[np.bool_], n_dropped: int) -> None:
    """Shade dropped volumes and censored volumes (each volume spans [t - 0.5, t + 0.5])."""
    if n_dropped:
        ax.axvspan(-0.5, n_dropped - 0.5, color=DROPPED_COLOUR, alpha=0.5, lw=0)
    for start, stop in true_runs(censored):
        ax.axvspan(start - 0.5, stop - 0.5, color=CENSORED_COLOUR, alpha=0.18, lw=0)


def plot_confounds(traces: pd.DataFrame, *, censored: npt.ArrayLike, n_dropped: int,
                   censor_values: npt.ArrayLike | None = None, censor_name: str = "",
                   censor_threshold: float | None = None, title: str = "") -> Any:
    """Draw confound traces and the censoring measure of one run.

    Parameters
    ----------
    traces : DataFrame, shape (n_volumes, k)
        Selected original confound columns (before expansion).
    censored : array_like of bool, shape (n_volumes,)
        Censored volumes (shaded).
    n_dropped : int
        Initial volumes left out of the model (shaded grey).
    censor_values : array_like, shape (n_volumes,), optional
        Censoring measure (e.g. framewise displacement, mm); drawn in a second
        panel with its threshold line.
    censor_name : str
        Name of the censoring column (axis label).
    censor_threshold : float, optional
        Threshold drawn as a dashed line.
    title : str
        Figure title.

    Returns
    -------
    matplotlib.figure.Figure
        Save it with :func:`glmsteps.plots.style.save_figure`.
    """
    censored = np.asarray(censored, dtype=bool)
    n_volumes = censored.size
    has_censor = censor_values is not None
    n_panels = 2 if has_censor else 1
    fig, axes = new_figure(7.0, 2.0 * n_panels + 0.4, nrows=n_panels, ncols=1, sharex=True, squeeze=False)
    axes = axes[:, 0]
    volumes = np.arange(n_volumes)

    ax = axes[0]
    k = traces.shape[1]
    colours = trace_colours(k)
    for j, name in enumerate(traces.columns):
        ax.plot(volumes, traces[name].to_numpy(dtype=np.float64), lw=0.9, color=colours[j], label=str(name))
    _shade(ax, censored, n_dropped)
    ax.set_ylabel("selected confounds")
    if k == 0:
        ax.text(0.5, 0.5, "no confound columns selected", transform=ax.transAxes, ha="center", va="center",
                color=INK)
    elif k <= _MAX_LEGEND:
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=6)
    if title:
        # the house rc applies while new_figure builds the axes only, so size the title here
        ax.set_title(title, fontsize=9, fontweight="bold", color=INK)

    if has_censor:
        ax = axes[1]
        ax.plot(volumes, np.asarray(censor_values, dtype=np.float64), lw=1.0, color=INK, label=censor_name)
        if censor_threshold is not None:
            ax.axhline(censor_threshold, color=CENSORED_COLOUR, lw=1.0, ls="--",
                       label=f"threshold {censor_threshold:g}")
        _shade(ax, censored, n_dropped)
        ax.set_ylabel(censor_name or "censor measure")
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=6)
    axes[-1].set_xlabel(f"volume (grey: {n_dropped} dropped; red: {int(censored.sum())} censored)")
    axes[-1].xaxis.set_major_locator(MaxNLocator(integer=True))
    axes[-1].set_xlim(-0.5, max(n_volumes - 0.5, 0.5))
    return fig
