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


#: Room (inches) added on every side before drawing, for text placed outside the figure (titles above
#: it, legends right of their axes); cropped off again with the blank border.
_ROOM_IN = 2.0
#: Blank border (inches) kept around the drawn content, as ``savefig(pad_inches=0.1)`` keeps.
_PAD_IN = 0.1


def save_figure(fig: Any, path: str | os.PathLike[str], dpi: int = 110) -> None:
    """Save a figure as PNG atomically, cropped to its content (plus 0.1 in).

    The look of ``savefig(bbox_inches="tight")`` at about half its cost: the figure is drawn
    once, on a canvas grown by :data:`_ROOM_IN` on every side (axes and figure texts keep
    their place in inches), and the blank border is cut from the pixels. matplotlib's
    ``"tight"`` draws the figure twice (once to measure every artist, once to render).
    """
    import numpy as np
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    with matplotlib.rc_context(_RC):
        _grow_canvas(fig, _ROOM_IN)
        fig.set_dpi(dpi)
        canvas = FigureCanvasAgg(fig)
        canvas.draw()
        pixels = np.asarray(canvas.buffer_rgba())
        packed = pixels.view(np.uint32)[:, :, 0]  # one 32-bit word a pixel: one comparison each
        content = packed != packed[0, 0]
        rows, cols = np.flatnonzero(content.any(axis=1)), np.flatnonzero(content.any(axis=0))
        pad = int(round(_PAD_IN * dpi))
        if rows.size:
            top, bottom = max(rows[0] - pad, 0), min(rows[-1] + 1 + pad, pixels.shape[0])
            left, right = max(cols[0] - pad, 0), min(cols[-1] + 1 + pad, pixels.shape[1])
            pixels = pixels[top:bottom, left:right]
        image = Image.fromarray(np.ascontiguousarray(pixels), mode="RGBA")
    with atomic_path(path) as tmp:
        image.save(tmp, format="png", dpi=(dpi, dpi))


def _grow_canvas(fig: Any, room_in: float) -> None:
    """Add ``room_in`` inches on every side of ``fig``, keeping axes and figure texts where they are in inches."""
    width, height = fig.get_size_inches()
    new_width, new_height = width + 2 * room_in, height + 2 * room_in

    def moved(x: float, y: float) -> tuple[float, float]:
        return (room_in + x * width) / new_width, (room_in + y * height) / new_height

    for ax in fig.axes:
        box = ax.get_position(original=True)
        x0, y0 = moved(box.x0, box.y0)
        ax.set_position([x0, y0, box.width * width / new_width, box.height * height / new_height], which="both")
    texts = {id(t): t for t in [*fig.texts, getattr(fig, "_suptitle", None), getattr(fig, "_supxlabel", None),
                                 getattr(fig, "_supylabel", None)] if t is not None}
    for text in texts.values():  # the suptitle is one of fig.texts too: move each once
        if text.get_transform() == fig.transFigure:
            text.set_position(moved(*text.get_position()))
    fig.set_size_inches(new_width, new_height)
