"""A step's settings in plain words, labelled from config/schema.yaml (:func:`describe_params`).

Part of :mod:`glmsteps.audit` (see its docstring).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ..provenance import canonical_json
from ..settings import setting_labels, setting_null_meanings, setting_order


# ----------------------------------------------------------------------------
# Settings in plain words
# ----------------------------------------------------------------------------

def flatten_params(params: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Nested settings as one level of dotted keys (lists stay values).

    Examples
    --------
    >>> flatten_params({"fit": {"autocorrelation": "ar1"}, "tail": "two"})
    {'fit.autocorrelation': 'ar1', 'tail': 'two'}
    """
    flat: dict[str, Any] = {}
    for key, value in params.items():
        dotted = f"{prefix}{key}"
        if isinstance(value, Mapping) and value:
            flat.update(flatten_params(value, dotted + "."))
        else:
            flat[dotted] = value
    return flat


def format_value(value: Any) -> str:
    """A setting's value in plain words: yes/no, none, lists joined by commas.

    Examples
    --------
    >>> format_value(True), format_value(None), format_value([1, 2.5]), format_value(128.0)
    ('yes', 'none', '1, 2.5', '128')
    """
    if isinstance(value, bool):
        return "yes" if value else "no"
    if value is None:
        return "none"
    if isinstance(value, float):
        return format(value, ".10g")
    if isinstance(value, (list, tuple)):
        return ", ".join(format_value(v) for v in value) if value else "none"
    if isinstance(value, Mapping):
        return canonical_json(value) if value else "none"
    return str(value)


def setting_label(key: str) -> tuple[str, str]:
    """Plain-word label and unit of a (dotted) param key, from config/schema.yaml's ``title`` and ``unit``
    (:func:`glmsteps.settings.setting_labels`).

    A key under a labelled one (a condition of ``modulators``, a column of a contrast's weights) is shown
    as that label with the rest of the key in brackets; another nested key by its section and the label
    of its last part (``fit.autocorrelation``: "fit autocorrelation model"); unknown keys label themselves.

    Examples
    --------
    >>> setting_label("ar_smoothing_fwhm_mm"), setting_label("modulators.go")
    (('smoothing of AR coefficients', 'mm FWHM'), ('parametric modulators (go)', ''))
    """
    labels = setting_labels()
    if key in labels:
        return labels[key]
    parts = key.split(".")
    for n in range(len(parts) - 1, 0, -1):
        head = ".".join(parts[:n])
        if head in labels:
            return f"{labels[head][0]} ({'.'.join(parts[n:])})", ""
    if parts[-1] in labels:
        label, unit = labels[parts[-1]]
        return f"{'.'.join(parts[:-1])} {label}", unit
    return key, ""


def _setting_order(key: str) -> tuple[str, int, str]:
    order = setting_order()
    prefix, _, last = key.rpartition(".")
    return prefix, order.get(key, order.get(last, len(order))), last


def describe_params(params: Mapping[str, Any]) -> list[str]:
    """Each setting as ``"label: value unit"``.

    Known settings come first, in the order of the steps' settings classes
    (:data:`glmsteps.settings.SETTINGS_CLASSES`), then the others by key;
    nested settings are grouped by section.

    Examples
    --------
    >>> describe_params({"ar_smoothing_fwhm_mm": 0, "autocorrelation": "ar1"})
    ['autocorrelation model: ar1', 'smoothing of AR coefficients: 0 mm FWHM']
    """
    out = []
    meanings = setting_null_meanings()
    for key, value in sorted(flatten_params(params).items(), key=lambda kv: _setting_order(kv[0])):
        label, unit = setting_label(key)
        if value is None and key in meanings:
            out.append(f"{label}: {meanings[key]}")
            continue
        text = format_value(value)
        out.append(f"{label}: {text} {unit}" if unit and text != "none" else f"{label}: {text}")
    return out
