"""Step ``combine_runs``: fixed-effects combination of one subject's runs for one contrast.

inputs
    ``fit``: the subject's run fits (``fit.h5``, a list).
params
    ``name``, ``definition``, ``tail``, ``skip_nonestimable`` (as the contrast step).
wildcards
    ``subject``, ``contrast``.
outputs
    t contrast: ``effect``, ``variance``, ``t``, ``z``, ``p``; F contrast:
    ``f``, ``z``, ``p`` (float32 NIfTI, NaN where no run has data).

Each run's contrast is computed from its stored fit (the same functions as the
run-level contrast step), so the subject level needs one job per contrast, not
one per run and contrast: run-level maps are an optional product
(``contrast_options.run_maps``). A t contrast is combined by inverse-variance
weighting (:func:`glmsteps.combine.fixed_effects`), an F contrast by the
fixed-effects Wald F over runs (:func:`glmsteps.combine.fixed_effects_f`).
Runs excluded upstream, or where the contrast is not estimable and
``skip_nonestimable`` is set, are left out. When no run is left the maps are
still written, all NaN, and their sidecars say ``excluded`` (every run excluded)
or ``skipped`` (the contrast estimable in no kept run) with the reason, so a
study of hundreds of subjects never stops for one of them; the group step
leaves such subjects out and says so.

Output sidecars: record, ``map`` (level subject, run and session empty; task
kept when all runs share it), ``kind``, ``dof`` (sum over the runs used; for F
also ``dof1``), ``runs_used``, ``runs_left_out`` (with reasons), ``tail``.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .. import provenance
from ..bids import parse_run_id
from ..combine import check_same_grid, fixed_effects, fixed_effects_f, run_contrast_moments
from ..contrasts import MAP_KEYS, contrast_matrix, parse_spec
from ..errors import ConfigError
from ..fileio import save_nifti
from ..maps import map_block, map_description, statistic_intent, unmask
from ..settings import ContrastSettings
from .contrast import contrast_of_fit

STEP = "combine_runs"


def _as_list(value: Any) -> list[str]:
    return [str(value)] if isinstance(value, str) else [str(v) for v in value]


def _left_out_status(left_out: list[dict[str, str]], n_runs: int) -> dict[str, Any]:
    """Sidecar fields of a subject whose every run was left out: excluded or skipped, and why."""
    reasons = "; ".join(f"{r['run']}: {r['reason']}" for r in left_out)
    if all(r["status"] == "excluded" for r in left_out):
        return {"excluded": True, "reason": f"all {n_runs} run(s) excluded ({reasons})"}
    return {"skipped": True, "reason": f"contrast not estimable in any kept run ({reasons})"}


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Combine a subject's runs (see the module docstring)."""
    from glmsteps.fitstore import read_fit

    settings = ContrastSettings.from_params(params)
    name, skip = settings.name, settings.skip_nonestimable
    spec = parse_spec(name, settings.definition, settings.tail)
    keys = MAP_KEYS[spec.kind]
    missing = sorted(set(keys) - set(outputs))
    if missing:
        raise ConfigError(f"{STEP}: a {spec.kind} contrast writes {list(keys)}; the rule's outputs lack {missing}")
    fits = _as_list(inputs["fit"])
    if not fits:
        raise ConfigError(f"contrast {name!r}: no run fits given for sub-{wildcards.get('subject')}")
    subject = str(wildcards.get("subject", ""))
    used: list[dict[str, Any]] = []
    left_out: list[dict[str, str]] = []
    tasks: set[str] = set()
    shapes, affines, labels = [], [], []
    with provenance.collect_warnings() as seen:
        for path in fits:
            fit = read_fit(path)
            run_id = Path(path).parent.name
            key = parse_run_id(subject, run_id)
            maps, extra = contrast_of_fit(fit, spec, skip, f"sub-{subject} {run_id}", path)
            shapes.append(tuple(fit.shape))
            affines.append(np.asarray(fit.affine))
            labels.append(f"{run_id} ({path})")
            if extra.get("excluded") or extra.get("skipped"):
                left_out.append({"run": run_id, "status": "excluded" if extra.get("excluded") else "skipped",
                                 "reason": extra.get("reason", "")})
                continue
            shape = tuple(fit.shape)
            entry: dict[str, Any] = {"run": run_id, "dof": float(extra["dof"])}
            if spec.kind == "t":
                entry["effect"] = unmask(maps["effect"], fit.voxel_index, shape).ravel()
                entry["variance"] = unmask(maps["variance"], fit.voxel_index, shape).ravel()
            else:
                C = contrast_matrix(spec, list(fit.names), list(fit.conditions), list(fit.basis))
                entry["index"] = np.asarray(fit.voxel_index, dtype=np.int64)
                entry["moments"] = run_contrast_moments(C, fit.beta, fit.residual_variance, fit.bin,
                                                        fit.bin_covariance)
            used.append(entry)
            tasks.add(key.task)
        check_same_grid(shapes, affines, labels)
        n_grid = int(np.prod(shapes[0]))
        status: dict[str, Any] = {}
        if not used:
            status = _left_out_status(left_out, len(fits))
            values = {k: np.full(n_grid, np.nan) for k in keys}
        elif spec.kind == "t":
            result = fixed_effects(np.vstack([u["effect"] for u in used]), np.vstack([u["variance"] for u in used]),
                                   np.array([u["dof"] for u in used]), spec.tail)
            values = {"effect": result.effect, "variance": result.variance, "t": result.t, "z": result.z,
                      "p": result.p}
        else:
            union = np.unique(np.concatenate([u["index"] for u in used]))
            fres = fixed_effects_f([_on_voxels(u["moments"].effect.T, u["index"], union).T for u in used],
                                   [_on_voxels(u["moments"].precision, u["index"], union) for u in used],
                                   [u["dof"] for u in used])
            values = {k: np.full(n_grid, np.nan) for k in keys}
            for k, v in (("f", fres.f), ("z", fres.z), ("p", fres.p)):
                values[k][union] = v
            finite = fres.dof1[np.isfinite(fres.dof1)]
            status["dof1"] = float(finite.max()) if finite.size else None
    record = provenance.build_record(STEP, params, {"fit": fits}, warnings_seen=seen)
    extra_out = {"kind": spec.kind, "tail": spec.tail if spec.kind == "t" else None,
                 "dof": float(sum(u["dof"] for u in used)) if used else None,
                 "runs_used": [u["run"] for u in used],
                 "runs_left_out": [{"run": r["run"], "reason": r["reason"]} for r in left_out], **status}
    task = tasks.pop() if len(tasks) == 1 else ""
    for stat in keys:
        block = map_block("subject", subject, "", task, "", name, stat)
        provenance.write_sidecar(outputs[stat], record, map=block, **extra_out)
        save_nifti(outputs[stat], values[stat].reshape(shapes[0]), affines[0],
                   intent=statistic_intent(stat, extra_out["dof"], extra_out.get("dof1")),
                   description=map_description(stat, name, "subject"))


def _on_voxels(values: np.ndarray, index: np.ndarray, union: np.ndarray) -> np.ndarray:
    """Per-voxel ``values`` (first axis along ``index``) placed on the ``union`` voxels, NaN elsewhere."""
    out = np.full((union.size, *values.shape[1:]), np.nan)
    out[np.searchsorted(union, index)] = values
    return out
