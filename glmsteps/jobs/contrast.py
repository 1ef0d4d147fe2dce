"""Step ``contrast``: t or F contrast maps of one run from its stored fit.

inputs
    ``fit``: the run's ``fit.h5``.
params
    ``name`` (contrast name), ``definition`` (the config spec, see
    :mod:`glmsteps.contrasts`), ``tail`` (t contrasts; when not given, the
    definition's tail), ``skip_nonestimable`` (bool):
    :class:`glmsteps.settings.ContrastSettings`.
wildcards
    ``subject``, ``run_id``, ``contrast``.
outputs
    t contrast: ``effect``, ``variance``, ``t``, ``z``, ``p``; F contrast:
    ``f``, ``z``, ``p`` (float32 NIfTI, NaN outside the fitted voxels).

Each map's sidecar holds the provenance record plus ``map`` (level run),
``kind``, ``tail``, ``dof`` (median residual dof), ``dof1`` (F), ``estimable``,
``efficiency``, ``weights`` (the contrast matrix with the design column names)
and, when applicable, ``skipped``/``excluded`` with ``reason``.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from .. import provenance
from ..bids import parse_run_id
from ..contrasts import MAP_KEYS, evaluate_contrast, contrast_matrix, parse_spec
from ..errors import ConfigError, ContrastError
from ..maps import map_block, map_description, save_map, statistic_intent
from ..settings import ContrastSettings

STEP = "contrast"


def check_output_keys(kind: str, outputs: Mapping[str, str], name: str) -> None:
    """Raise ConfigError unless the rule's outputs are exactly the maps of this contrast kind."""
    expected = set(MAP_KEYS[kind])
    if set(outputs) != expected:
        raise ConfigError(f"contrast {name!r}: a {kind} contrast writes outputs {sorted(expected)}, "
                          f"the rule declares {sorted(outputs)}; fix the rule's outputs for this contrast kind")


def contrast_of_fit(fit: Any, spec: Any, skip: bool, run_label: str, fit_path: str
                    ) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """One run's contrast maps (per fitted voxel) and the sidecar fields that describe them.

    Parameters
    ----------
    fit : StoredFit
        The run's stored fit.
    spec : ContrastSpec
        The parsed contrast.
    skip : bool
        When the contrast is not estimable: return all-NaN maps marked ``skipped``
        instead of raising.
    run_label, fit_path : str
        For messages.

    Returns
    -------
    maps : dict of stat -> ndarray (v,)
    extra : dict
        ``kind``, ``tail``, ``excluded``, ``estimable``, ``efficiency``, ``dof``
        (median residual dof), ``weights``, and ``skipped``/``reason`` when applicable.

    Raises
    ------
    ContrastError
        Not estimable and ``skip`` is false.
    """
    n_vox = len(fit.voxel_index)
    extra: dict[str, Any] = {"kind": spec.kind, "tail": spec.tail if spec.kind == "t" else None}
    if fit.excluded:
        extra.update(excluded=True, estimable=None, efficiency=None, dof=None,
                     reason="run excluded upstream (too many censored volumes)")
        try:
            extra["weights"] = _weights(contrast_matrix(spec, list(fit.names), list(fit.conditions),
                                                        list(fit.basis)), list(fit.names))
        except ContrastError:
            extra["weights"] = None
        return {k: np.full(n_vox, np.nan) for k in MAP_KEYS[spec.kind]}, extra
    result = evaluate_contrast(spec, np.asarray(fit.design), list(fit.names), list(fit.conditions),
                               list(fit.basis), fit.beta, fit.residual_variance, fit.bin,
                               fit.bin_covariance, fit.dof)
    if not result.estimable and not skip:
        raise ContrastError(f"contrast {spec.name!r} is not estimable in {run_label} ({fit_path}): "
                            f"{result.reason}; drop it from this run's weights or set skip_nonestimable: true")
    extra.update(estimable=result.estimable, efficiency=result.efficiency, dof=result.dof2,
                 weights=_weights(result.C, fit.names), excluded=False)
    if spec.kind == "F":
        extra["dof1"] = result.dof1
    if not result.estimable:
        extra.update(skipped=True, reason=result.reason)
    return result.maps, extra


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Compute and write one run's contrast maps (see the module docstring)."""
    from glmsteps.fitstore import read_fit

    settings = ContrastSettings.from_params(params)
    name, skip = settings.name, settings.skip_nonestimable
    spec = parse_spec(name, settings.definition, settings.tail)
    check_output_keys(spec.kind, outputs, name)
    key = parse_run_id(str(wildcards["subject"]), str(wildcards["run_id"]))
    fit = read_fit(inputs["fit"])
    with provenance.collect_warnings() as seen:
        maps, extra = contrast_of_fit(fit, spec, skip, f"sub-{key.subject} {key.run_id}", inputs["fit"])
    record = provenance.build_record(STEP, params, {"fit": inputs["fit"]}, warnings_seen=seen)
    for stat in MAP_KEYS[spec.kind]:
        block = map_block("run", key.subject, key.session, key.task, key.run, name, stat)
        provenance.write_sidecar(outputs[stat], record, map=block, **extra)
        save_map(outputs[stat], maps[stat], fit.voxel_index, tuple(fit.shape), fit.affine,
                 intent=statistic_intent(stat, extra.get("dof"), extra.get("dof1")),
                 description=map_description(stat, name, "run"))


def _weights(C: np.ndarray, names: list[str]) -> list[dict[str, float]]:
    """Non-zero weights of each contrast row by column name (for the sidecar)."""
    return [{str(n): float(w) for n, w in zip(names, row) if w != 0} for row in np.atleast_2d(C)]
