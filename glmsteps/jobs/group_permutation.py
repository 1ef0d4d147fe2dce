"""Group permutation step: family-wise error p maps for one group contrast.

Inputs
    Same as ``glmsteps.jobs.group`` (``effect``, ``variance``, ``participants``),
    read and validated by the same helper
    (:func:`glmsteps.jobs.group.load_group_data`).
Params
    The group model keys plus ``contrast`` and ``permutation``:
    ``{"n_permutations": int >= 2, "seed": int, "cluster_forming_z": float`` or
    ``"cluster_forming_p": float`` (one of the two; default z = 3.1),
    ``"tfce": bool, "tfce_step": float (default 0.1, t units), "connectivity": 6 | 18 | 26 (default 26)}``.
Outputs
    ``p_fwe`` (voxelwise max-t FWE p), ``p_fwe_cluster`` (each voxel's
    cluster-extent FWE p; 1 at mask voxels outside every cluster), ``clusters``
    (TSV), ``p_fwe_tfce`` (TFCE FWE p; all NaN with a sidecar note when
    ``tfce`` is false).

The statistic is the OLS t of the contrast whatever the ``estimation``
setting (the sidecar says so when it differs). Sign flipping for
``one_sample`` and ``paired`` (pairs flipped together), Freedman-Lane row
permutation otherwise (see :mod:`glmsteps.permutation`). Only voxels present in
every kept subject are tested; with ``mask_fraction`` < 1 the other mask voxels
are NaN in these maps (warned and counted in the sidecar). The cluster-forming
threshold given as z or p is converted to the t value with the same one-sided
p at the model's dof.
"""

from __future__ import annotations

import logging
import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from .. import permutation as pm
from ..errors import GlmstepsWarning, GroupError
from ..fileio import write_tsv
from ..maps import save_map
from ..provenance import build_record, collect_warnings, write_sidecar
from .group import group_summary, load_group_data, map_block

LOGGER = logging.getLogger("glmsteps")
STEP = "group_permutation"
PERMUTATION_DEFAULTS: dict[str, Any] = {"cluster_forming_z": None, "cluster_forming_p": None, "tfce": False,
                                        "tfce_step": 0.1, "connectivity": 26}
CLUSTER_COLUMNS: tuple[str, ...] = ("cluster", "n_voxels", "mass", "peak_t", "peak_i", "peak_j", "peak_k",
                                    "peak_x_mm", "peak_y_mm", "peak_z_mm", "p_fwe_extent", "p_fwe_mass")


def permutation_settings(params: Mapping[str, Any]) -> dict[str, Any]:
    """Validated ``permutation`` settings with defaults (GroupError on a bad value)."""
    given = params.get("permutation")
    if not isinstance(given, Mapping):
        raise GroupError(f"group_permutation params: permutation is {given!r}; give n_permutations, seed, "
                         "cluster_forming_z or cluster_forming_p, tfce")
    settings = dict(PERMUTATION_DEFAULTS)
    settings.update(given)
    n = settings.get("n_permutations")
    if isinstance(n, bool) or not isinstance(n, int) or n < 2:
        raise GroupError(f"group_permutation params: n_permutations is {n!r}; use an integer >= 2 (e.g. 5000)")
    seed = settings.get("seed")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise GroupError(f"group_permutation params: seed is {seed!r}; use a non-negative integer")
    z, p = settings["cluster_forming_z"], settings["cluster_forming_p"]
    if z is not None and p is not None:
        raise GroupError("group_permutation params: both cluster_forming_z and cluster_forming_p are set; keep one")
    if z is None and p is None:
        settings["cluster_forming_z"] = z = 3.1  # common practice
    if z is not None and (isinstance(z, bool) or not isinstance(z, (int, float)) or not np.isfinite(z)):
        raise GroupError(f"group_permutation params: cluster_forming_z is {z!r}; use a finite number (e.g. 3.1)")
    if p is not None and (isinstance(p, bool) or not isinstance(p, (int, float)) or not 0 < p < 1):
        raise GroupError(f"group_permutation params: cluster_forming_p is {p!r}; use a number in (0, 1)")
    if not isinstance(settings["tfce"], bool):
        raise GroupError(f"group_permutation params: tfce is {settings['tfce']!r}; use true or false")
    step = settings["tfce_step"]
    if isinstance(step, bool) or not isinstance(step, (int, float)) or not step > 0:
        raise GroupError(f"group_permutation params: tfce_step is {step!r}; use a positive number (t units)")
    if settings["connectivity"] not in (6, 18, 26):
        raise GroupError(f"group_permutation params: connectivity is {settings['connectivity']!r}; use 6, 18 or 26")
    return settings


def cluster_threshold_t(settings: Mapping[str, Any], dof: float) -> float:
    """Cluster-forming threshold on t with the one-sided p of the configured z or p."""
    if settings.get("cluster_forming_p") is not None:
        p = float(settings["cluster_forming_p"])
    else:
        p = float(stats.norm.sf(float(settings["cluster_forming_z"])))
    return float(stats.t.isf(p, dof))


def cluster_table(result: pm.PermutationResult, voxel_index: np.ndarray, shape: tuple[int, int, int],
                  affine: np.ndarray) -> tuple[pd.DataFrame, np.ndarray]:
    """Clusters sorted by extent (largest first) and each voxel's new cluster number.

    Returns
    -------
    table : DataFrame with columns :data:`CLUSTER_COLUMNS`
    numbers : ndarray of int, shape (n_voxels,)
        Cluster number in the table's order, 0 outside clusters.
    """
    order = np.argsort(-result.extent, kind="stable")
    renumber = np.zeros(result.extent.size + 1, dtype=np.int64)
    renumber[order + 1] = np.arange(1, order.size + 1)
    rows = []
    for new, old in enumerate(order, start=1):
        members = np.flatnonzero(result.labels == old + 1)
        peak = members[np.nanargmax(result.t[members])]
        ijk = np.array(np.unravel_index(voxel_index[peak], shape), dtype=np.float64)
        xyz = affine[:3, :3] @ ijk + affine[:3, 3]
        rows.append([new, int(result.extent[old]), float(result.mass[old]), float(result.t[peak]),
                     *[int(v) for v in ijk], *[round(float(v), 2) for v in xyz],
                     float(result.p_fwe_extent[old]), float(result.p_fwe_mass[old])])
    return pd.DataFrame(rows, columns=list(CLUSTER_COLUMNS)), renumber[result.labels]


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Permutation FWE inference for one group contrast.

    Sidecars hold the provenance record, the ``map`` block (stat ``p_fwe``,
    ``p_fwe_cluster``, ``p_fwe_tfce``), the ``group`` block shared with the
    group step and a ``permutation`` block: method, n_permutations, seed,
    cluster-forming threshold (z or p and the t used), dof, tfce settings,
    voxels tested and voxels left out for missing subjects.
    """
    missing = [k for k in ("p_fwe", "p_fwe_cluster", "clusters", "p_fwe_tfce") if k not in outputs]
    if missing:
        raise GroupError(f"group_permutation rule: output(s) {missing} are not named; name every output")
    with collect_warnings() as seen:
        settings = permutation_settings(params)
        data = load_group_data(inputs, params, wildcards)
        complete = np.all(np.isfinite(data.Y), axis=0)
        n_left_out = int(np.sum(~complete))
        if n_left_out:
            warnings.warn(f"group_permutation: {n_left_out} mask voxels lack some subjects and are not tested "
                          "(NaN in the FWE maps)", GlmstepsWarning, stacklevel=2)
        if not np.any(complete):
            raise GroupError("group_permutation: no mask voxel is present in every kept subject; nothing to test")
        if data.settings["estimation"] != "ols":
            warnings.warn(f"group_permutation: estimation {data.settings['estimation']} is not used; the "
                          "permutation statistic is the OLS t", GlmstepsWarning, stacklevel=2)
        design_kind = data.settings["design"]
        method: pm.Method = "sign_flip" if design_kind in ("one_sample", "paired") else "permute"
        dof = float(data.design.matrix.shape[0] - np.linalg.matrix_rank(data.design.matrix))
        threshold = cluster_threshold_t(settings, dof)
        voxel_index = data.voxel_index[complete]
        LOGGER.info("group_permutation: %s, %d permutations, %d voxels, %d subjects", method,
                    settings["n_permutations"], voxel_index.size, len(data.subjects))
        result = pm.run_permutation_test(
            data.design.matrix, data.Y[:, complete], data.c, voxel_index, data.shape, method,
            settings["n_permutations"], settings["seed"], threshold,
            blocks=data.design.blocks, tfce=settings["tfce"], tfce_step=float(settings["tfce_step"]),
            connectivity=settings["connectivity"], progress=pm.log_progress)
        table, numbers = cluster_table(result, voxel_index, data.shape, data.affine)
    record = build_record(STEP, params, {k: inputs[k] for k in ("effect", "variance", "participants")},
                          warnings_seen=seen)
    summary = group_summary(data, wildcards)
    perm_block = {
        "method": method, "inference": "one-sided, positive t; FWE from the permutation maximum (Nichols & "
        "Holmes 2002); Freedman-Lane for nuisance columns (Winkler et al. 2014)",
        "statistic": "OLS t", "n_permutations": settings["n_permutations"], "seed": settings["seed"],
        "cluster_forming_z": settings["cluster_forming_z"], "cluster_forming_p": settings["cluster_forming_p"],
        "cluster_forming_t": threshold, "dof": dof, "connectivity": settings["connectivity"],
        "cluster_mass": "sum of t over the cluster's voxels",
        "tfce": settings["tfce"], "tfce_step": float(settings["tfce_step"]),
        "tfce_extent_power": pm.TFCE_EXTENT_POWER, "tfce_height_power": pm.TFCE_HEIGHT_POWER,
        "voxels_tested": int(voxel_index.size), "voxels_not_tested": n_left_out, "n_clusters": int(len(table)),
    }
    # p_fwe_cluster: extent FWE p of each voxel's cluster, 1 at tested voxels outside clusters
    cluster_p = np.ones(voxel_index.size)
    in_cluster = numbers > 0
    cluster_p[in_cluster] = table["p_fwe_extent"].to_numpy()[numbers[in_cluster] - 1]
    tfce_p = result.p_fwe_tfce if result.p_fwe_tfce is not None else np.full(voxel_index.size, np.nan)
    tfce_note = None if settings["tfce"] else "tfce is false: this map is all NaN"

    write_sidecar(outputs["clusters"], record, group=summary, permutation=perm_block,
                  map=map_block(data, wildcards, "clusters"))
    write_tsv(outputs["clusters"], table)
    maps = {"p_fwe": (result.p_fwe, None), "p_fwe_cluster": (cluster_p, None), "p_fwe_tfce": (tfce_p, tfce_note)}
    for stat, (values, note) in maps.items():
        extra = {"note": note} if note else {}
        write_sidecar(outputs[stat], record, map=map_block(data, wildcards, stat), group=summary,
                      permutation=perm_block, **extra)
        save_map(outputs[stat], values, voxel_index, data.shape, data.affine)
