"""Step ``combine_runs``: fixed-effects combination of one subject's runs for one t contrast.

inputs
    ``fit``: the subject's run fits (``fit.h5``, a list).
params
    ``name``, ``definition``, ``tail``, ``skip_nonestimable`` (as the contrast step).
wildcards
    ``subject``, ``contrast``.
outputs
    ``effect``, ``variance``, ``t``, ``z``, ``p`` (float32 NIfTI, NaN where no
    run has data).

Each run's contrast effect and variance are computed from its stored fit (the
same function as the run-level contrast step), so the subject level needs one
job per contrast, not one per run and contrast: run-level maps are an optional
product (``contrast_options.run_maps``). Runs excluded upstream, or where the
contrast is not estimable and ``skip_nonestimable`` is set, are left out.
Output sidecars: record, ``map`` (level subject, run and session empty; task
kept when all runs share it), ``dof`` (sum over the runs used), ``runs_used``,
``runs_left_out`` (with reasons), ``tail``.
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .. import provenance
from ..bids import parse_run_id
from ..combine import check_same_grid, fixed_effects
from ..contrasts import parse_spec
from ..errors import ConfigError, ContrastError
from ..fileio import save_nifti
from ..maps import unmask
from .contrast import contrast_of_fit, contrast_settings, map_block

STEP = "combine_runs"
OUTPUT_KEYS = ("effect", "variance", "t", "z", "p")


def _as_list(value: Any) -> list[str]:
    return [str(value)] if isinstance(value, str) else [str(v) for v in value]


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Combine a subject's runs (see the module docstring)."""
    from glmsteps.fitstore import read_fit

    name, definition, tail, skip = contrast_settings(params)
    spec = parse_spec(name, definition, tail)
    if spec.kind != "t":
        raise ConfigError(f"contrast {name!r}: only t contrasts are combined over runs; "
                          "F contrasts stay at run level")
    missing = sorted(set(OUTPUT_KEYS) - set(outputs))
    if missing:
        raise ConfigError(f"{STEP}: outputs lack {missing}; declare effect, variance, t, z, p")
    fits = _as_list(inputs["fit"])
    if not fits:
        raise ConfigError(f"contrast {name!r}: no run fits given for sub-{wildcards.get('subject')}")
    subject = str(wildcards.get("subject", ""))
    used, left_out, tasks = [], [], set()
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
                left_out.append({"run": run_id, "reason": extra.get("reason", "")})
                continue
            used.append((run_id, unmask(maps["effect"], fit.voxel_index, tuple(fit.shape)).ravel(),
                         unmask(maps["variance"], fit.voxel_index, tuple(fit.shape)).ravel(), float(extra["dof"])))
            tasks.add(key.task)
        check_same_grid(shapes, affines, labels)
        if not used:
            raise ContrastError(f"contrast {name!r} for sub-{subject}: every run was skipped or excluded "
                                f"({', '.join(r['run'] + ': ' + r['reason'] for r in left_out)}); "
                                "remove the contrast for this subject or fix its runs")
        result = fixed_effects(np.vstack([u[1] for u in used]).astype(np.float64),
                               np.vstack([u[2] for u in used]).astype(np.float64),
                               np.array([u[3] for u in used]), spec.tail)
    record = provenance.build_record(STEP, params, {"fit": fits}, warnings_seen=seen)
    extra_out = {"tail": spec.tail, "dof": float(sum(u[3] for u in used)), "runs_used": [u[0] for u in used],
                 "runs_left_out": left_out}
    task = tasks.pop() if len(tasks) == 1 else ""
    maps_out = {"effect": result.effect, "variance": result.variance, "t": result.t, "z": result.z, "p": result.p}
    for stat in OUTPUT_KEYS:
        block = map_block("subject", subject, "", task, "", name, stat)
        provenance.write_sidecar(outputs[stat], record, map=block, **extra_out)
        save_nifti(outputs[stat], maps_out[stat].reshape(shapes[0]), affines[0])
