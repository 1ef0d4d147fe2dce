"""Group step: one group contrast of one first-level contrast over subjects.

Inputs
    ``effect`` (list of NIfTI), ``variance`` (list of NIfTI): each subject's
    combined first-level effect and variance map; the JSON sidecar of each
    (``<stem>.json``) gives the subject in its ``map`` block, and marks maps
    the subject level excluded or skipped.
    ``participants``: BIDS participants.tsv (``participant_id`` = ``sub-XX``).
Params
    ``design``, ``group_column``, ``pair_column``, ``covariates``,
    ``site_column``, ``site_as_covariate``, ``estimation``, ``harmonise_sites``,
    ``mask_fraction``, ``tail``, ``contrast`` (``{"name": str, "weights":
    {column: weight}}``): :class:`glmsteps.settings.GroupModelSettings`.
Wildcards
    ``model``, ``contrast`` (first level), ``group_contrast``.
Outputs
    ``effect``, ``variance``, ``t``, ``z``, ``p`` (NIfTI), ``site_qc`` (JSON),
    ``site_figure`` (PNG).

Reading, validation, exclusions, the group mask and site harmonisation are
:func:`glmsteps.groupdata.load_group_data` (shared with the permutation step);
the fit is :func:`glmsteps.groupdata.fit_group_chunks`. ``p`` is the p-value
for the model's ``tail`` (two-sided by default) and ``z`` the signed z with the
same one-sided tail probability as t, both from :mod:`glmsteps.stats` in log
space. Everything is validated before anything is written.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import pandas as pd

from ..errors import GroupError
from ..fileio import write_json
from ..groupdata import (fit_group_chunks, fit_summary, group_map_block, group_pz, group_summary,
                         load_group_data)
from ..maps import map_description, save_map, statistic_intent
from ..plots.sites import plot_site_effects
from ..provenance import build_record, collect_warnings, write_sidecar

STEP = "group_model"
OUTPUT_KEYS = ("effect", "variance", "t", "z", "p", "site_qc", "site_figure")


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Fit one group contrast and write its effect, variance, t, z, p maps and site QC.

    Sidecars hold the provenance record, the ``map`` block, the ``group``
    block (:func:`glmsteps.groupdata.group_summary`: subjects, exclusions with
    reasons, design columns, contrast weights, estimation, tail,
    harmonisation), ``kind`` (t), ``tail`` and the fit summary
    (:func:`glmsteps.groupdata.fit_summary`: dof range, inference, median
    between-subject variance and REML convergence for mixed models).
    ``site_qc.json`` adds a ``summary`` of kept and excluded subjects.
    """
    missing = [k for k in OUTPUT_KEYS if k not in outputs]
    if missing:
        raise GroupError(f"group rule: output(s) {missing} are not named; name every group output")
    with collect_warnings() as seen:
        data = load_group_data(inputs, params, wildcards)
        fit = fit_group_chunks(data)
        p, z = group_pz(fit, data.settings.tail)
    record = build_record(STEP, params, {k: inputs[k] for k in ("effect", "variance", "participants")},
                          warnings_seen=seen)
    summary = {**group_summary(data, wildcards), **fit_summary(data, fit)}
    subjects_summary = {"n_subjects_kept": len(data.subjects), "n_subjects_excluded": len(data.excluded),
                        "excluded_subjects": data.excluded}
    write_json(outputs["site_qc"], {"provenance": record, "group": summary, "summary": subjects_summary,
                                    "sites": data.site_qc})
    # the figure's sidecar is site_qc.json itself (same stem), written above: no second record over it
    per_subject = pd.DataFrame(data.site_qc["subjects"])
    columns = ["mean_effect"] + (["mean_effect_harmonised"] if data.harmonised else [])
    titles = ["as entered"] + (["after site harmonisation"] if data.harmonised else [])
    plot_site_effects(per_subject, outputs["site_figure"],
                      f"{summary['first_level_contrast'] or ''} {data.contrast_name}: subjects by site",
                      value_columns=columns, panel_titles=titles)
    values = {"effect": fit.effect, "variance": fit.variance, "t": fit.t, "z": z, "p": p}
    for stat in ("effect", "variance", "t", "z", "p"):
        write_sidecar(outputs[stat], record, map=group_map_block(data, wildcards, stat), group=summary, kind="t",
                      tail=data.settings.tail)
        save_map(outputs[stat], values[stat], data.voxel_index, data.shape, data.affine,
                 intent=statistic_intent(stat, summary.get("dof_min")),
                 description=map_description(stat, group_map_block(data, wildcards, stat)["contrast"], "group"))
