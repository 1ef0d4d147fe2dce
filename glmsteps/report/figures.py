"""The study page's QC figures (matplotlib object API, house style).

Each function takes plain sequences (one entry per run) and writes a PNG; the
report caches the file by the numbers it shows.
"""

from __future__ import annotations

import os
from collections.abc import Sequence

import numpy as np

from ..plots.style import INK, ROLE_COLOURS, new_figure, save_figure

#: Colour of a run's dot, of a flagged run and of the site median line.
DOT_COLOUR = ROLE_COLOURS["drift"]
FLAG_COLOUR = "#b23a1e"
MEDIAN_COLOUR = INK


def _jitter(n: int, width: float = 0.28) -> np.ndarray:
    """Fixed, evenly spread horizontal offsets (no randomness: figures are reproducible)."""
    if n <= 1:
        return np.zeros(n)
    return np.linspace(-width, width, n)


def plot_qc_strips(path: str | os.PathLike[str], sites: Sequence[str], labels: Sequence[str],
                   measures: Sequence[tuple[str, Sequence[float], Sequence[bool]]]) -> None:
    """One panel per QC measure: each run a dot, grouped by site; flagged runs in ember and named.

    Parameters
    ----------
    path : path-like
        PNG destination.
    sites : sequence of str, length n_runs
    labels : sequence of str, length n_runs
        Run labels shown beside flagged dots.
    measures : sequence of (title, values, flags)
        ``values`` and ``flags`` of length n_runs (NaN values are left out).
    """
    order = sorted(dict.fromkeys(str(s) for s in sites))
    n_panels = max(len(measures), 1)
    ncols = min(n_panels, 3)
    nrows = -(-n_panels // ncols)
    width = max(2.4, 0.55 * len(order) + 1.4)
    fig, axes = new_figure(width * ncols, 2.5 * nrows, nrows=nrows, ncols=ncols, squeeze=False,
                           gridspec_kw={"hspace": 0.55, "wspace": 0.35})
    site_arr = np.asarray([str(s) for s in sites], dtype=object)
    for ax, (title, values, flags) in zip(axes.flat, measures):
        v = np.asarray(values, dtype=np.float64)
        f = np.asarray(flags, dtype=bool)
        for k, site in enumerate(order):
            idx = np.flatnonzero((site_arr == site) & np.isfinite(v))
            if not idx.size:
                continue
            x = k + _jitter(idx.size)
            ax.scatter(x, v[idx], s=10, color=np.where(f[idx], FLAG_COLOUR, DOT_COLOUR).tolist(), linewidths=0,
                       zorder=3)
            med = float(np.median(v[idx]))
            ax.plot([k - 0.38, k + 0.38], [med, med], color=MEDIAN_COLOUR, lw=1.0, zorder=2)
            for j, xx in zip(idx, x):
                if f[j]:
                    ax.annotate(str(labels[j]), (xx, v[j]), xytext=(3, 2), textcoords="offset points",
                                fontsize=5.5, color=FLAG_COLOUR)
        ax.set_xticks(range(len(order)))
        ax.set_xticklabels(order, fontsize=7)
        ax.set_xlim(-0.6, len(order) - 0.4)
        ax.set_title(title, fontsize=8, fontweight="bold", color=INK)
        ax.tick_params(axis="y", labelsize=6.5)
    for ax in list(axes.flat)[len(measures):]:
        ax.set_visible(False)
    save_figure(fig, path)


def plot_ar_distribution(path: str | os.PathLike[str], labels: Sequence[str], sites: Sequence[str],
                         quantiles: Sequence[Sequence[float]], flags: Sequence[bool]) -> None:
    """Each run's lag-1 AR coefficient distribution: 5-95 % whisker, 25-75 % bar, median tick.

    Parameters
    ----------
    path : path-like
    labels, sites : sequence of str, length n_runs
        Runs in the order drawn (sorted by site by the caller).
    quantiles : sequence of 5 floats per run
        5, 25, 50, 75 and 95 % quantiles.
    flags : sequence of bool
        Runs whose median is flagged.
    """
    q = np.asarray(quantiles, dtype=np.float64).reshape(len(labels), 5)
    n = len(labels)
    fig, ax = new_figure(min(max(4.0, 0.16 * n + 1.5), 16.0), 2.6)
    x = np.arange(n)
    colours = [FLAG_COLOUR if f else DOT_COLOUR for f in flags]
    ax.vlines(x, q[:, 0], q[:, 4], color=colours, lw=0.8)
    ax.vlines(x, q[:, 1], q[:, 3], color=colours, lw=3.2)
    ax.scatter(x, q[:, 2], s=16, color=INK, linewidths=1.0, zorder=3, marker="_")
    ax.axhline(0.0, color=INK, lw=0.5, alpha=0.5)
    boundaries = [i for i in range(1, n) if sites[i] != sites[i - 1]]
    for b in boundaries:
        ax.axvline(b - 0.5, color=INK, lw=0.5, ls=":")
    starts = [0] + boundaries
    ends = boundaries + [n]
    for s, e in zip(starts, ends):
        ax.text((s + e - 1) / 2, 1.02, str(sites[s]), transform=ax.get_xaxis_transform(), ha="center",
                va="bottom", fontsize=7, color=INK)
    ax.set_xticks(x)
    ax.set_xticklabels(list(labels), rotation=90, fontsize=max(3.5, min(6.0, 300 / max(n, 1))))
    ax.set_xlim(-0.7, n - 0.3)
    ax.set_ylabel("lag-1 AR coefficient")
    save_figure(fig, path)


def plot_efficiency(path: str | os.PathLike[str], contrasts: Sequence[str], sites: Sequence[str],
                    labels: Sequence[str], values: Sequence[Sequence[float]],
                    flags: Sequence[Sequence[bool]]) -> None:
    """Design efficiency of each contrast in each run (log scale), runs grouped by site within a contrast.

    Parameters
    ----------
    path : path-like
    contrasts : sequence of str, length n_contrasts
    sites, labels : sequence of str, length n_runs
    values, flags : n_contrasts sequences of n_runs values / flags
    """
    order = sorted(dict.fromkeys(str(s) for s in sites))
    site_arr = np.asarray([str(s) for s in sites], dtype=object)
    fig, ax = new_figure(min(max(3.5, 1.1 * len(contrasts) + 1.5), 16.0), 2.8)
    markers = ["o", "s", "^", "D", "v", "P", "X"]
    for c, (vals, flg) in enumerate(zip(values, flags)):
        v = np.asarray(vals, dtype=np.float64)
        f = np.asarray(flg, dtype=bool)
        for k, site in enumerate(order):
            idx = np.flatnonzero((site_arr == site) & np.isfinite(v) & (v > 0))
            if not idx.size:
                continue
            offset = (k - (len(order) - 1) / 2) * 0.22
            x = c + offset + _jitter(idx.size, 0.08)
            ax.scatter(x, v[idx], s=9, marker=markers[k % len(markers)], linewidths=0,
                       color=np.where(f[idx], FLAG_COLOUR, DOT_COLOUR).tolist(), zorder=3,
                       label=site if c == 0 else None)
            for j, xx in zip(idx, x):
                if f[j]:
                    ax.annotate(str(labels[j]), (xx, v[j]), xytext=(3, 2), textcoords="offset points",
                                fontsize=5.5, color=FLAG_COLOUR)
    ax.set_yscale("log")
    ax.set_xticks(range(len(contrasts)))
    ax.set_xticklabels(list(contrasts), rotation=20, ha="right", fontsize=7)
    ax.set_xlim(-0.6, len(contrasts) - 0.4)
    ax.set_ylabel("efficiency 1 / trace(C (X'X)+ C')")
    if order:
        ax.legend(title="site", fontsize=6, title_fontsize=6, frameon=False, loc="upper left",
                  bbox_to_anchor=(1.0, 1.0))
    save_figure(fig, path)
