"""Step ``design_contrasts``: estimability and efficiency of every contrast on a run's design.

inputs
    ``design`` (design.tsv, one column per regressor), ``design_summary``
    (design.json with per-column ``names``, ``conditions``, ``basis``).
params
    ``contrasts``: mapping contrast name -> spec (see :mod:`glmsteps.contrasts`).
outputs
    ``report`` (JSON, its own sidecar): ``{"provenance": record, "contrasts":
    {name: {kind, estimable, reason, efficiency, weights}}}``.

Kept apart from the design step so that adding a contrast does not rebuild
the design. A key naming nothing in the design is an error; a non-estimable
contrast is reported (``estimable: false`` with the reason).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from .. import provenance
from ..contrasts import contrast_matrix, efficiency, estimability, parse_spec
from ..errors import ConfigError, DataError
from ..fileio import read_json, read_tsv, write_json

STEP = "design_contrasts"


def _design_metadata(summary: Any, path: str, n_columns: int) -> tuple[list[str], list[str], list[str]]:
    if not isinstance(summary, Mapping) or not all(k in summary for k in ("names", "conditions", "basis")):
        raise DataError(f"{path}: design summary lacks names/conditions/basis; rerun build_design")
    names, conds, basis = (list(map(str, summary[k])) for k in ("names", "conditions", "basis"))
    if not (len(names) == len(conds) == len(basis) == n_columns):
        raise DataError(f"{path}: names/conditions/basis have lengths {len(names)}/{len(conds)}/{len(basis)}, "
                        f"the design has {n_columns} columns; rerun build_design")
    return names, conds, basis


def _finite(value: float) -> float | None:
    return value if np.isfinite(value) else None


def assess_contrasts(X: np.ndarray, names: list[str], conditions: list[str], basis: list[str],
                     contrasts: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """Estimability and efficiency of each contrast on one design (arrays in).

    Parameters
    ----------
    X : ndarray, shape (n_scans, n_regressors)
    names, conditions, basis : list of str, length n_regressors
    contrasts : mapping of name to spec

    Returns
    -------
    dict
        Per contrast: ``kind``, ``estimable``, ``reason``, ``efficiency``
        (:math:`1/\\operatorname{trace}(C (X'X)^+ C')`, None when not
        estimable) and ``weights`` (non-zero weights per row by column).
    """
    report = {}
    for cname, raw in contrasts.items():
        spec = parse_spec(str(cname), raw)
        C = contrast_matrix(spec, names, conditions, basis)
        check = estimability(X, C, names, conditions)
        report[str(cname)] = {
            "kind": spec.kind, "estimable": check.estimable, "reason": check.reason,
            "efficiency": _finite(efficiency(X, C)) if check.estimable else None,
            "weights": [{n: float(w) for n, w in zip(names, row) if w != 0} for row in C],
        }
    return report


def run(inputs: Mapping[str, Any], outputs: Mapping[str, str], params: Mapping[str, Any],
        wildcards: Mapping[str, str], threads: int = 1) -> None:
    """Write the contrast report of one run's design (see the module docstring)."""
    contrasts = params.get("contrasts")
    if not isinstance(contrasts, Mapping):
        raise ConfigError(f"{STEP}: params.contrasts must map contrast names to specs, found {contrasts!r}")
    table = read_tsv(inputs["design"])
    X = table.to_numpy(dtype=np.float64)
    names, conds, basis = _design_metadata(read_json(inputs["design_summary"]), inputs["design_summary"], X.shape[1])
    if list(table.columns) != names:
        raise DataError(f"{inputs['design']}: columns differ from the names in {inputs['design_summary']}; "
                        "rerun build_design")
    with provenance.collect_warnings() as seen:
        report = assess_contrasts(X, names, conds, basis, contrasts)
    record = provenance.build_record(STEP, params, {"design": inputs["design"],
                                                    "design_summary": inputs["design_summary"]},
                                     warnings_seen=seen)
    write_json(outputs["report"], {"provenance": record, "contrasts": report})
