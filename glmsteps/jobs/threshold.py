"""Step ``threshold``: threshold a z map, label clusters, tabulate them and draw slices.

inputs
    ``z``, ``p`` (maps of one contrast test), ``underlay`` (e.g. the run's
    mean image; same grid).
params
    The threshold setting (:class:`glmsteps.settings.ThresholdSettings`), including ``name``.
wildcards
    ``threshold`` (and those of the maps).
outputs
    ``thresholded`` (z where significant, 0 where tested but not significant, NaN outside the map),
    ``mask`` (uint8 0/1), ``clusters`` (TSV, name ending in ``clusters.tsv``;
    header only when nothing survives), ``figure`` (PNG slices through the
    largest cluster's peak).

The p-values tested are those of the setting's tail
(:func:`glmsteps.threshold.p_for_tail`): the p map's own tail and test kind
are read from its sidecar (``tail``, ``kind``). The cluster table is
:func:`glmsteps.clusters.cluster_table` on z, written rounded
(:func:`glmsteps.clusters.round_cluster_table`).

Sidecars: ``thresholded.json`` (map block of the z map with stat
``z_thresholded``), ``mask.json`` (stat ``mask``), ``clusters.json`` and the
figure's sidecar; all carry the record, ``threshold`` (name), ``setting``,
``n_tests``, ``p_cutoff``, ``p_source``, ``n_clusters``, ``n_voxels`` and
``note``.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from .. import provenance
from ..clusters import cluster_table, round_cluster_table
from ..combine import check_same_grid
from ..errors import ConfigError
from ..fileio import read_json, save_nifti, write_tsv
from ..maps import OUTSIDE_VALUE, map_description, statistic_intent
from ..maps import load_map
from ..plots.slices import plot_orthogonal_slices
from ..plots.style import save_figure
from ..settings import ThresholdSettings
from ..threshold import p_for_tail, threshold_map

STEP = "threshold"
OUTPUT_KEYS = ("thresholded", "mask", "clusters", "figure")


def _sidecar(path: str) -> dict[str, Any]:
    """A map's sidecar as a dict (empty when it has none)."""
    side = provenance.sidecar_path(path)
    if side.exists():
        info = read_json(side)
        if isinstance(info, dict):
            return info
    return {}


def _z_block(z_path: str, wildcards: Mapping[str, str]) -> dict[str, str]:
    """The z map's ``map`` block (from its sidecar), or one built from the wildcards."""
    info = _sidecar(z_path)
    if isinstance(info.get("map"), dict):
        return dict(info["map"])
    return {"level": "", "subject": str(wildcards.get("subject", "")), "session": "", "task": "", "run": "",
            "contrast": str(wildcards.get("contrast", "")), "stat": "z"}


def _test_of(p_path: str) -> tuple[str | None, str | None]:
    """Kind (``t``/``F``) and tail of the test behind a p map, from its sidecar (None when unknown)."""
    info = _sidecar(p_path)
    kind = info.get("kind")
    tail = info.get("tail")
    if kind is None and tail is not None:
        kind = "t"                      # t-only steps (combine_runs) record the tail alone
    return (str(kind) if kind else None), (str(tail) if tail else None)


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Threshold one z map (see the module docstring)."""
    setting = ThresholdSettings.from_params(params).threshold_setting(str(wildcards.get("threshold", "threshold")))
    missing = sorted(set(OUTPUT_KEYS) - set(outputs))
    if missing:
        raise ConfigError(f"{STEP}: outputs lack {missing}; declare thresholded, mask, clusters, figure")
    if not str(outputs["clusters"]).endswith("clusters.tsv"):
        raise ConfigError(f"{STEP}: clusters output {outputs['clusters']} must end in clusters.tsv")
    z, affine = load_map(inputs["z"])
    p, p_affine = load_map(inputs["p"])
    under, u_affine = load_map(inputs["underlay"])
    check_same_grid([z.shape, p.shape, under.shape], [affine, p_affine, u_affine],
                    [str(inputs["z"]), str(inputs["p"]), str(inputs["underlay"])])
    kind, map_tail = _test_of(str(inputs["p"]))
    with provenance.collect_warnings() as seen:
        p_test, p_source = p_for_tail(z, p, kind, map_tail, setting.tail)  # type: ignore[arg-type]
        result = threshold_map(z, p_test, setting)
        zooms = np.sqrt((affine[:3, :3] ** 2).sum(axis=0))
        table = cluster_table(z, result.labels, affine, setting.subpeaks, setting.subpeak_spacing_mm)
        # one rule for every float map (glmsteps.maps.OUTSIDE_VALUE): NaN where the map has no value;
        # 0 where it was tested but did not survive
        thresholded = np.where(np.isfinite(z), np.where(result.mask, z.astype(np.float64), 0.0), OUTSIDE_VALUE)
        if len(table):
            centre = table.loc[0, ["peak_i", "peak_j", "peak_k"]].to_numpy(dtype=int)
        else:
            centre = np.array(z.shape) // 2
        block = _z_block(str(inputs["z"]), wildcards)
        parts = [f"sub-{block['subject']}" if block.get("subject") else "",
                 f"contrast {block['contrast']}" if block.get("contrast") else "",
                 f"threshold {setting.name} ({setting.method})",
                 f"{result.n_clusters} cluster(s)" if result.n_clusters else "no voxel survived"]
        title = " | ".join(p for p in parts if p)
        fig = plot_orthogonal_slices(under, thresholded, affine, tuple(int(c) for c in centre), title)
    record = provenance.build_record(STEP, params, {"z": inputs["z"], "p": inputs["p"],
                                                    "underlay": inputs["underlay"]}, warnings_seen=seen)
    extra = {"threshold": setting.name, "setting": dict(params), "n_tests": result.n_tests,
             "p_cutoff": result.p_cutoff, "p_source": p_source, "n_clusters": result.n_clusters, "n_voxels": int(result.mask.sum()),
             "note": result.note, "voxel_size_mm": [float(v) for v in zooms]}
    provenance.write_sidecar(outputs["thresholded"], record, map={**block, "stat": "z_thresholded"}, **extra)
    save_nifti(outputs["thresholded"], thresholded, affine, intent=statistic_intent("z_thresholded"),
               description=map_description("z_thresholded", block.get("contrast"), block.get("level")))
    provenance.write_sidecar(outputs["mask"], record, map={**block, "stat": "mask"}, **extra)
    save_nifti(outputs["mask"], result.mask.astype(np.uint8), affine, dtype=np.uint8)
    provenance.write_sidecar(outputs["clusters"], record, **extra)
    write_tsv(outputs["clusters"], round_cluster_table(table))
    provenance.write_sidecar(outputs["figure"], record, **extra)
    save_figure(fig, outputs["figure"])
