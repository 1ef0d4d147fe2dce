"""Read a config file (YAML or JSON) as plain data, with one-line errors naming the file and line.

Snakemake reads ``--configfile`` itself before any glmsteps code runs, and a
syntax error or an unsafe tag there gives its message ("not valid JSON or
YAML") without a line. A wrapper that reads the file first with
:func:`load_config` gives instead one line: the file, the line and column,
what is wrong and how to fix it.

The YAML is read with PyYAML's safe loader (plain data only: no tag can build
a Python object, so nothing in a config file is ever executed), and a key
given twice in one mapping is an error (a plain YAML reader keeps the last
one, silently changing e.g. a contrast).

Reads one file; imports no snakemake, no numpy.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import yaml

from .errors import ConfigError

#: How a fix is worded for every syntax problem.
_FIX = "fix the file's syntax there (YAML or JSON; config/config.yaml is an example)"


class _StrictLoader(yaml.SafeLoader):
    """PyYAML's safe loader that also refuses a key given twice in one mapping."""


def _construct_mapping(loader: _StrictLoader, node: yaml.MappingNode, deep: bool = False) -> dict[Any, Any]:
    # the mapping's own keys only (before merge keys ``<<`` are expanded: a key may override a merged one)
    seen: dict[Any, yaml.Node] = {}
    for key_node, _ in node.value:
        if not isinstance(key_node, yaml.ScalarNode) or key_node.tag == "tag:yaml.org,2002:merge":
            continue
        key = loader.construct_object(key_node)
        if key in seen:
            raise _DuplicateKey(key, seen[key].start_mark, key_node.start_mark)
        seen[key] = key_node
    return loader.construct_mapping(node, deep=deep)


class _DuplicateKey(yaml.YAMLError):
    def __init__(self, key: Any, first: yaml.Mark, again: yaml.Mark) -> None:
        super().__init__(f"key {key!r}")
        self.key, self.first, self.again = key, first, again


_StrictLoader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


def _where(mark: yaml.Mark | None) -> str:
    return f"line {mark.line + 1}, column {mark.column + 1}" if mark is not None else "somewhere"


def _yaml_error_line(path: str, exc: yaml.YAMLError) -> str:
    """One line for a YAML reading error: file, line, column, problem, fix."""
    if isinstance(exc, _DuplicateKey):
        return (f"{path}: line {exc.again.line + 1}: key {exc.key!r} is given twice in one mapping (first on line "
                f"{exc.first.line + 1}); keep one of them")
    if isinstance(exc, yaml.constructor.ConstructorError):
        problem = str(exc.problem or "")
        if "could not determine a constructor for the tag" in problem:
            tag = problem.split("tag", 1)[1].strip().strip("'").replace("tag:yaml.org,2002:", "!!")
            return (f"{path}: {_where(exc.problem_mark)}: the tag {tag!r} is not allowed (a config file holds "
                    "plain data: mappings, lists, strings, numbers, true/false, null); remove the tag")
        return f"{path}: {_where(exc.problem_mark)}: {problem}; {_FIX}"
    if isinstance(exc, yaml.MarkedYAMLError):
        mark = exc.problem_mark or exc.context_mark
        what = exc.problem or exc.context or "invalid YAML"
        context = f" ({exc.context})" if exc.context and exc.problem else ""
        return f"{path}: {_where(mark)}: {what}{context}; {_FIX}"
    return f"{path}: not readable as YAML ({exc}); {_FIX}"


def load_config(path: str | os.PathLike[str]) -> dict[str, Any]:
    """Read a config file as plain data.

    Parameters
    ----------
    path : path-like
        A YAML file, or a JSON file (``.json``; JSON is also valid YAML, but
        JSON's own reader gives the better message for a JSON file).

    Returns
    -------
    dict
        The top-level mapping (not yet checked against config/schema.yaml).

    Raises
    ------
    ConfigError
        One line naming the file (and, for a syntax error, an unsafe tag or a
        key given twice, the line and column) and the fix: the file is missing
        or unreadable, is not valid YAML/JSON, uses a tag other than plain
        data, repeats a key within one mapping, is empty, or its top level is
        not a mapping.
    """
    shown = os.fspath(path)
    try:
        text = Path(path).read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise ConfigError(f"{shown}: no such config file; check the path given to --configfile") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{shown}: cannot read the config file ({exc}); save it as UTF-8 text") from exc
    if shown.lower().endswith(".json"):
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise ConfigError(f"{shown}: line {exc.lineno}, column {exc.colno}: {exc.msg}; {_FIX}") from exc
    else:
        try:
            data = yaml.load(text, Loader=_StrictLoader)  # noqa: S506 - a SafeLoader subclass
        except yaml.YAMLError as exc:
            raise ConfigError(_yaml_error_line(shown, exc)) from exc
    if data is None:
        raise ConfigError(f"{shown}: the config file is empty; copy config/config.yaml and edit it")
    if not isinstance(data, dict):
        raise ConfigError(f"{shown}: the top level is a {type(data).__name__}, not a mapping of sections "
                          "(inputs:, contrasts:, ...); see config/config.yaml")
    return data
