"""Figure of a run's confounds: traces on their own scales, censoring measure and censored volumes."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd
from matplotlib.ticker import MaxNLocator

from ..confounds import MOTION_UNITS, column_unit
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


def trace_panels(names: Sequence[str]) -> list[tuple[str, list[str]]]:
    """Group confound columns into panels that share a scale.

    Motion columns with a unit suffix (``_mm``, ``_rad``, ``_deg``; see
    :func:`glmsteps.confounds.column_unit`) get one panel per unit, drawn in
    that unit; every other column goes to one panel of z-scored traces.

    Returns
    -------
    list of (label, columns)
        ``label`` is the unit (``mm``, ``rad``, ``deg``) or ``"z"``, in that
        order, panels without columns left out.

    Examples
    --------
    >>> trace_panels(["move_x_mm", "turn_x_rad", "csf", "move_y_mm"])
    [('mm', ['move_x_mm', 'move_y_mm']), ('rad', ['turn_x_rad']), ('z', ['csf'])]
    """
    groups: dict[str, list[str]] = {unit: [] for unit in MOTION_UNITS.values()}
    groups["z"] = []
    for name in names:
        groups[column_unit(str(name)) or "z"].append(str(name))
    return [(label, cols) for label, cols in groups.items() if cols]


def zscore_kept(values: npt.ArrayLike, n_dropped: int) -> npt.NDArray[np.float64]:
    """``(x - mean) / sd`` with the mean and SD (ddof 1) of the kept volumes; 0 where the SD is 0."""
    x = np.asarray(values, dtype=np.float64)
    kept = x[n_dropped:]
    sd = kept.std(ddof=1) if kept.size > 1 else 0.0
    return (x - kept.mean()) / sd if sd > 0 else np.zeros_like(x)


_PANEL_LABELS = {"mm": "motion (mm)", "rad": "motion (rad)", "deg": "motion (deg)", "z": "other signals (z)"}


def plot_confounds(traces: pd.DataFrame, *, censored: npt.ArrayLike, n_dropped: int,
                   censor_values: npt.ArrayLike | None = None, censor_name: str = "",
                   censor_threshold: float | None = None, title: str = "") -> Any:
    """Draw confound traces, each on its own scale, and the censoring measure of one run.

    Parameters
    ----------
    traces : DataFrame, shape (n_volumes, k)
        Selected original confound columns (before expansion). Motion columns
        (unit suffix ``_mm``, ``_rad``, ``_deg``) are drawn in their unit, one
        panel per unit; the other columns are z-scored over the kept volumes
        and drawn together (:func:`trace_panels`).
    censored : array_like of bool, shape (n_volumes,)
        Censored volumes (shaded).
    n_dropped : int
        Initial volumes left out of the model (shaded grey).
    censor_values : array_like, shape (n_volumes,), optional
        Censoring measure (e.g. framewise displacement, mm); drawn in the last
        panel with its threshold line.
    censor_name : str
        Name of the censoring column (axis label).
    censor_threshold : float, optional
        Threshold drawn as a dashed line.
    title : str
        Figure title (e.g. ``sub-04 task-beacon_run-1``).

    Returns
    -------
    matplotlib.figure.Figure
        Save it with :func:`glmsteps.plots.style.save_figure`.
    """
    censored = np.asarray(censored, dtype=bool)
    n_volumes = censored.size
    panels = trace_panels(list(traces.columns))
    has_censor = censor_values is not None
    n_panels = max(len(panels), 1) + (1 if has_censor else 0)
    fig, axes = new_figure(7.0, 1.6 * n_panels + 0.6, nrows=n_panels, ncols=1, sharex=True, squeeze=False)
    axes = axes[:, 0]
    volumes = np.arange(n_volumes)

    if not panels:
        axes[0].text(0.5, 0.5, "no confound columns selected", transform=axes[0].transAxes, ha="center",
                     va="center", color=INK)
        _shade(axes[0], censored, n_dropped)
    for ax, (label, names) in zip(axes, panels):
        colours = trace_colours(len(names))
        for j, name in enumerate(names):
            values = traces[name].to_numpy(dtype=np.float64)
            shown = zscore_kept(values, n_dropped) if label == "z" else values
            ax.plot(volumes, shown, lw=0.9, color=colours[j], label=str(name))
        _shade(ax, censored, n_dropped)
        ax.set_ylabel(_PANEL_LABELS[label])
        if len(names) <= _MAX_LEGEND:
            ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=6)
    if title:
        # the house rc applies while new_figure builds the axes only, so size the title here
        axes[0].set_title(title, fontsize=9, fontweight="bold", color=INK)

    if has_censor:
        ax = axes[-1]
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
