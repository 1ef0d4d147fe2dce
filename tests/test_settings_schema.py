"""The steps' settings classes against config/schema.yaml: one reader per key, same defaults, bounds, labels.

Reference: config/schema.yaml itself (the workflow's contract, validated by Snakemake with jsonschema),
read here with PyYAML, independently of glmsteps.settings' reader where it matters (defaults, enums).
Every check is a function returning the list of mismatches, so that each test can also show that the
check fails on a mutated copy of the schema (a key added on one side only, a default or bound changed).
"""

from __future__ import annotations

import copy
import inspect
import math
import types
import typing
from dataclasses import dataclass, fields
from typing import Any, Literal

import pytest
import yaml

from glmsteps import audit, clusters, design, estimation, events, group, hrf, stats, threshold
from glmsteps import settings as S
from glmsteps.errors import GlmstepsError
from workflow_helpers import REPO

SCHEMA_FILE = REPO / "config" / "schema.yaml"


def real_schema() -> dict[str, Any]:
    return yaml.safe_load(SCHEMA_FILE.read_text())


# --------------------------------------------------------------------------- the checks

def coverage_mismatches(schema: dict[str, Any], classes=S.SETTINGS_CLASSES,
                        workflow_only=S.WORKFLOW_ONLY) -> list[str]:
    """Every schema key is read by exactly one field (``also`` readers aside) or is workflow-only;
    every key a field reads exists."""
    keys = S.schema_keys(schema)
    owners: dict[str, list[str]] = {k: [] for k in keys}
    problems = []
    for info in S.iter_fields(classes):
        where = f"{info.owner.__name__}.{info.name}"
        if not info.keys and not info.label:
            problems.append(f"{where} reads no schema key and has no label")
        for k in info.keys:
            if k not in keys:
                problems.append(f"{where} reads {k}, which the schema lacks")
            elif not info.also:
                owners[k].append(where)
    for k, readers in owners.items():
        if k in workflow_only:
            if readers:
                problems.append(f"{k} is listed as workflow-only but {readers} read it")
        elif len(readers) != 1:
            problems.append(f"{k} is read by {len(readers)} settings fields {readers}; expected exactly one "
                            "(or list it in glmsteps.settings.WORKFLOW_ONLY)")
    problems += [f"workflow-only key {k} is not in the schema" for k in workflow_only if k not in keys]
    return problems


_JSON_TYPES = {bool: {"boolean"}, int: {"integer"}, float: {"number"}, str: {"string"}, list: {"array"},
               dict: {"object"}, type(None): {"null"}}


def _json_types(hint: Any) -> tuple[set[str], set[Any] | None]:
    """JSON types a field's annotation admits, and the values of its Literal (None when not a Literal)."""
    origin = typing.get_origin(hint)
    if origin is Literal:
        values = set(typing.get_args(hint))
        kinds = {"string" if isinstance(v, str) else "integer" for v in values}
        return kinds, values
    if origin in (typing.Union, types.UnionType):
        kinds: set[str] = set()
        values: set[Any] | None = None
        for arg in typing.get_args(hint):
            k, v = _json_types(arg)
            kinds |= k
            values = v if v is not None else values
        return kinds, values
    if isinstance(hint, type) and issubclass(hint, S.StepSettings):
        return {"object"}, None
    return set(_JSON_TYPES.get(origin or hint, {"?"})), None


def field_mismatches(schema: dict[str, Any], classes=S.SETTINGS_CLASSES) -> list[str]:
    """Each field's annotation has its schema key's types and enum; keys read by one field through
    several roots (the three threshold levels) agree in default and bounds."""
    keys = S.schema_keys(schema)
    problems = []
    for cls in _with_nested(classes):
        hints = typing.get_type_hints(cls, vars(S))
        for f in fields(cls):
            full = [k for k in cls.schema_keys_of(f.name) if k in keys]
            if not full:
                continue
            where = f"{cls.__name__}.{f.name}"
            node = keys[full[0]]
            for path in f.metadata["keys"]:
                same = [f"{root}.{path}" if root else path for root in cls.ROOTS]
                for other in same[1:]:
                    a, b = ({k: keys[x].get(k) for k in ("default", "minimum", "maximum", "exclusiveMinimum",
                                                         "exclusiveMaximum", "enum", "type")} for x in (same[0], other))
                    if a != b:
                        problems.append(f"{where}: {same[0]} and {other} differ ({a} vs {b})")
            if f.metadata["parse"] is not None or len(f.metadata["keys"]) > 1:
                continue        # an entry or a whole definition, checked by its own parser
            kinds, values = _json_types(hints[f.name])
            schema_kinds = set(S.node_types(schema, node))
            if f.metadata["unused_as_null"]:
                schema_kinds.add("null")
            if "integer" in kinds and "number" in schema_kinds:
                problems.append(f"{where}: annotated int but {full[0]} is a number")
            if "number" in kinds:
                kinds = kinds - {"number"} | {"number"}
            if kinds != schema_kinds:
                problems.append(f"{where}: annotation {hints[f.name]} admits {sorted(kinds)}, "
                                f"{full[0]} {sorted(schema_kinds)}")
            if values is not None or "enum" in node:
                if values is None or set(node.get("enum", [])) != values:
                    problems.append(f"{where}: Literal {sorted(map(str, values or []))} differs from the enum "
                                    f"{node.get('enum')} of {full[0]}")
    return problems


def _with_nested(classes):
    seen = []
    for info in S.iter_fields(classes):
        if info.owner not in seen:
            seen.append(info.owner)
    return seen


def _signature_default(function, name: str) -> Any:
    return inspect.signature(function).parameters[name].default


#: The library's own copies of schema values (defaults of its functions and dataclasses, its option lists):
#: (schema key, keyword, value in the library, where).
def library_copies() -> list[tuple[str, str, Any, str]]:
    setting = threshold.ThresholdSetting
    copies = [
        ("thresholds.run.*.subpeaks", "default", clusters.DEFAULT_SUBPEAKS, "clusters.DEFAULT_SUBPEAKS"),
        ("thresholds.run.*.subpeak_spacing_mm", "default", clusters.DEFAULT_SUBPEAK_SPACING_MM,
         "clusters.DEFAULT_SUBPEAK_SPACING_MM"),
        ("group_models.*.permutation.subpeaks", "default", clusters.DEFAULT_SUBPEAKS, "clusters.DEFAULT_SUBPEAKS"),
        ("group_models.*.permutation.subpeak_spacing_mm", "default", clusters.DEFAULT_SUBPEAK_SPACING_MM,
         "clusters.DEFAULT_SUBPEAK_SPACING_MM"),
        ("thresholds.run.*.subpeaks", "maximum", threshold.MAX_SUBPEAKS, "threshold.MAX_SUBPEAKS"),
        ("group_models.*.permutation.subpeaks", "maximum", threshold.MAX_SUBPEAKS, "threshold.MAX_SUBPEAKS"),
        ("fit.ar_order", "maximum", estimation.MAX_AR_ORDER, "estimation.MAX_AR_ORDER"),
        ("design.hrf", "enum", list(hrf.HRF_MODELS), "hrf.HRF_MODELS"),
        ("design.drift.basis", "enum", list(design.DRIFT_MODELS), "design.DRIFT_MODELS"),
        ("group_models.*.design", "enum", list(group.DESIGNS), "group.DESIGNS"),
        ("group_models.*.estimation", "enum", list(group.ESTIMATIONS), "group.ESTIMATIONS"),
        ("group_models.*.tail", "enum", list(stats.TAILS), "stats.TAILS"),
        ("thresholds.run.*.connectivity", "enum", sorted(clusters.CONNECTIVITY_RANK), "clusters.CONNECTIVITY_RANK"),
    ]
    for name in ("min_cluster_voxels", "connectivity", "tail", "subpeaks", "subpeak_spacing_mm"):
        value = next(f.default for f in fields(setting) if f.name == name)
        copies.append((f"thresholds.run.*.{name}", "default", value, f"threshold.ThresholdSetting.{name}"))
    for name in ("condition_column", "duplicate_events", "missing_duration"):
        copies.append((f"events.{name}", "default", _signature_default(events.validate_events, name),
                       f"events.validate_events({name}=)"))
    for name, key in (("dt_s", "design.time_resolution_s"), ("cutoff_s", "design.drift.cutoff_s"),
                      ("legendre_order", "design.drift.legendre_order"), ("hrf", "design.hrf"),
                      ("drift_basis", "design.drift.basis")):
        copies.append((key, "default", _signature_default(design.build_design, name), f"design.build_design({name}=)"))
    copies.append(("acquisition.volume_time_fraction", "default",
                   _signature_default(design.frame_times, "volume_time_fraction"), "design.frame_times"))
    return copies


def _same(a: Any, b: Any, keyword: str) -> bool:
    if keyword == "enum":
        return sorted(map(str, a)) == sorted(map(str, b))
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        return math.isclose(a, b)
    return a == b


def library_mismatches(schema: dict[str, Any]) -> list[str]:
    keys = S.schema_keys(schema)
    return [f"{where} is {value!r}, {key} has {keyword} {keys[key].get(keyword)!r}"
            for key, keyword, value, where in library_copies() if not _same(value, keys[key].get(keyword), keyword)]


def label_mismatches(schema: dict[str, Any]) -> list[str]:
    labels = S.setting_labels(schema)
    return [f"param {info.param} ({info.owner.__name__}.{info.name}) has no label: give its schema key a title"
            for info in S.iter_fields() if info.param not in labels]


# --------------------------------------------------------------------------- the tests

def test_every_schema_key_is_read_by_exactly_one_settings_field() -> None:
    assert coverage_mismatches(real_schema()) == []


def test_coverage_check_fails_when_a_key_is_added_to_one_side_only() -> None:
    added = real_schema()
    added["properties"]["fit"]["properties"]["ar_wobble"] = {"type": "number", "default": 1}
    assert any("fit.ar_wobble is read by 0" in p for p in coverage_mismatches(added))
    removed = real_schema()
    del removed["properties"]["fit"]["properties"]["ar_bin_width"]
    assert any("FitSettings.ar_bin_width reads fit.ar_bin_width" in p for p in coverage_mismatches(removed))
    in_permutation = real_schema()
    perm = next(b for b in in_permutation["properties"]["group_models"]["additionalProperties"]["properties"]
                ["permutation"]["oneOf"] if b.get("type") == "object")
    perm["properties"]["blocks"] = {"type": "string", "default": ""}
    assert any("group_models.*.permutation.blocks" in p for p in coverage_mismatches(in_permutation))

    @dataclass(frozen=True)
    class Twice(S.StepSettings):       # a second class reading a key another already reads
        ar_order: int = S.key("fit.ar_order")

    assert any("fit.ar_order is read by 2" in p for p in coverage_mismatches(real_schema(),
                                                                             (*S.SETTINGS_CLASSES, Twice)))


def test_fields_have_the_schema_types_and_enums() -> None:
    assert field_mismatches(real_schema()) == []


def test_field_check_fails_on_a_changed_enum_or_type() -> None:
    schema = real_schema()
    schema["properties"]["fit"]["properties"]["autocorrelation"]["enum"].append("ar2")
    schema["properties"]["report"]["properties"]["min_site_runs"]["type"] = "number"
    problems = field_mismatches(schema)
    assert any("FitSettings.autocorrelation" in p and "enum" in p for p in problems)
    assert any("ReportSettings.min_site_runs" in p for p in problems)
    levels = real_schema()
    levels["properties"]["thresholds"]["properties"]["group"] = {
        "type": "object", "default": {}, "additionalProperties": {
            **copy.deepcopy(levels["definitions"]["threshold_setting"])}}
    levels["properties"]["thresholds"]["properties"]["group"]["additionalProperties"]["properties"]["q"][
        "default"] = 0.1
    assert any("thresholds.run.*.q and thresholds.group.*.q differ" in p for p in field_mismatches(levels))


def test_library_copies_of_schema_values_agree() -> None:
    assert library_mismatches(real_schema()) == []
    schema = real_schema()
    schema["definitions"]["threshold_setting"]["properties"]["subpeaks"]["default"] = 5
    assert any("clusters.DEFAULT_SUBPEAKS" in p for p in library_mismatches(schema))


@pytest.mark.parametrize("level_key, method", [("p", "uncorrected"), ("q", "fdr"), ("alpha", "bonferroni"),
                                               ("forming_p", "cluster_extent")])
def test_threshold_levels_have_the_library_bounds(level_key: str, method: str) -> None:
    # the library's own check (glmsteps.threshold.parse_setting) and the schema reject 1 and 0 alike
    node = S.schema_keys(real_schema())[f"thresholds.run.*.{level_key}"]
    assert (node.get("exclusiveMinimum"), node.get("exclusiveMaximum")) == (0, 1)
    base = {"name": "t", "method": method, **({"min_cluster_voxels": 1} if method == "cluster_extent" else {})}
    threshold.parse_setting({**base, level_key: 0.999})
    for edge in (0, 1):
        with pytest.raises(GlmstepsError):
            threshold.parse_setting({**base, level_key: edge})
        with pytest.raises(GlmstepsError):
            S.ThresholdSettings.from_params({**base, level_key: edge})


def _base(cls: type[S.StepSettings]) -> dict[str, Any]:
    """The least params a class needs (keys without a schema default)."""
    return {S.ContrastSettings: {"name": "c", "definition": {"weights": {"a": 1}}},
            S.ThresholdSettings: {"method": "fdr"},
            S.GroupModelSettings: {"design": "one_sample", "contrast": {"name": "m", "weights": {"mean": 1}}},
            S.GroupContrastSettings: {"name": "m", "weights": {"mean": 1}},
            S.CensorSettings: {"column": "fd", "threshold": 0.5}}.get(cls, {})


def _build(cls, **changes):
    return cls.from_params({**_base(cls), **changes}, fill_defaults=True)


@pytest.mark.parametrize("cls", _with_nested(S.SETTINGS_CLASSES), ids=lambda c: c.__name__)
def test_defaults_are_the_schema_defaults(cls) -> None:
    keys = S.schema_keys(real_schema())
    built = _build(cls)
    for f in fields(cls):
        full = cls.schema_keys_of(f.name)
        if not full or f.metadata["nested"] is not None or f.name in _base(cls) or "default" not in keys[full[0]]:
            continue
        expected, got = keys[full[0]]["default"], getattr(built, f.name)
        if cls is S.FitSettings and f.name == "ar_order":
            assert S.FitSettings.defaults().autocorrelation == "arp"   # the order applies
        if cls is S.GroupModelSettings and f.name in ("group_column", "pair_column"):
            got = getattr(_build(cls, design="paired"), f.name)            # used by the paired design only
        assert got == expected, f"{cls.__name__}.{f.name}: {got!r} != schema default {expected!r}"


def _probes(node: dict[str, Any]) -> list[tuple[Any, bool]]:
    """Values at and just past each bound of a numeric node, each with whether the schema accepts it."""
    integer = "integer" in S.node_types({}, node)
    step = 1 if integer else 1e-9
    out = []
    for keyword, inside, outside in (("minimum", 0, -1), ("exclusiveMinimum", 1, 0), ("maximum", 0, 1),
                                     ("exclusiveMaximum", -1, 0)):
        if keyword in node:
            bound = node[keyword]
            scale = 1 if integer else max(1.0, abs(bound))
            out.append((bound + inside * step * scale if keyword.startswith("exclusive") and not integer else
                        bound + inside * step, True))
            out.append((bound + outside * step * scale if not integer else bound + outside, False))
    for value in node.get("enum", []):
        out.append((value, True))
    if "enum" in node:
        out.append(("not-one-of-them" if isinstance(node["enum"][0], str) else 7, False))
    return out


@pytest.mark.parametrize("cls", _with_nested(S.SETTINGS_CLASSES), ids=lambda c: c.__name__)
def test_bounds_are_the_schema_bounds(cls) -> None:
    keys = S.schema_keys(real_schema())
    for f in fields(cls):
        full = cls.schema_keys_of(f.name)
        if not full or f.metadata["parse"] is not None:
            continue
        for value, accepted in _probes(keys[full[0]]):
            changes = {f.name: value}
            if cls is S.DesignSettings and f.name == "fir_bin_width_s":
                changes["time_resolution_s"] = min(value, 0.1) if accepted and value > 0 else 0.1
            if accepted:
                _build(cls, **changes)
            else:
                with pytest.raises(GlmstepsError) as info:
                    _build(cls, **changes)
                assert cls.shown_key(f.name, _base(cls).get("name")) in str(info.value) and "\n" not in str(info.value), (cls, f.name, value)


def test_settings_follow_a_changed_schema() -> None:
    # the class holds no copy of a bound or default: change the schema and the settings change with it
    schema = real_schema()
    fit = schema["properties"]["fit"]["properties"]
    fit["ar_order"]["maximum"] = 13
    fit["ar_bin_width"]["default"] = 0.02
    changed = S.FitSettings.from_params({"ar_order": 13}, schema=schema)
    assert changed.ar_order == 13 and changed.ar_bin_width == 0.02
    with pytest.raises(GlmstepsError, match="fit.ar_order"):
        S.FitSettings.from_params({"ar_order": 13})


@pytest.mark.parametrize("cls", _with_nested(S.SETTINGS_CLASSES), ids=lambda c: c.__name__)
def test_unknown_params_are_errors(cls) -> None:
    # so every param a sidecar can record is a settings field (and has a label: next test)
    with pytest.raises(GlmstepsError, match="frobnicate"):
        cls.from_params({**_base(cls), "frobnicate": 1}, fill_defaults=True)


def test_every_param_a_sidecar_can_record_has_a_label() -> None:
    assert label_mismatches(real_schema()) == []
    labels = S.setting_labels()
    for info in S.iter_fields():
        assert audit.setting_label(info.param) == labels[info.param], info.param
    untitled = real_schema()
    del untitled["properties"]["fit"]["properties"]["ar_bin_width"]["title"]
    assert label_mismatches(untitled) == [
        "param ar_bin_width (FitSettings.ar_bin_width) has no label: give its schema key a title"]


def test_labels_are_the_schema_titles() -> None:
    schema = real_schema()
    fit = schema["properties"]["fit"]["properties"]
    assert audit.setting_label("ar_smoothing_fwhm_mm") == (fit["ar_smoothing_fwhm_mm"]["title"],
                                                           fit["ar_smoothing_fwhm_mm"]["unit"])
    censor = next(b for b in schema["properties"]["confounds"]["properties"]["censor"]["oneOf"]
                  if b.get("type") == "object")["properties"]
    assert audit.setting_label("censor.volumes_after") == (censor["volumes_after"]["title"], "volumes")
    fit["ar_order"]["title"] = "order of the autoregressive model"
    assert S.setting_labels(schema)["ar_order"] == ("order of the autoregressive model", "")
