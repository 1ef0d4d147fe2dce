"""Each step's settings: one frozen dataclass per step, built from the params its job receives.

``config/schema.yaml`` is the one source of every setting's default, bounds
(type, ``enum``, ``minimum``/``maximum``, exclusive or not) and plain-words
label (``title``, with a ``unit`` where the value has one). A settings class
only names, field by field, the schema key the field reads;
:meth:`StepSettings.from_params` takes the job's params (exactly what the
rule passes, recorded unchanged in the sidecars, so params hashes do not
depend on this module), fills what is missing with the schema's default,
checks every value against the schema's bounds and raises one-line errors
naming the config key. Jobs call it once and use the fields.

Which schema key each field reads (``key``; ``"*"`` stands for a user-chosen
name such as a contrast or model):

=====================  ==============================================================
class                  schema keys
=====================  ==============================================================
EventsSettings         events.*, acquisition.repetition_time_s
ConfoundsSettings      confounds.* (``censor``: CensorSettings)
DesignSettings         design.*, design.drift.*, acquisition.volume_time_fraction,
                       events.conditions (events.modulators is read as well)
FitSettings            fit.* (not ``threads``: the rule's threads)
ContrastSettings       contrasts.*.{weights,rows,tail}, contrast_options.skip_nonestimable
ThresholdSettings      thresholds.{run,subject,group}.*.* (one definition)
GroupModelSettings     group_models.*.* (``contrast``: GroupContrastSettings,
                       ``permutation``: PermutationSettings)
ReportSettings         report.*
=====================  ==============================================================

The other keys only shape the workflow (which jobs exist, input paths, cores):
:data:`WORKFLOW_ONLY`. ``tests/test_settings_schema.py`` checks that every
schema key is read by exactly one field or is workflow-only, and that every
field's key exists in the schema.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import MISSING, dataclass, field, fields
from pathlib import Path
from typing import Any, ClassVar, Literal, TypeVar

from .errors import ConfigError, GlmstepsError, GroupError

def _schema_path() -> Path:
    """``config/schema.yaml`` of the clone holding the package, else the wheel's packaged copy."""
    package = Path(__file__).resolve().parent
    clone = package.parent / "config" / "schema.yaml"
    packaged = package / "_workflow" / "config" / "schema.yaml"     # glmsteps.runner.PACKAGED_WORKFLOW
    return clone if clone.is_file() or not packaged.is_file() else packaged


#: The workflow's config schema (the single source of defaults, bounds and labels).
SCHEMA_PATH = _schema_path()

#: Schema keys no step reads from its params: they decide which jobs exist, where inputs are, or how
#: many cores a job gets (key -> where it is used).
WORKFLOW_ONLY: dict[str, str] = {
    "inputs.root": "input paths (rules/common.smk)",
    "inputs.bold": "input paths; runs are discovered from it",
    "inputs.events": "input paths",
    "inputs.confounds": "input paths",
    "inputs.mask": "input paths",
    "inputs.tissue": "an input file of the fit (none when empty)",
    "inputs.participants": "input path of the group steps and the report",
    "inputs.subjects": "which runs are analysed",
    "inputs.tasks": "which runs are analysed",
    "output_dir": "where every output goes",
    "fit.threads": "the fit rule's threads (results do not depend on it)",
    "contrasts": "which contrast jobs exist (each gets its own entry)",
    "contrast_options.run_maps": "whether run-level maps are targets",
    "thresholds.run": "which run-level threshold jobs exist",
    "thresholds.subject": "which subject-level threshold jobs exist",
    "thresholds.group": "which group-level threshold jobs exist",
    "group_models": "which group jobs exist (each gets its own model)",
    "group_models.*.contrasts": "which first-level contrasts a model's jobs take",
}

_Settings = TypeVar("_Settings", bound="StepSettings")
Tail = Literal["two-sided", "positive", "negative"]


# ---------------------------------------------------------------------------
# the schema
# ---------------------------------------------------------------------------

@functools.lru_cache(maxsize=4)
def _load(path: str) -> dict[str, Any]:
    import yaml

    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the config schema ({exc}); glmsteps needs its "
                          "config/schema.yaml (reinstall glmsteps from a clone or a wheel)") from exc
    loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)
    schema = yaml.load(text, Loader=loader)  # noqa: S506 (a safe loader)
    if not isinstance(schema, dict):
        raise ConfigError(f"{path}: the config schema is not a mapping; restore config/schema.yaml")
    return schema


def load_schema(path: str | Path | None = None) -> dict[str, Any]:
    """The config schema (read once per process; do not modify the result)."""
    return _load(str(path or SCHEMA_PATH))


def resolve(schema: Mapping[str, Any], node: Mapping[str, Any]) -> dict[str, Any]:
    """``node`` with its ``$ref`` (``#/definitions/...``) merged in; the node's own keywords win."""
    out = dict(node)
    while "$ref" in out:
        ref = out.pop("$ref")
        target: Any = schema
        for part in str(ref).lstrip("#/").split("/"):
            target = target[part]
        out = {**target, **out}
    return out


def object_branch(schema: Mapping[str, Any], node: Mapping[str, Any]) -> dict[str, Any] | None:
    """The object form of a node (itself, or its ``oneOf`` object branch: e.g. ``null`` or an object)."""
    if "properties" in node:
        return dict(node)
    for branch in node.get("oneOf", []):
        branch = resolve(schema, branch)
        if branch.get("type") == "object" and "properties" in branch:
            return branch
    return None


def _is_section(node: Mapping[str, Any]) -> bool:
    """A plain section: an object of fixed keys (not itself a setting)."""
    return "properties" in node and node.get("type") == "object"


def schema_keys(schema: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """Every key of the schema as ``dotted.path`` -> its (resolved) schema node.

    Sections (objects of fixed keys) are walked, not listed; a mapping of user-chosen names
    (contrasts, models, thresholds of a level) is listed and its entries walked as ``*``; a
    nullable object (``confounds.censor``, a model's ``permutation``) is listed and its keys
    walked.
    """
    out: dict[str, dict[str, Any]] = {}

    def walk(node: Mapping[str, Any], prefix: str) -> None:
        node = resolve(schema, node)
        if prefix and not _is_section(node):
            out[prefix] = node
        branch = object_branch(schema, node)
        if branch is not None:
            for name, child in branch["properties"].items():
                walk(child, f"{prefix}.{name}" if prefix else name)
        entries = node.get("additionalProperties")
        if isinstance(entries, Mapping):
            entries = resolve(schema, entries)
            if "properties" in entries:
                walk(entries, f"{prefix}.*")

    walk(schema, "")
    return out


def schema_node(key: str, schema: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The schema node of one dotted key (``KeyError`` when the schema has no such key).

    ``schema`` None: the workflow's schema (its keys are listed once per process).
    """
    return (schema_keys(schema) if schema is not None else _default_keys())[key]


@functools.lru_cache(maxsize=1)
def _default_keys() -> dict[str, dict[str, Any]]:
    return schema_keys(load_schema())


# ---------------------------------------------------------------------------
# values against a schema node
# ---------------------------------------------------------------------------

def node_types(schema: Mapping[str, Any], node: Mapping[str, Any]) -> list[str]:
    """JSON types a node accepts (``type``, or those of its ``oneOf`` branches)."""
    kind = node.get("type")
    if kind is not None:
        return [kind] if isinstance(kind, str) else list(kind)
    types: list[str] = []
    for branch in node.get("oneOf", []):
        types += node_types(schema, resolve(schema, branch))
    return types


def _has_type(kind: str, value: Any) -> bool:
    if kind == "null":
        return value is None
    if kind == "boolean":
        return isinstance(value, bool)
    if kind == "integer":
        return not isinstance(value, bool) and (isinstance(value, int) or (
            isinstance(value, float) and math.isfinite(value) and value.is_integer()))
    if kind == "number":
        return not isinstance(value, bool) and isinstance(value, (int, float)) and math.isfinite(value)
    if kind == "string":
        return isinstance(value, str)
    if kind == "array":
        return isinstance(value, (list, tuple))
    if kind == "object":
        return isinstance(value, Mapping)
    return False


_TYPE_WORDS = {"integer": "a whole number", "number": "a number", "string": "text", "boolean": "true or false",
               "array": "a list", "object": "a mapping", "null": "null"}


def expected_text(schema: Mapping[str, Any], node: Mapping[str, Any]) -> str:
    """What a node accepts, in words (e.g. ``a number > 0 and <= 0.1``, ``one of ols, ar1, arp``)."""
    types = node_types(schema, node)
    if "enum" in node:
        text = "one of " + ", ".join(str(v) for v in node["enum"])
    else:
        words = [_TYPE_WORDS.get(t, t) for t in types if t != "null"]
        text = " or ".join(words) or "a value"
        items = node.get("items")
        if "array" in types and isinstance(items, Mapping) and "type" in items:
            text += f" of {_TYPE_WORDS.get(items['type'], items['type'])}"
        bounds = [f"{op} {node[k]}" for k, op in (("minimum", ">="), ("exclusiveMinimum", ">"),
                                                   ("maximum", "<="), ("exclusiveMaximum", "<")) if k in node]
        if bounds:
            text += " " + " and ".join(bounds)
    return f"null or {text}" if "null" in types and types != ["null"] else text


def check_value(schema: Mapping[str, Any], node: Mapping[str, Any], value: Any) -> str | None:
    """Why ``value`` breaks ``node`` (type, enum, bounds, list items, mapping values), or None."""
    types = node_types(schema, node)
    if types and not any(_has_type(t, value) for t in types):
        return f"found {value!r}"
    if value is None:
        return None
    if "enum" in node and (isinstance(value, bool) or value not in node["enum"]):
        return f"found {value!r}"
    if _has_type("number", value):
        for key, ok in (("minimum", lambda v, b: v >= b), ("exclusiveMinimum", lambda v, b: v > b),
                        ("maximum", lambda v, b: v <= b), ("exclusiveMaximum", lambda v, b: v < b)):
            if key in node and not ok(value, node[key]):
                return f"found {value!r}"
    if isinstance(value, (list, tuple)) and isinstance(node.get("items"), Mapping):
        items = resolve(schema, node["items"])
        for i, item in enumerate(value):
            problem = check_value(schema, items, item)
            if problem:
                return f"item {i + 1} is {item!r} ({expected_text(schema, items)} expected)"
    if isinstance(value, Mapping):
        if "minProperties" in node and len(value) < node["minProperties"]:
            return "found an empty mapping"
        entries = node.get("additionalProperties")
        if isinstance(entries, Mapping):
            entries = resolve(schema, entries)
            for name, item in value.items():
                problem = check_value(schema, entries, item)
                if problem:
                    return f"{name!r} is {item!r} ({expected_text(schema, entries)} expected)"
    return None


# ---------------------------------------------------------------------------
# fields and the base class
# ---------------------------------------------------------------------------

def key(path: str | Sequence[str] | None, *, also: bool = False, optional: bool = False,
        unused_as_null: bool = False, label: str | None = None, nested: type[StepSettings] | None = None,
        convert: Callable[[Any], Any] | None = None, parse: Callable[[Any], Any] | None = None,
        default: Any = MISSING) -> Any:
    """A settings field reading the schema key ``path`` (relative to its class's ``ROOTS``).

    Parameters
    ----------
    path : str, sequence of str or None
        The schema key(s) the field reads; None for a field that is not a config key (an entry's
        name), which then needs a ``label`` (and a ``default`` if it may be omitted).
    also : bool
        The key is another field's; this one reads it as well (tested: every key has exactly one
        field that does not say ``also``).
    optional : bool
        May be omitted from the params of a class with ``STRICT`` set.
    unused_as_null : bool
        Null is accepted as well (for a setting that only some choices use, e.g. the pair column of a
        paired design; the class's checks require it where it is used).
    label : str, optional
        Plain-words label when the schema's ``title`` is not the right one (or there is none).
    nested : StepSettings subclass, optional
        The value is a mapping of that class's settings (or null when the schema allows it).
    convert : callable, optional
        Applied to a checked value (e.g. ``float``, as the maths wants it).
    parse : callable, optional
        Checks and converts the value in place of the schema check; raises ``ValueError`` with what
        is expected.
    default : optional
        Default of a field that has no schema key.
    """
    paths = (path,) if isinstance(path, str) else tuple(path) if path is not None else ()
    return field(metadata={"keys": paths, "also": also, "optional": optional, "unused_as_null": unused_as_null,
                           "label": label, "nested": nested,
                           "convert": convert, "parse": parse, "default": default})


@dataclass(frozen=True)
class StepSettings:
    """Base of the step settings: the machinery of :meth:`from_params`.

    Class attributes: ``STEP`` (the step's name, in messages), ``ROOTS`` (prefixes of the
    fields' schema keys, e.g. the three threshold levels), ``SHOWN_AS`` (how a key appears in
    messages, ``{key}`` standing for the field's key), ``STRICT`` (every field must be given:
    the rule passes exactly the step's settings) and ``ERROR`` (the error class raised).
    """

    STEP: ClassVar[str] = ""
    ROOTS: ClassVar[tuple[str, ...]] = ("",)
    SHOWN_AS: ClassVar[str] = "{key}"
    STRICT: ClassVar[bool] = False
    ERROR: ClassVar[type[GlmstepsError]] = ConfigError

    # ------------------------------------------------------------------ introspection
    @classmethod
    def schema_keys_of(cls, name: str) -> tuple[str, ...]:
        """The full schema keys a field reads (one per root)."""
        md = cls._field(name).metadata
        return tuple(f"{root}.{path}" if root else path for path in md["keys"] for root in cls.ROOTS)

    @classmethod
    def _field(cls, name: str) -> Any:
        for f in fields(cls):
            if f.name == name:
                return f
        raise KeyError(name)

    @classmethod
    def shown_key(cls, name: str, entry: str | None = None) -> str:
        """How a field's key is named in messages (``thresholds.<level>.fdr05.q``)."""
        md = cls._field(name).metadata
        text = cls.SHOWN_AS.format(key=md["keys"][0] if md["keys"] else name)
        return text.replace("*", entry or "<name>", 1).replace("*", "<name>")

    @classmethod
    def default_of(cls, name: str, schema: Mapping[str, Any] | None = None) -> Any:
        """A field's default: its schema key's ``default`` (MISSING when it has none: required)."""
        md = cls._field(name).metadata
        if not md["keys"]:
            return md["default"]
        node = schema_node(cls.schema_keys_of(name)[0], schema)
        value = node.get("default", MISSING)
        return list(value) if isinstance(value, list) else dict(value) if isinstance(value, dict) else value

    # ------------------------------------------------------------------ construction
    @classmethod
    def from_params(cls: type[_Settings], params: Mapping[str, Any], *, fill_defaults: bool | None = None,
                    schema: Mapping[str, Any] | None = None) -> _Settings:
        """The settings from a job's params: defaults filled in and every value checked.

        Parameters
        ----------
        params : mapping
            The params of the step's rule (flat; nested settings as mappings).
        fill_defaults : bool, optional
            Fill missing keys with the schema's defaults; default: unless the class is ``STRICT``.
        schema : mapping, optional
            Another schema (tests); default :func:`load_schema`.

        Raises
        ------
        ConfigError or GroupError (``ERROR``)
            An unknown or missing key, or a value the schema does not accept, in one line.
        """
        if not isinstance(params, Mapping):
            raise cls.ERROR(f"step {cls.STEP}: settings must be a mapping, found {params!r}")
        fill = (not cls.STRICT) if fill_defaults is None else fill_defaults
        names = [f.name for f in fields(cls)]
        entry = str(params["name"]) if isinstance(params.get("name"), str) else None
        unknown = sorted(set(params) - set(names))
        if unknown:
            raise cls.ERROR(f"step {cls.STEP}: unknown setting(s) {unknown}; it takes exactly {names} "
                            "(config/schema.yaml)")
        values: dict[str, Any] = {}
        for f in fields(cls):
            md = f.metadata
            if f.name in params:
                value = params[f.name]
            else:
                value = cls.default_of(f.name, schema)
                if value is MISSING or (not fill and not md["optional"]):
                    raise cls.ERROR(f"step {cls.STEP}: setting {f.name!r} is missing (config "
                                    f"{cls.shown_key(f.name, entry)}); the rule must pass {names}")
            values[f.name] = cls._checked(f.name, value, schema, entry, fill_defaults)
        values = cls._finish(values, entry)
        return cls(**values)

    @classmethod
    def defaults(cls: type[_Settings]) -> _Settings:
        """Every field at its schema default (for a step whose settings all have one)."""
        return cls.from_params({}, fill_defaults=True)

    @classmethod
    def _checked(cls, name: str, value: Any, schema: Mapping[str, Any] | None, entry: str | None,
                 fill_defaults: bool | None) -> Any:
        md = cls._field(name).metadata
        where = f"config {cls.shown_key(name, entry)}"
        full = cls.schema_keys_of(name)
        node = schema_node(full[0], schema) if full else {}
        if value is None and md["unused_as_null"]:
            return None
        if md["parse"] is not None:
            try:
                return md["parse"](value)
            except (TypeError, ValueError) as exc:
                raise cls.ERROR(f"{where}: {exc}; see config/schema.yaml") from None
        if node:
            problem = check_value(load_schema() if schema is None else schema, node, value)
            if problem:
                raise cls.ERROR(f"{where}: expected {expected_text(load_schema() if schema is None else schema, node)}"
                                f", {problem}; fix it (config/schema.yaml lists the bounds)")
        if md["nested"] is not None and value is not None:
            return md["nested"].from_params(value, fill_defaults=fill_defaults, schema=schema)
        if md["convert"] is not None and value is not None:
            return md["convert"](value)
        if isinstance(value, (list, tuple)):
            return list(value)
        if isinstance(value, Mapping):
            return {str(k): (list(v) if isinstance(v, (list, tuple)) else v) for k, v in value.items()}
        return value

    @classmethod
    def _finish(cls, values: dict[str, Any], entry: str | None) -> dict[str, Any]:
        """Checks across fields, and values that follow from others (override)."""
        return values

    @classmethod
    def _fail(cls, name: str, entry: str | None, message: str) -> GlmstepsError:
        return cls.ERROR(f"config {cls.shown_key(name, entry)}: {message}")


def _mapping(value: Any) -> dict[str, Any]:
    if not isinstance(value, Mapping):
        raise ValueError(f"expected a mapping, found {value!r}")
    return dict(value)


# ---------------------------------------------------------------------------
# the steps
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class EventsSettings(StepSettings):
    """validate_events: how the events file is read, and the TR every run is expected to have."""

    STEP: ClassVar[str] = "validate_events"
    STRICT: ClassVar[bool] = True

    condition_column: str = key("events.condition_column")
    modulators: dict[str, list[str]] = key("events.modulators")
    repetition_time_s: float | None = key("acquisition.repetition_time_s")
    duplicate_events: Literal["error", "keep_first", "keep_all"] = key("events.duplicate_events")
    missing_duration: Literal["error", "impulse"] = key("events.missing_duration")


@dataclass(frozen=True)
class CensorSettings(StepSettings):
    """select_confounds' ``censor`` block: which column censors volumes, above what value."""

    STEP: ClassVar[str] = "select_confounds"
    STRICT: ClassVar[bool] = True

    column: str = key("confounds.censor.column")
    threshold: float = key("confounds.censor.threshold")
    volumes_before: int = key("confounds.censor.volumes_before")
    volumes_after: int = key("confounds.censor.volumes_after")


@dataclass(frozen=True)
class ConfoundsSettings(StepSettings):
    """select_confounds: selection, expansion and censoring of the confounds."""

    STEP: ClassVar[str] = "select_confounds"
    STRICT: ClassVar[bool] = True

    columns: list[str] = key("confounds.columns")
    derivatives: bool = key("confounds.derivatives")
    squares: bool = key("confounds.squares")
    demean: bool = key("confounds.demean")
    scale: bool = key("confounds.scale")
    drop_initial_volumes: int = key("confounds.drop_initial_volumes")
    max_censored_fraction: float = key("confounds.max_censored_fraction")
    censor: CensorSettings | None = key("confounds.censor", nested=CensorSettings)
    derivative_columns: list[str] = key("confounds.derivative_columns", optional=True)


DriftBasis = Literal["cosine", "legendre", "none"]
HrfModel = Literal["double_gamma", "double_gamma_latency", "double_gamma_latency_width", "glover_1999", "fir"]


@dataclass(frozen=True)
class DesignSettings(StepSettings):
    """build_design: response model, drift, timing and conditions (the TR is each run's own)."""

    STEP: ClassVar[str] = "build_design"
    STRICT: ClassVar[bool] = True

    conditions: list[str] = key("events.conditions")
    volume_time_fraction: float = key("acquisition.volume_time_fraction", convert=float)
    hrf: HrfModel = key("design.hrf")
    fir_bins: int = key("design.fir_bins", convert=int)
    fir_bin_width_s: float = key("design.fir_bin_width_s", convert=float)
    time_resolution_s: float = key("design.time_resolution_s", convert=float)
    drift_basis: DriftBasis = key("design.drift.basis")
    cutoff_s: float = key("design.drift.cutoff_s", convert=float)
    legendre_order: int = key("design.drift.legendre_order", convert=int)
    modulators: dict[str, list[str]] = key("events.modulators", also=True)

    @classmethod
    def _finish(cls, values: dict[str, Any], entry: str | None) -> dict[str, Any]:
        if values["hrf"] == "fir" and values["fir_bin_width_s"] < values["time_resolution_s"]:
            raise cls._fail("fir_bin_width_s", entry, f"{values['fir_bin_width_s']} s is shorter than "
                            f"design.time_resolution_s = {values['time_resolution_s']} s; widen the bins")
        return values

    def design_options(self) -> dict[str, Any]:
        """Keyword arguments of :func:`glmsteps.design.build_design`; settings of a model not chosen
        (FIR bins without ``fir``, the cosine cutoff without ``cosine``...) take neutral values."""
        fir = self.hrf == "fir"
        return {"hrf": self.hrf, "dt_s": self.time_resolution_s,
                "fir_bins": self.fir_bins if fir else 0, "fir_bin_width_s": self.fir_bin_width_s if fir else 0.0,
                "drift_basis": self.drift_basis, "cutoff_s": self.cutoff_s if self.drift_basis == "cosine" else 128.0,
                "legendre_order": self.legendre_order if self.drift_basis == "legendre" else 1,
                "conditions": list(self.conditions), "modulators": {k: list(v) for k, v in self.modulators.items()}}


def _fwhm(value: Any) -> float | None:
    return None if value is None else float(value)


@dataclass(frozen=True)
class FitSettings(StepSettings):
    """fit: scaling, autocorrelation model and the policy for non-finite voxels.

    ``ar_order`` is 1 unless ``autocorrelation`` is ``arp`` (the order only applies there).
    """

    STEP: ClassVar[str] = "fit"

    scaling: Literal["percent", "grand_mean", "none"] = key("fit.scaling")
    grand_mean_value: float = key("fit.grand_mean_value", convert=float)
    autocorrelation: Literal["ols", "ar1", "arp"] = key("fit.autocorrelation")
    ar_order: int = key("fit.ar_order", convert=int)
    ar_smoothing_fwhm_mm: float | None = key("fit.ar_smoothing_fwhm_mm", convert=_fwhm)
    ar_bin_width: float = key("fit.ar_bin_width", convert=float)
    non_finite_voxels: Literal["error", "drop"] = key("fit.non_finite_voxels")

    @classmethod
    def _finish(cls, values: dict[str, Any], entry: str | None) -> dict[str, Any]:
        return {**values, "ar_order": values["ar_order"] if values["autocorrelation"] == "arp" else 1}


@dataclass(frozen=True)
class ContrastSettings(StepSettings):
    """contrast and combine_runs: one contrast's definition (parsed by :mod:`glmsteps.contrasts`).

    ``tail`` not given (or None): the definition's own ``tail``, else the schema's default.
    """

    STEP: ClassVar[str] = "contrast"

    name: str = key(None, label="name", parse=str)
    definition: dict[str, Any] = key(("contrasts.*.weights", "contrasts.*.rows"), label="contrast definition",
                                     parse=_mapping)
    tail: Tail = key("contrasts.*.tail")
    skip_nonestimable: bool = key("contrast_options.skip_nonestimable")

    @classmethod
    def from_params(cls, params: Mapping[str, Any], **kwargs: Any) -> ContrastSettings:  # type: ignore[override]
        if isinstance(params, Mapping) and params.get("tail") is None:
            params = {k: v for k, v in params.items() if k != "tail"}
            definition = params.get("definition")
            if isinstance(definition, Mapping) and "tail" in definition:
                params["tail"] = definition["tail"]
        return super().from_params(params, **kwargs)


_THRESHOLD_LEVEL_KEY = {"uncorrected": "p", "fdr": "q", "bonferroni": "alpha", "cluster_extent": "forming_p"}


@dataclass(frozen=True)
class ThresholdSettings(StepSettings):
    """threshold: one named threshold setting of a level (run, subject or group).

    The rule passes the keys its method uses; the others keep the schema's defaults.
    """

    STEP: ClassVar[str] = "threshold"
    ROOTS: ClassVar[tuple[str, ...]] = ("thresholds.run.*", "thresholds.subject.*", "thresholds.group.*")
    SHOWN_AS: ClassVar[str] = "thresholds.<level>.*.{key}"

    name: str | None = key(None, label="name", parse=lambda v: None if v is None else str(v), default=None)
    method: Literal["uncorrected", "fdr", "bonferroni", "cluster_extent"] = key("method")
    p: float = key("p", convert=float)
    q: float = key("q", convert=float)
    alpha: float = key("alpha", convert=float)
    forming_p: float = key("forming_p", convert=float)
    min_cluster_voxels: int = key("min_cluster_voxels", convert=int)
    connectivity: Literal[6, 18, 26] = key("connectivity", convert=int)
    tail: Tail = key("tail")
    subpeaks: int = key("subpeaks", convert=int)
    subpeak_spacing_mm: float = key("subpeak_spacing_mm", convert=float)

    @property
    def level(self) -> float:
        """The method's level: p, q, alpha or forming_p."""
        return float(getattr(self, _THRESHOLD_LEVEL_KEY[self.method]))

    def threshold_setting(self, name: str) -> Any:
        """The library's :class:`glmsteps.threshold.ThresholdSetting` (``name`` when the params have none)."""
        from .threshold import ThresholdSetting

        return ThresholdSetting(self.name or name, self.method, self.level, self.min_cluster_voxels,
                                self.connectivity, self.tail, self.subpeaks, self.subpeak_spacing_mm)


@dataclass(frozen=True)
class GroupContrastSettings(StepSettings):
    """The one group contrast of a group job: its name and weights over the group design's columns."""

    STEP: ClassVar[str] = "group_model"
    SHOWN_AS: ClassVar[str] = "group_models.<model>.group_contrasts"
    ERROR: ClassVar[type[GlmstepsError]] = GroupError

    name: str = key(None, label="group contrast", parse=str)
    weights: dict[str, float] = key("group_models.*.group_contrasts", label="group contrast weights",
                                    parse=lambda v: _weights(v))


def _weights(value: Any) -> dict[str, float]:
    if not isinstance(value, Mapping) or not value or not all(
            isinstance(w, (int, float)) and not isinstance(w, bool) for w in value.values()):
        raise ValueError(f"expected a mapping of group design column to a number, found {value!r}")
    return {str(k): v for k, v in value.items()}


@dataclass(frozen=True)
class PermutationSettings(StepSettings):
    """group_permutation: permutation count, seed and cluster inference (a model's ``permutation``)."""

    STEP: ClassVar[str] = "group_permutation"
    SHOWN_AS: ClassVar[str] = "{key}"
    ERROR: ClassVar[type[GlmstepsError]] = GroupError

    n_permutations: int = key("group_models.*.permutation.n_permutations", convert=int)
    seed: int = key("group_models.*.permutation.seed", convert=int)
    cluster_forming_p: float = key("group_models.*.permutation.cluster_forming_p", convert=float)
    tfce: bool = key("group_models.*.permutation.tfce")
    tfce_step: float = key("group_models.*.permutation.tfce_step", convert=float)
    connectivity: Literal[6, 18, 26] = key("group_models.*.permutation.connectivity", convert=int)
    subpeaks: int = key("group_models.*.permutation.subpeaks", convert=int)
    subpeak_spacing_mm: float = key("group_models.*.permutation.subpeak_spacing_mm", convert=float)


GroupDesign = Literal["one_sample", "two_sample", "paired", "regression"]
_DESIGN_COLUMNS = {"two_sample": ("group_column",), "paired": ("group_column", "pair_column")}


@dataclass(frozen=True)
class GroupModelSettings(StepSettings):
    """group and group_permutation: a model's settings and the job's group contrast.

    ``group_column`` and ``pair_column`` are None unless the design uses them;
    ``permutation`` is None for the group job (its rule passes none).
    """

    STEP: ClassVar[str] = "group_model"
    SHOWN_AS: ClassVar[str] = "{key}"
    ERROR: ClassVar[type[GlmstepsError]] = GroupError

    design: GroupDesign = key("group_models.*.design")
    group_column: str | None = key("group_models.*.group_column", unused_as_null=True)
    pair_column: str | None = key("group_models.*.pair_column", unused_as_null=True)
    covariates: list[str] = key("group_models.*.covariates")
    site_column: str | None = key("group_models.*.site_column")
    site_as_covariate: bool = key("group_models.*.site_as_covariate")
    estimation: Literal["ols", "mixed_reml", "mixed_dl"] = key("group_models.*.estimation")
    harmonise_sites: bool = key("group_models.*.harmonise_sites")
    mask_fraction: float = key("group_models.*.mask_fraction", convert=float)
    tail: Tail = key("group_models.*.tail")
    contrast: GroupContrastSettings = key(None, label="group contrast", nested=GroupContrastSettings)
    permutation: PermutationSettings | None = key("group_models.*.permutation", nested=PermutationSettings)

    @classmethod
    def _finish(cls, values: dict[str, Any], entry: str | None) -> dict[str, Any]:
        site = values["site_column"]
        if site is not None and not site:
            raise cls._fail("site_column", entry, "is empty; give a participants column name, or null for a "
                            "single-site study")
        if site is None and values["harmonise_sites"]:
            raise cls.ERROR("group params: harmonise_sites needs a site column but site_column is null; set "
                            "site_column to the participants column of sites, or set harmonise_sites: false")
        needs = _DESIGN_COLUMNS.get(values["design"], ())
        for name in ("group_column", "pair_column"):
            if name not in needs:
                values[name] = None                     # only the columns the design uses
            elif not isinstance(values[name], str) or not values[name]:
                raise cls.ERROR(f"group params: design {values['design']} needs {name} (a participants column), "
                                f"found {values[name]!r}; set it")
        return values


@dataclass(frozen=True)
class ReportSettings(StepSettings):
    """report: the outlier rule of the QC tables and the mosaics' layout (config section ``report``)."""

    STEP: ClassVar[str] = "report"

    site_column: str = key("report.site_column", convert=str)
    outlier_mads: float = key("report.outlier_mads", convert=float)
    min_site_runs: int = key("report.min_site_runs", convert=int)
    min_relative_spread: float = key("report.min_relative_spread", convert=float)
    mosaic_slices: int = key("report.mosaic_slices", convert=int)
    mosaic_columns: int = key("report.mosaic_columns", convert=int)


#: Every step's settings class with the prefix its params carry (nested classes under their field),
#: in the order the audit lists settings.
SETTINGS_CLASSES: tuple[type[StepSettings], ...] = (
    EventsSettings, ConfoundsSettings, DesignSettings, FitSettings, ContrastSettings, ThresholdSettings,
    GroupModelSettings, ReportSettings)
#: The settings class of each step (by the step name in sidecars).
STEP_SETTINGS: dict[str, type[StepSettings]] = {
    "validate_events": EventsSettings, "select_confounds": ConfoundsSettings, "build_design": DesignSettings,
    "fit": FitSettings, "contrast": ContrastSettings, "combine_runs": ContrastSettings,
    "threshold": ThresholdSettings, "group_model": GroupModelSettings, "group_permutation": GroupModelSettings,
    "report": ReportSettings}


# ---------------------------------------------------------------------------
# every field, and the labels the audit shows
# ---------------------------------------------------------------------------

@dataclass(frozen=True)
class FieldInfo:
    """One settings field: its dotted param key (as ``glmsteps.audit.flatten_params`` spells it),
    the class, the field name, the schema keys it reads and whether it only reads another's key."""

    param: str
    owner: type[StepSettings]
    name: str
    keys: tuple[str, ...]
    also: bool
    label: str | None
    nested: type[StepSettings] | None


def iter_fields(classes: Sequence[type[StepSettings]] = SETTINGS_CLASSES, prefix: str = "") -> Iterator[FieldInfo]:
    """Every field of ``classes`` and of their nested settings, in order."""
    for cls in classes:
        for f in fields(cls):
            md = f.metadata
            param = f"{prefix}{f.name}"
            yield FieldInfo(param=param, owner=cls, name=f.name, keys=cls.schema_keys_of(f.name), also=md["also"],
                            label=md["label"], nested=md["nested"])
            if md["nested"] is not None:
                yield from iter_fields((md["nested"],), prefix=f"{param}.")


@functools.lru_cache(maxsize=1)
def setting_order() -> dict[str, int]:
    """Position of every param key in the steps' settings classes (the order the audit lists them)."""
    order: dict[str, int] = {}
    for info in iter_fields():
        order.setdefault(info.param, len(order))
    return order


def setting_labels(schema: Mapping[str, Any] | None = None) -> dict[str, tuple[str, str]]:
    """Plain-words label and unit of every param a step takes, from the schema's ``title`` and ``unit``.

    Keys are dotted param names (``censor.column``, ``permutation.seed``); the first class that
    takes a param names it (``tail`` is the contrasts' "tail of the test"). A field whose key has
    no ``title`` (and no label of its own) is missing here: tests/test_settings_schema.py
    requires one for every field.
    """
    return _default_labels() if schema is None else _labels(schema)


@functools.lru_cache(maxsize=1)
def _default_labels() -> dict[str, tuple[str, str]]:
    return _labels(None)


def _labels(schema: Mapping[str, Any] | None) -> dict[str, tuple[str, str]]:
    labels: dict[str, tuple[str, str]] = {}
    for info in iter_fields():
        if info.param in labels:
            continue
        node = schema_node(info.keys[0], schema) if info.keys else {}
        label = info.label or node.get("title")
        if label:
            labels[info.param] = (str(label), str(node.get("unit", "")))
    return labels


def setting_null_meanings(schema: Mapping[str, Any] | None = None) -> dict[str, str]:
    """What a ``null`` value means, for the params whose schema key says so (``null_means``).

    Keys are dotted param names as in :func:`setting_labels`; e.g. a ``null``
    ``ar_smoothing_fwhm_mm`` means twice the run's voxel size, not "no smoothing".
    """
    meanings: dict[str, str] = {}
    for info in iter_fields():
        node = schema_node(info.keys[0], schema) if info.keys else {}
        if info.param not in meanings and node.get("null_means"):
            meanings[info.param] = str(node["null_means"])
    return meanings


try:  # read once at import, so that the jobs the warm launcher forks (glmsteps.launch) share it
    _default_keys()
    _default_labels()
except ConfigError:  # pragma: no cover - reported by the first job that needs the schema
    pass
