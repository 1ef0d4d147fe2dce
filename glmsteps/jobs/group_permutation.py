"""Group permutation step: family-wise error p maps for one group contrast.

Inputs
    Same as ``glmsteps.jobs.group_model`` (``effect``, ``variance``, ``participants``),
    read and validated by the same library function
    (:func:`glmsteps.groupdata.load_group_data`).
Params
    The group model keys (including ``tail``) plus ``contrast`` and
    ``permutation``: ``{"n_permutations", "seed", "cluster_forming_p", "tfce",
    "tfce_step", "connectivity", "subpeaks", "subpeak_spacing_mm"}``
    (:class:`glmsteps.settings.GroupModelSettings` and
    :class:`glmsteps.settings.PermutationSettings`; keys not given take the
    defaults of config/schema.yaml).
Outputs
    ``p_fwe`` (voxelwise max-statistic FWE p), ``p_fwe_cluster`` (each voxel's
    cluster-extent FWE p; 1 at tested voxels outside every cluster),
    ``clusters`` (TSV in the one cluster-table format of
    :mod:`glmsteps.clusters`, statistic t, plus ``mass``, ``p_fwe_extent``,
    ``p_fwe_mass``), ``p_fwe_tfce`` (TFCE FWE p; all NaN with a sidecar note
    when ``tfce`` is false).

The statistic is the OLS t of the contrast whatever the ``estimation``
setting (the sidecar says so when it differs). Sign flipping for
``one_sample`` and ``paired`` (pairs flipped together), Freedman-Lane row
permutation otherwise (see :mod:`glmsteps.permutation`). The test follows the
model's ``tail``: two-sided takes max |t| and clusters of either sign. The
cluster-forming threshold is the t whose p for that tail is
``cluster_forming_p`` at the model's dof (:func:`glmsteps.stats.t_critical`).
Only voxels present in every kept subject are tested; with ``mask_fraction``
< 1 the other mask voxels are NaN in these maps (warned and counted in the
sidecar).
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np

from .. import permutation as pm
from .. import stats
from ..clusters import round_cluster_table
from ..errors import GlmstepsWarning, GroupError
from ..fileio import write_tsv
from ..groupdata import group_map_block, group_settings, group_summary, load_group_data
from ..maps import map_description, save_map, statistic_intent
from ..provenance import build_record, collect_warnings, write_sidecar

LOGGER = logging.getLogger("glmsteps")
STEP = "group_permutation"


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Permutation FWE inference for one group contrast.

    Sidecars hold the provenance record, the ``map`` block (stat ``p_fwe``,
    ``p_fwe_cluster``, ``p_fwe_tfce``), the ``group`` block shared with the
    group step and a ``permutation`` block: method, tail, n_permutations,
    seed, cluster-forming p and the t used, dof, connectivity, tfce settings,
    voxels tested and voxels left out for missing subjects.
    """
    missing = [k for k in ("p_fwe", "p_fwe_cluster", "clusters", "p_fwe_tfce") if k not in outputs]
    if missing:
        raise GroupError(f"group_permutation rule: output(s) {missing} are not named; name every output")
    with collect_warnings() as seen:
        model = group_settings(params, wildcards)
        if model.permutation is None:
            raise GroupError("group_permutation params: permutation is null; the rule runs this step only for "
                             "models whose permutation is set")
        settings = model.permutation
        data = load_group_data(inputs, model, wildcards)
        complete = np.all(np.isfinite(data.Y), axis=0)
        n_left_out = int(np.sum(~complete))
        if n_left_out:
            warnings.warn(f"group_permutation: {n_left_out} mask voxels lack some subjects and are not tested "
                          "(NaN in the FWE maps)", GlmstepsWarning, stacklevel=2)
        if not np.any(complete):
            raise GroupError("group_permutation: no mask voxel is present in every kept subject; nothing to test")
        if data.settings.estimation != "ols":
            warnings.warn(f"group_permutation: estimation {data.settings.estimation} is not used; the "
                          "permutation statistic is the OLS t", GlmstepsWarning, stacklevel=2)
        tail = data.settings.tail
        method: pm.Method = "sign_flip" if data.settings.design in ("one_sample", "paired") else "permute"
        dof = float(data.design.matrix.shape[0] - np.linalg.matrix_rank(data.design.matrix))
        threshold = float(stats.t_critical(settings.cluster_forming_p, dof, tail))
        voxel_index = data.voxel_index[complete]
        LOGGER.info("group_permutation: %s, %s, %d permutations, %d voxels, %d subjects", method, tail,
                    settings.n_permutations, voxel_index.size, len(data.subjects))
        result = pm.run_permutation_test(
            data.design.matrix, data.Y[:, complete], data.c, voxel_index, data.shape, method,
            settings.n_permutations, settings.seed, threshold,
            blocks=data.design.blocks, tfce=settings.tfce, tfce_step=settings.tfce_step,
            connectivity=settings.connectivity, progress=pm.log_progress, tail=tail)
        table, numbers = pm.observed_cluster_table(result, voxel_index, data.shape, data.affine,
                                                   settings.subpeaks, settings.subpeak_spacing_mm)
    record = build_record(STEP, params, {k: inputs[k] for k in ("effect", "variance", "participants")},
                          warnings_seen=seen)
    summary = group_summary(data, wildcards)
    maximum_of = {"positive": "t", "negative": "-t", "two-sided": "|t|"}[tail]
    perm_block = {
        "method": method, "tail": tail,
        "inference": f"{tail}; FWE from the permutation maximum of {maximum_of} (Nichols & Holmes 2002); "
                     "Freedman-Lane for nuisance columns (Winkler et al. 2014)",
        "statistic": "OLS t", "n_permutations": settings.n_permutations, "seed": settings.seed,
        "cluster_forming_p": settings.cluster_forming_p, "cluster_forming_t": threshold, "dof": dof,
        "connectivity": settings.connectivity,
        "cluster_mass": "sum of the statistic's magnitude over the cluster's voxels",
        "tfce": settings.tfce, "tfce_step": settings.tfce_step,
        "tfce_extent_power": pm.TFCE_EXTENT_POWER, "tfce_height_power": pm.TFCE_HEIGHT_POWER,
        "subpeaks": settings.subpeaks, "subpeak_spacing_mm": settings.subpeak_spacing_mm,
        "voxels_tested": int(voxel_index.size), "voxels_not_tested": n_left_out, "n_clusters": int(len(table)),
    }
    # p_fwe_cluster: extent FWE p of each voxel's cluster, 1 at tested voxels outside clusters
    cluster_p = np.ones(voxel_index.size)
    in_cluster = numbers > 0
    cluster_p[in_cluster] = table["p_fwe_extent"].to_numpy()[numbers[in_cluster] - 1]
    tfce_p = result.p_fwe_tfce if result.p_fwe_tfce is not None else np.full(voxel_index.size, np.nan)
    tfce_note = None if settings.tfce else "tfce is false: this map is all NaN"

    write_sidecar(outputs["clusters"], record, group=summary, permutation=perm_block,
                  map=group_map_block(data, wildcards, "clusters"))
    write_tsv(outputs["clusters"], round_cluster_table(table))
    maps = {"p_fwe": (result.p_fwe, None), "p_fwe_cluster": (cluster_p, None), "p_fwe_tfce": (tfce_p, tfce_note)}
    for stat, (values, note) in maps.items():
        extra = {"note": note} if note else {}
        write_sidecar(outputs[stat], record, map=group_map_block(data, wildcards, stat), group=summary,
                      permutation=perm_block, **extra)
        save_map(outputs[stat], values, voxel_index, data.shape, data.affine, intent=statistic_intent(stat),
                 description=map_description(stat, group_map_block(data, wildcards, stat)["contrast"], "group"))
