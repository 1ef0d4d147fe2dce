"""The shared look of glmsteps figures.

A quiet, print-friendly style: white background, slate text, a warm
diverging palette for signed statistics and a single-hue ramp for magnitudes.
Every figure function calls :func:`new_figure` and :func:`save_figure`.
"""

from __future__ import annotations

import os
from typing import Any

import matplotlib
from matplotlib.colors import LinearSegmentedColormap
from matplotlib.figure import Figure

from ..fileio import atomic_path

# Figures are built with the object API (matplotlib.figure.Figure), never pyplot: no GUI
# backend, no global figure registry, and about half the import time in every job.

#: Text and axis colour.
INK = "#2b3440"
#: Colours of the design-column roles.
ROLE_COLOURS: dict[str, str] = {
    "interest": "#c8553d", "modulator": "#f28f3b", "drift": "#588b8b",
    "confound": "#6d6a75", "spike": "#b8b8d1", "intercept": "#2b3440",
}
#: Signed statistics: teal (negative) - paper white - ember (positive).
SIGNED_CMAP = LinearSegmentedColormap.from_list("glmsteps_signed", ["#1d5c63", "#9cc5c0", "#f6f4ee", "#f2b880", "#b23a1e"])
#: Magnitudes (positive only): paper white to ember.
MAGNITUDE_CMAP = LinearSegmentedColormap.from_list("glmsteps_magnitude", ["#fff6e5", "#f2b880", "#d9633a", "#7a1f0f"])

_RC: dict[str, Any] = {
    "figure.facecolor": "white", "axes.facecolor": "white", "axes.edgecolor": INK,
    "axes.labelcolor": INK, "xtick.color": INK, "ytick.color": INK, "text.color": INK,
    "font.size": 8, "axes.titlesize": 9, "axes.titleweight": "bold",
    "axes.spines.top": False, "axes.spines.right": False,
}


def new_figure(width_in: float, height_in: float, **subplots_kw: Any) -> tuple[Any, Any]:
    """A figure and axes in the house style (size in inches)."""
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(width_in, height_in))
        axes = fig.subplots(**subplots_kw)
    for ax in getattr(axes, "flat", [axes]):
        for key in ("axes.facecolor",):
            ax.set_facecolor(_RC[key])
    return fig, axes


def save_figure(fig: Any, path: str | os.PathLike[str], dpi: int = 110) -> None:
    """Save a figure as PNG atomically and close it."""
    with matplotlib.rc_context(_RC), atomic_path(path) as tmp:
        fig.savefig(tmp, dpi=dpi, format="png", bbox_inches="tight")
