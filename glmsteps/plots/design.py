"""Figures of a design: the matrix (columns coloured by role) and its correlations."""

from __future__ import annotations

import os
from collections.abc import Sequence

import numpy as np
import numpy.typing as npt
from matplotlib.patches import Patch, Rectangle

from .style import INK, ROLE_COLOURS, SIGNED_CMAP, new_figure, save_figure


def scale_for_display(X: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Each column divided by its largest absolute value (all-zero columns stay 0).

    Parameters
    ----------
    X : array_like, shape (n_scans, n_regressors)

    Returns
    -------
    ndarray, shape (n_scans, n_regressors), float64, values in [-1, 1]
    """
    X = np.asarray(X, dtype=np.float64)
    peak = np.abs(X).max(axis=0) if X.size else np.zeros(X.shape[1])
    return X / np.where(peak > 0, peak, 1.0)


def draw_design_matrix(X: npt.ArrayLike, names: Sequence[str], roles: Sequence[str],
                       path: str | os.PathLike[str], *, title: str = "design matrix",
                       first_volume: int = 0) -> None:
    """Save the design matrix as a PNG, one labelled column per regressor.

    Parameters
    ----------
    X : array_like, shape (n_scans, n_regressors)
        Design (each column is scaled to [-1, 1] for display).
    names, roles : sequence of str, length n_regressors
        Column labels and roles; a band above each column shows its role
        colour (``ROLE_COLOURS``), columns of one role sit together.
    path : path-like
        PNG destination (written atomically).
    title : str
        Axes title.
    first_volume : int
        Index of the first row's volume in the acquired series (y labels).
    """
    shown = scale_for_display(X)
    n_scans, p = shown.shape
    width = min(max(3.0, 0.22 * p + 1.6), 16.0)
    fig, ax = new_figure(width, 5.0)
    ax.imshow(shown, aspect="auto", cmap=SIGNED_CMAP, vmin=-1.0, vmax=1.0, interpolation="nearest",
              extent=(-0.5, p - 0.5, first_volume + n_scans - 0.5, first_volume - 0.5))
    band = max(n_scans * 0.03, 1.0)
    for j, role in enumerate(roles):
        ax.add_patch(Rectangle((j - 0.5, first_volume - 0.5 - band), 1.0, band, color=ROLE_COLOURS.get(role, INK),
                               clip_on=False, linewidth=0))
    ax.set_ylim(first_volume + n_scans - 0.5, first_volume - 0.5 - band)
    ax.set_xticks(range(p))
    ax.set_xticklabels(list(names), rotation=90, fontsize=max(4, min(7, int(300 / max(p, 1)))))
    ax.set_ylabel("volume")
    ax.set_title(title, pad=4)
    present = list(dict.fromkeys(roles))
    ax.legend(handles=[Patch(color=ROLE_COLOURS.get(r, INK), label=r) for r in present], loc="upper left",
              bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=7)
    save_figure(fig, path)


def plot_correlation_matrix(names: Sequence[str], corr: npt.ArrayLike, path: str | os.PathLike[str], *,
                            title: str = "regressor correlations") -> None:
    """Save the regressor correlation matrix as a PNG (signed colour map, -1..1).

    Parameters
    ----------
    names : sequence of str, length n_regressors
    corr : array_like, shape (n_regressors, n_regressors)
        Pearson correlations; NaN (constant columns) is left blank.
    path : path-like
        PNG destination (written atomically).
    title : str
        Axes title.
    """
    values = np.asarray(corr, dtype=np.float64)
    p = values.shape[0]
    side = min(max(3.5, 0.2 * p + 2.0), 14.0)
    fig, ax = new_figure(side + 0.8, side)
    image = ax.imshow(np.ma.masked_invalid(values), cmap=SIGNED_CMAP, vmin=-1.0, vmax=1.0,
                      interpolation="nearest")
    fontsize = max(4, min(7, int(300 / max(p, 1))))
    ax.set_xticks(range(p))
    ax.set_xticklabels(list(names), rotation=90, fontsize=fontsize)
    ax.set_yticks(range(p))
    ax.set_yticklabels(list(names), fontsize=fontsize)
    ax.set_title(title, pad=4)
    bar = fig.colorbar(image, ax=ax, fraction=0.046, pad=0.03)
    bar.set_label("correlation")
    save_figure(fig, path)
