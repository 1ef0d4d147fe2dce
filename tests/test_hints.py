"""Every config key an error hint names exists in config/schema.yaml, and every value it suggests is accepted.

Walks the text of every message in the run-level front end (events, confounds, design, HRF, TR,
renames, up-front checks and their jobs) (issue 14.6: hints must point only at options the schema
accepts). The schema is checked with jsonschema, the validator Snakemake itself uses.
"""

from __future__ import annotations

import ast
import re
from pathlib import Path
from typing import Any

import jsonschema
import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
SCHEMA = yaml.safe_load((ROOT / "config" / "schema.yaml").read_text())
MODULES = ["glmsteps/events.py", "glmsteps/confounds.py", "glmsteps/design.py", "glmsteps/hrf.py",
           "glmsteps/bids.py", "glmsteps/volumes.py", "glmsteps/acquisition.py", "glmsteps/renames.py",
           "glmsteps/precheck.py", "glmsteps/configfile.py", "glmsteps/jobs/validate_events.py", "glmsteps/jobs/select_confounds.py",
           "glmsteps/jobs/build_design.py", "glmsteps/plots/confounds.py"]
SECTIONS = ("inputs", "acquisition", "events", "confounds", "design", "fit", "contrasts", "contrast_options",
            "thresholds", "group_models")
KEY = re.compile(rf"(?<![.\w])(?:{'|'.join(SECTIONS)})(?:\.[A-Za-z_][A-Za-z0-9_]*)+")
FILE_PARTS = {"tsv", "json", "png", "h5", "nii", "gz", "smk", "yaml"}
SET_TO = re.compile(r"\bset ((?:" + "|".join(SECTIONS) + r")(?:\.[A-Za-z_][A-Za-z0-9_]*)+) to ([^\s,;)]+)")


def _strings(node: ast.AST) -> list[str]:
    texts = []
    for sub in ast.walk(node):
        if isinstance(sub, ast.JoinedStr):
            texts.append("{}".join(v.value if isinstance(v, ast.Constant) else "" for v in sub.values))
        elif isinstance(sub, ast.Constant) and isinstance(sub.value, str):
            texts.append(sub.value)
    return texts


def _is_warn(node: ast.AST) -> bool:
    func = getattr(node, "func", None)
    return isinstance(node, ast.Call) and (getattr(func, "attr", None) == "warn" or getattr(func, "id", None) == "warn")


def message_texts(path: Path) -> list[str]:
    """The literal text of every error and warning message of a module (``raise ...(...)``,
    ``warnings.warn(...)``; f-strings: their literal parts joined by '{}'; adjacent literals are one
    string). Hints built in a variable first are found too when it is assigned a literal in the same
    function (e.g. ``fix = "..."``; ``reason = (...)``)."""
    texts = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Raise) or _is_warn(node):
            texts += _strings(node)
        elif isinstance(node, ast.Assign) and any(getattr(t, "id", "") in {"fix", "reason", "what", "where"}
                                                  for t in node.targets):
            texts += _strings(node.value)
    return texts


def subschema(path: str) -> dict[str, Any] | None:
    """The schema of a dotted config key (through oneOf / $ref / additionalProperties), None if unknown."""
    node: Any = SCHEMA
    for part in path.split("."):
        node = _resolve(node)
        props = _properties(node)
        if part in props:
            node = props[part]
        elif isinstance(node.get("additionalProperties"), dict):  # a user-named entry (contrast, condition...)
            node = node["additionalProperties"]
        else:
            return None
    return _resolve(node)


def _resolve(node: dict[str, Any]) -> dict[str, Any]:
    while "$ref" in node:
        node = SCHEMA["definitions"][node["$ref"].split("/")[-1]]
    return node


def _properties(node: dict[str, Any]) -> dict[str, Any]:
    props = dict(node.get("properties", {}))
    for option in node.get("oneOf", []):
        props.update(_resolve(option).get("properties", {}))
    return props


def hinted_keys() -> list[tuple[str, str]]:
    found = []
    for module in MODULES:
        for text in message_texts(ROOT / module):
            for key in KEY.findall(text):
                if key.split(".")[-1] not in FILE_PARTS:
                    found.append((module, key))
    return sorted(set(found))


def test_the_walk_finds_hints():
    # the walk itself must see the hints it is meant to check (else it could not fail)
    keys = {key for _, key in hinted_keys()}
    assert {"acquisition.repetition_time_s", "events.missing_duration", "events.duplicate_events",
            "confounds.derivative_columns", "design.drift.basis", "confounds.censor.column"} <= keys
    assert len(keys) >= 20


@pytest.mark.parametrize(("module", "key"), hinted_keys())
def test_every_hinted_key_is_in_the_schema(module, key):
    assert subschema(key) is not None, f"{module} names {key}, which config/schema.yaml does not accept"


def _literal(text: str) -> Any:
    value = yaml.safe_load(text.strip("'\""))
    return value


def suggested_values() -> list[tuple[str, str, str]]:
    found = []
    for module in MODULES:
        for text in message_texts(ROOT / module):
            for key, raw in SET_TO.findall(text):
                if raw in {"one", "a", "an", "the", "e.g.", "each", "{}"} or "{" in raw:
                    continue
                found.append((module, key, raw))
    return sorted(set(found))


def test_the_walk_finds_suggested_values():
    values = {(key, raw) for _, key, raw in suggested_values()}
    assert ("events.missing_duration", "impulse") in values
    assert ("acquisition.repetition_time_s", "null") in values
    assert ("confounds.censor", "null") in values


@pytest.mark.parametrize(("module", "key", "raw"), suggested_values())
def test_every_suggested_value_is_accepted(module, key, raw):
    schema = subschema(key)
    assert schema is not None, key
    # reference: jsonschema (the validator behind snakemake.utils.validate)
    jsonschema.validate(_literal(raw), {**schema, "definitions": SCHEMA["definitions"]})
