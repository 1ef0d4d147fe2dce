"""Per-site quality-control figure of the group level.

One panel per version of the data (as entered, and after empirical-Bayes site
harmonisation when it was applied): each subject's mean effect within the
group mask as a dot, grouped by site, with the site mean and +-1 standard
deviation as a bar.
"""

from __future__ import annotations

import os
from collections.abc import Sequence

import numpy as np
import pandas as pd

from .style import INK, ROLE_COLOURS, new_figure, save_figure

#: Colour of the site summary bars (the design "interest" colour).
SITE_COLOUR = ROLE_COLOURS["interest"]
#: Colour of the subject dots.
SUBJECT_COLOUR = ROLE_COLOURS["drift"]


def plot_site_effects(per_subject: pd.DataFrame, path: str | os.PathLike[str], title: str,
                      value_columns: Sequence[str] = ("mean_effect",),
                      panel_titles: Sequence[str] = ("as entered",)) -> None:
    """Compare subjects' mean effects across sites and save a PNG.

    Parameters
    ----------
    per_subject : DataFrame
        One row per kept subject with a ``site`` column and the ``value_columns``
        (mean effect within the group mask, in the units of the maps).
    path : path-like
        Output PNG (written atomically).
    title : str
        Figure title.
    value_columns : sequence of str
        One panel per column.
    panel_titles : sequence of str
        Title of each panel.
    """
    sites = sorted(per_subject["site"].astype(str).unique().tolist())
    n_panels = len(value_columns)
    fig, axes = new_figure(max(3.0, 1.0 + 0.7 * len(sites)) * n_panels, 3.2, ncols=n_panels, squeeze=False,
                           sharey=True)
    rng = np.random.default_rng(0)  # fixed jitter so reruns give identical figures
    for ax, column, panel in zip(axes[0], value_columns, panel_titles):
        for k, site in enumerate(sites):
            values = per_subject.loc[per_subject["site"].astype(str) == site, column].to_numpy(dtype=float)
            values = values[np.isfinite(values)]
            jitter = rng.uniform(-0.15, 0.15, size=values.size)
            ax.scatter(k + jitter, values, s=12, color=SUBJECT_COLOUR, alpha=0.8, linewidths=0)
            if values.size:
                mean = float(values.mean())
                sd = float(values.std(ddof=1)) if values.size > 1 else 0.0
                ax.errorbar(k + 0.3, mean, yerr=sd, fmt="o", color=SITE_COLOUR, capsize=3, markersize=4)
        ax.axhline(0.0, color=INK, linewidth=0.5, alpha=0.5)
        ax.set_xticks(range(len(sites)))
        ax.set_xticklabels([f"{s}\n(n={int((per_subject['site'].astype(str) == s).sum())})" for s in sites])
        ax.set_xlabel("site")
        ax.set_title(panel, fontsize=9, fontweight="bold", color=INK)
    axes[0][0].set_ylabel("subject mean effect in group mask")
    fig.suptitle(title, fontsize=9, color=INK, y=1.04)
    save_figure(fig, path)
