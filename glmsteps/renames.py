"""Renamed configuration values and design column names: old names are errors with a hint.

The response-model keywords and the design columns carry names of glmsteps'
own (``design.hrf``: ``glover_1999``, ``double_gamma_latency``,
``double_gamma_latency_width``; columns ``<condition>__latency``,
``<condition>__width``, ``slow_01``...). An old name is never accepted as an
alias: :func:`check_renamed` stops the workflow before anything runs, in one
line naming the key, the old name and the new one.

Pure module: a configuration mapping in, nothing out (or a ConfigError).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

from .errors import ConfigError

#: ``design.hrf`` values that were renamed: old -> new.
RENAMED_HRF: dict[str, str] = {
    "glover": "glover_1999",
    "double_gamma_derivative": "double_gamma_latency",
    "double_gamma_dispersion": "double_gamma_latency_width",
}
#: Suffixes of a condition's basis columns that were renamed: old -> new.
RENAMED_BASIS_SUFFIXES: dict[str, str] = {"__derivative": "__latency", "__dispersion": "__width"}
#: The old drift column names (``drift_01``, ``drift_02``, ...: always two or more digits).
_OLD_DRIFT = re.compile(r"drift_(\d{2,})")


def renamed_column(key: str) -> str | None:
    """The new name of an old design column name, or None when ``key`` is not an old name.

    Parameters
    ----------
    key : str
        A contrast weight key.

    Returns
    -------
    str or None
        ``A__derivative`` -> ``A__latency``, ``A__dispersion`` -> ``A__width``,
        ``drift_<kk>`` -> ``slow_<kk>``.

    Examples
    --------
    >>> renamed_column("faces__derivative")
    'faces__latency'
    >>> renamed_column("drift_03")
    'slow_03'
    >>> renamed_column("faces") is None
    True
    """
    for old, new in RENAMED_BASIS_SUFFIXES.items():
        if key.endswith(old) and len(key) > len(old):
            return key[: -len(old)] + new
    m = _OLD_DRIFT.fullmatch(key)
    if m:
        return f"slow_{int(m.group(1)):02d}"
    return None


def _weight_rows(spec: Any) -> list[tuple[str, Mapping[str, Any]]]:
    """(where, weights) of every weight mapping of one contrast definition."""
    if not isinstance(spec, Mapping):
        return []
    rows: list[tuple[str, Mapping[str, Any]]] = []
    if isinstance(spec.get("weights"), Mapping):
        rows.append(("weights", spec["weights"]))
    if isinstance(spec.get("rows"), list):
        rows += [(f"rows[{i}]", r) for i, r in enumerate(spec["rows"]) if isinstance(r, Mapping)]
    return rows


def check_renamed(config: Mapping[str, Any]) -> None:
    """Refuse renamed keywords and old column names in a configuration.

    Parameters
    ----------
    config : mapping
        The configuration as read from YAML (before or after schema
        validation; missing sections are fine).

    Raises
    ------
    ConfigError
        ``design.hrf`` holds a renamed keyword, or a contrast weight names an
        old design column (``<condition>__derivative``,
        ``<condition>__dispersion``, ``drift_<kk>``). One line with the key,
        the old and the new name.
    """
    design = config.get("design")
    if isinstance(design, Mapping):
        hrf = design.get("hrf")
        if isinstance(hrf, str) and hrf in RENAMED_HRF:
            raise ConfigError(f"config design.hrf: {hrf!r} was renamed; set design.hrf to {RENAMED_HRF[hrf]!r}")
    contrasts = config.get("contrasts")
    if not isinstance(contrasts, Mapping):
        return
    for name, spec in contrasts.items():
        for where, weights in _weight_rows(spec):
            for key in weights:
                new = renamed_column(str(key))
                if new is not None:
                    raise ConfigError(f"config contrasts.{name}.{where}: key {str(key)!r} is an old design column "
                                      f"name; the column is now called {new!r}; use that key instead")
