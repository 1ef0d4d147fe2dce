"""Step ``combine_runs``: fixed-effects combination of one subject's runs for one t contrast.

inputs
    ``effect`` (list of effect maps), ``variance`` (list of variance maps),
    one per run of the same contrast, in the same order.
params
    ``name`` (contrast name), ``tail``.
wildcards
    ``subject``, ``contrast``.
outputs
    ``effect``, ``variance``, ``t``, ``z``, ``p`` (float32 NIfTI, NaN where no
    run has data).

Each input effect map's sidecar gives the run's ``dof`` and whether it was
``skipped`` (not estimable) or ``excluded``; those runs are left out. Output
sidecars: record, ``map`` (level subject, run and session empty; task kept
when all runs share it), ``dof`` (sum over the runs used), ``runs_used``,
``runs_left_out`` (with reasons), ``tail``.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from .. import provenance
from ..combine import check_same_grid, fixed_effects
from ..errors import ConfigError, ContrastError, DataError
from ..fileio import read_json, save_nifti
from ..maps import load_map
from ..stats import TAILS
from .contrast import map_block

STEP = "combine_runs"
OUTPUT_KEYS = ("effect", "variance", "t", "z", "p")


def _as_list(value: Any) -> list[str]:
    return [str(value)] if isinstance(value, str) else [str(v) for v in value]


def _run_info(path: str) -> dict[str, Any]:
    """The contrast step's sidecar of one effect map."""
    side = provenance.sidecar_path(path)
    if not side.exists():
        raise DataError(f"{path}: sidecar {side} is missing; rerun the contrast step for this run")
    info = read_json(side)
    if not isinstance(info, dict) or "map" not in info:
        raise DataError(f"{side}: not a contrast map sidecar (no 'map' block); rerun the contrast step")
    return info


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Combine a subject's runs (see the module docstring)."""
    name = str(params.get("name", wildcards.get("contrast", "")))
    tail = params.get("tail", "two-sided") or "two-sided"
    if tail not in TAILS:
        raise ConfigError(f"contrast {name!r}: tail must be one of {list(TAILS)}, found {tail!r}")
    missing = sorted(set(OUTPUT_KEYS) - set(outputs))
    if missing:
        raise ConfigError(f"{STEP}: outputs lack {missing}; declare effect, variance, t, z, p")
    effects, variances = _as_list(inputs["effect"]), _as_list(inputs["variance"])
    if len(effects) != len(variances) or not effects:
        raise ConfigError(f"contrast {name!r}: {len(effects)} effect and {len(variances)} variance inputs; "
                          "give one of each per run, in the same order")
    used, left_out, tasks = [], [], set()
    for eff_path, var_path in zip(effects, variances):
        info = _run_info(eff_path)
        block = info["map"]
        label = "_".join(p for p in (f"ses-{block.get('session')}" if block.get("session") else "",
                                     f"task-{block.get('task')}", f"run-{block.get('run')}") if p)
        if info.get("excluded") or info.get("skipped"):
            left_out.append({"run": label, "reason": info.get("reason", "excluded" if info.get("excluded")
                                                             else "skipped")})
            continue
        dof = info.get("dof")
        if not isinstance(dof, (int, float)) or not dof > 0:
            raise DataError(f"{provenance.sidecar_path(eff_path)}: dof {dof!r} is not a positive number; "
                            "rerun the contrast step")
        used.append((label, eff_path, var_path, float(dof)))
        tasks.add(str(block.get("task", "")))
    if not used:
        raise ContrastError(f"contrast {name!r} for sub-{wildcards.get('subject')}: every run was skipped or "
                            f"excluded ({', '.join(r['run'] + ': ' + r['reason'] for r in left_out)}); "
                            "remove the contrast for this subject or fix its runs")
    shapes, affines, labels, eff_rows, var_rows = [], [], [], [], []
    for label, eff_path, var_path, _ in used:
        for path, rows in ((eff_path, eff_rows), (var_path, var_rows)):
            data, affine = load_map(path)
            shapes.append(data.shape)
            affines.append(affine)
            labels.append(f"{label} ({path})")
            rows.append(data.astype(np.float64).ravel())
    check_same_grid(shapes, affines, labels)
    shape, affine = shapes[0], affines[0]
    with provenance.collect_warnings() as seen:
        result = fixed_effects(np.vstack(eff_rows), np.vstack(var_rows), np.array([u[3] for u in used]), tail)
    record = provenance.build_record(STEP, params, {"effect": effects, "variance": variances}, warnings_seen=seen)
    extra = {"tail": tail, "dof": float(sum(u[3] for u in used)), "runs_used": [u[0] for u in used],
             "runs_left_out": left_out}
    task = tasks.pop() if len(tasks) == 1 else ""
    maps = {"effect": result.effect, "variance": result.variance, "t": result.t, "z": result.z, "p": result.p}
    for stat in OUTPUT_KEYS:
        block = map_block("subject", str(wildcards.get("subject", "")), "", task, "", name, stat)
        provenance.write_sidecar(outputs[stat], record, map=block, **extra)
        save_nifti(outputs[stat], maps[stat].reshape(shape), affine)
