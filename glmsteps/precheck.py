"""Checks made when the workflow starts, before any job: contrast keys against the events files.

A contrast naming a condition that no events file has would otherwise pass
``snakemake -n`` and fail only after events, confounds, design and fit have
run. :func:`check_contrast_keys` reads only the condition column of each
discovered run's events TSV (a plain text scan, no table library: 2,000 files
of 40 rows take well under a second) and stops with one line naming the
contrast, the key and the conditions found.

A contrast key may be (see :mod:`glmsteps.contrasts`):

- a condition found in some events file (and in ``events.conditions`` when
  that list is given);
- a design column of such a condition that the configured response model
  makes: ``<c>__latency`` (``double_gamma_latency``,
  ``double_gamma_latency_width``), ``<c>__width``
  (``double_gamma_latency_width``), ``<c>__fir<kk>`` (``fir``, kk below
  ``design.fir_bins``), ``<c>__x_<column>`` (``events.modulators``);
- ``<c>__all`` in an F contrast row;
- a nuisance column: ``intercept``, ``slow_<kk>``, ``spike_<vvvv>``, or a
  confound column matching ``confounds.columns`` (with ``_diff`` / ``_sq`` /
  ``_diff_sq`` when ``confounds.derivatives`` / ``confounds.squares`` add them).
  The confounds tables are not read: a glob pattern (``move_*``) accepts any
  key it matches, and a key naming a column the table lacks fails at the
  contrast step.

:func:`check_config_names` and :func:`check_output_dir` check the names that
become folder names (contrasts, thresholds, group models and their contrasts:
at most :data:`MAX_NAME_LENGTH` characters of letters, digits and underscores)
and refuse an ``output_dir`` that is, holds or lies inside ``inputs.root``;
:func:`check_contrast_weights` refuses a contrast row of zero weights and
:func:`check_group_contrast_keys` a group contrast key that can be no column
of its group design; :func:`check_config_start` runs them all.

This module reads files but does no maths; it imports neither snakemake nor
numpy, pandas or scipy (the Snakefile imports it at every start).
"""

from __future__ import annotations

import fnmatch
import os
import re
from collections.abc import Mapping, Sequence
from typing import Any

from .errors import ConfigError, ContrastError, EventsError
from .names import (ALL_SUFFIX, BASIS_SEPARATOR, DIFF_SUFFIX, FIR_PREFIX, INTERCEPT, LATENCY_BASIS, MODULATOR_INFIX,
                    SLOW_PREFIX, SPIKE_PREFIX, SQUARE_SUFFIX, WIDTH_BASIS, is_folder_name)
from .renames import renamed_column

_NUISANCE = re.compile(rf"{INTERCEPT}|{SLOW_PREFIX}\d{{2,}}|{SPIKE_PREFIX}\d{{4,}}")
#: Basis columns each response model (``design.hrf``) adds to a condition besides its main column
#: (tested against glmsteps.hrf.hrf_basis).
MODEL_SUFFIXES: dict[str, tuple[str, ...]] = {
    "double_gamma": (), "glover_1999": (), "double_gamma_latency": (LATENCY_BASIS,),
    "double_gamma_latency_width": (LATENCY_BASIS, WIDTH_BASIS), "fir": (),
}
_MISSING = {"", "n/a"}
#: Longest contrast, threshold, group model or group contrast name (characters). Each becomes one
#: folder name (``contrast-<name>``, ``threshold-<name>``...), and a file system allows 255 bytes per
#: name; 100 also keeps the deepest output path (group model, contrast, group contrast and threshold
#: folders) far below the 4,096-byte path limit.
MAX_NAME_LENGTH = 100


def read_conditions(path: str | os.PathLike[str], condition_column: str) -> set[str]:
    """The condition names of one events TSV, read from its condition column only.

    Parameters
    ----------
    path : path-like
        A BIDS events TSV (tab separated, header line, ``n/a`` for missing).
    condition_column : str
        ``events.condition_column``.

    Returns
    -------
    set of str
        The names as the events step writes them: when every given value of
        the column is a number (a table reader then reads the column as
        numbers), whole numbers lose their decimals (``1.0`` -> ``1``);
        missing cells are skipped.

    Raises
    ------
    EventsError
        The file cannot be read or has no such column.
    """
    try:
        with open(path, encoding="utf-8-sig", newline="") as handle:
            header = handle.readline().rstrip("\r\n").split("\t")
            if condition_column not in header:
                raise EventsError(f"{path}: no column '{condition_column}' (columns: {header}); add it or set "
                                  "events.condition_column to the column holding the condition names")
            j = header.index(condition_column)
            cells = [line.rstrip("\r\n").split("\t") for line in handle if line.strip()]
    except (OSError, UnicodeDecodeError) as exc:
        raise EventsError(f"{path}: cannot read the events file ({exc}); save it as a BIDS events TSV") from exc
    values = [row[j].strip() for row in cells if len(row) > j and row[j].strip() not in _MISSING]
    return set(_as_condition_names(values))


def _as_condition_names(values: list[str]) -> list[str]:
    """Numbers written as the events step writes them (the column is numeric only if every value is)."""
    try:
        numbers = [float(v) for v in values]
    except ValueError:
        return values
    return [str(int(x)) if x.is_integer() else str(x) for x in numbers]


def _weight_rows(spec: Mapping[str, Any]) -> list[tuple[str, Mapping[str, Any], bool]]:
    if "weights" in spec:
        return [("weights", spec["weights"], False)]
    return [(f"rows[{i}]", row, True) for i, row in enumerate(spec.get("rows", []))]


def _confound_name(key: str, patterns: Sequence[str], derivatives: bool, squares: bool) -> bool:
    """Could ``key`` be a column of the selected (and expanded) confounds?"""
    bases = [key]
    for suffix, on in ((DIFF_SUFFIX + SQUARE_SUFFIX, derivatives and squares), (DIFF_SUFFIX, derivatives),
                       (SQUARE_SUFFIX, squares)):
        if on and key.endswith(suffix):
            bases.append(key[: -len(suffix)])
    return any(base == p or fnmatch.fnmatchcase(base, p) for base in bases for p in patterns)


def check_conditions_present(conditions_by_run: Mapping[str, set[str]],
                             needed: Mapping[str, set[str]]) -> dict[str, dict[str, list[str]]]:
    """Find, for each contrast, the runs that lack a condition it needs.

    Parameters
    ----------
    conditions_by_run : mapping of str to set of str
        Run identifier (e.g. its events file) -> conditions in its events.
    needed : mapping of str to set of str
        Contrast name -> conditions its weights name.

    Returns
    -------
    dict of str to dict of str to list of str
        Contrast -> {run -> sorted conditions absent from that run}, only
        runs with something absent; a contrast that every run supports maps
        to ``{}``. Later steps mark the contrast non-estimable in those runs.

    Raises
    ------
    EventsError
        A condition a contrast needs appears in no run at all (names the
        contrast, the condition and the conditions that do exist).
    """
    existing = set().union(*conditions_by_run.values()) if conditions_by_run else set()
    result: dict[str, dict[str, list[str]]] = {}
    for contrast, wanted in needed.items():
        for condition in sorted(wanted):
            if condition not in existing:
                raise EventsError(f"contrast '{contrast}' needs condition '{condition}', which appears in no run's "
                                  f"events; conditions present: {sorted(existing)}; fix the contrast weights or "
                                  "events.condition_column")
        absent = {run: sorted(set(wanted) - set(present)) for run, present in conditions_by_run.items()}
        result[contrast] = {run: missing for run, missing in sorted(absent.items()) if missing}
    return result


def check_contrast_keys(events_paths: Sequence[str | os.PathLike[str]], condition_column: str,
                        contrasts: Mapping[str, Mapping[str, Any]], *, hrf: str = "double_gamma",
                        fir_bins: int = 10, conditions: Sequence[str] = (),
                        modulators: Mapping[str, Sequence[str]] | None = None,
                        confound_columns: Sequence[str] = (), derivatives: bool = False,
                        squares: bool = False) -> dict[str, dict[str, list[str]]]:
    """Check every contrast key against the conditions of the discovered runs' events files.

    Parameters
    ----------
    events_paths : sequence of path-like
        The events TSV of every discovered run; files that do not exist are
        skipped (Snakemake reports a missing input of a job it needs).
    condition_column : str
        ``events.condition_column``.
    contrasts : mapping
        The ``contrasts`` section: name -> ``{weights}`` or ``{rows}``.
    hrf, fir_bins : str, int
        ``design.hrf`` and ``design.fir_bins`` (which basis columns exist).
    conditions : sequence of str
        ``events.conditions`` (empty: every condition found is modelled).
    modulators : mapping of str to sequence of str, optional
        ``events.modulators``.
    confound_columns : sequence of str
        ``confounds.columns`` (names or glob patterns).
    derivatives, squares : bool
        ``confounds.derivatives`` / ``confounds.squares``.

    Returns
    -------
    dict of str to dict of str to list of str
        Contrast -> {events file -> conditions it needs that the file lacks}
        (those runs make the contrast non-estimable; see
        :func:`check_conditions_present`).

    Raises
    ------
    ContrastError
        A key names no condition found and no design column: one line naming
        the contrast, the key and the conditions found.
    ConfigError
        ``events.modulators`` names a condition that no events file has.
    EventsError
        An events file without the condition column.
    """
    by_file = {str(p): read_conditions(p, condition_column) for p in events_paths if os.path.exists(p)}
    if not by_file:
        return {}
    found = set().union(*by_file.values())
    modelled = set(conditions) & found if conditions else found
    mods = modulators or {}
    listed = f"conditions in the {len(by_file)} events files (column '{condition_column}'): {sorted(found)}"
    for condition in sorted(map(str, mods)):
        if condition not in found:
            # a misspelt condition would otherwise leave its modulator silently out of the model
            raise ConfigError(f"config events.modulators.{condition}: no events file has condition "
                              f"'{condition}', so its modulators would model nothing; fix the condition name; "
                              f"{listed}")
    suffixes = MODEL_SUFFIXES.get(hrf, ())
    column_condition: dict[str, str] = {}
    for c in modelled:
        extra = [f"{FIR_PREFIX}{k:02d}" for k in range(int(fir_bins))] if hrf == "fir" else list(suffixes)
        column_condition.update({f"{c}{BASIS_SEPARATOR}{s}": c for s in extra})
        if hrf != "fir":
            column_condition.update({f"{c}{MODULATOR_INFIX}{m}": c for m in mods.get(c, ())})
    needed: dict[str, set[str]] = {}
    for name, spec in contrasts.items():
        needed[name] = set()
        for where, weights, in_rows in _weight_rows(spec):
            for key in map(str, weights):
                if key in modelled:
                    needed[name].add(key)
                    continue
                if key in column_condition:
                    needed[name].add(column_condition[key])
                    continue
                cond = key[: -len(ALL_SUFFIX)] if key.endswith(ALL_SUFFIX) else None
                if cond in modelled:
                    if not in_rows:
                        raise ContrastError(f"contrast '{name}': key '{key}' selects several columns; use it in an "
                                            f"F contrast (contrasts.{name}.rows) or name one column")
                    needed[name].add(cond)
                    continue
                if _NUISANCE.fullmatch(key) or _confound_name(key, confound_columns, derivatives, squares):
                    continue
                raise ContrastError(f"contrast '{name}': key '{key}' (contrasts.{name}.{where}) "
                                    f"{_why(key, found, modelled, suffixes, hrf)}; {listed}")
    return check_conditions_present({p: s & modelled for p, s in by_file.items()}, needed)


def _why(key: str, found: set[str], modelled: set[str], suffixes: tuple[str, ...], hrf: str) -> str:
    """Why a key is not a condition or column, and how to fix it."""
    new = renamed_column(key)
    if new is not None:
        return f"is an old design column name; the column is now called '{new}'"
    if key in found:
        return "is a condition of the events files that events.conditions does not list; add it there"
    head, _, tail = key.partition(BASIS_SEPARATOR)
    if tail and head in modelled:
        if tail in (LATENCY_BASIS, WIDTH_BASIS):
            models = "double_gamma_latency_width" if tail == WIDTH_BASIS else \
                "double_gamma_latency or double_gamma_latency_width"
            return f"needs design.hrf {models} (design.hrf is '{hrf}')"
        if key.startswith(head + MODULATOR_INFIX):
            column = key[len(head + MODULATOR_INFIX):]
            return f"names no modulator of '{head}'; add '{column}' to events.modulators.{head}"
        if tail.startswith(FIR_PREFIX):
            return f"names no FIR bin of the design (design.hrf '{hrf}', design.fir_bins)"
        others = ", ".join(head + BASIS_SEPARATOR + s for s in suffixes) or "none"
        return f"names no column of condition '{head}' (its other response columns: {others})"
    return "names no condition of any events file and no design column; fix the key or events.condition_column"


def check_config_contrasts(config: Mapping[str, Any],
                           events_paths: Sequence[str | os.PathLike[str]]) -> dict[str, dict[str, list[str]]]:
    """:func:`check_contrast_keys` with its settings taken from a validated config (defaults filled in)."""
    events, design, confounds = config["events"], config["design"], config["confounds"]
    return check_contrast_keys(events_paths, events["condition_column"], config["contrasts"], hrf=design["hrf"],
                               fir_bins=design["fir_bins"], conditions=events["conditions"],
                               modulators=events["modulators"], confound_columns=confounds["columns"],
                               derivatives=confounds["derivatives"], squares=confounds["squares"])


def _shown(name: str) -> str:
    """A name as an error shows it: long names cut to 40 characters."""
    return repr(name) if len(name) <= 40 else repr(name[:40]) + f"... ({len(name)} characters)"


def check_name(key: str, name: Any) -> None:
    """Check one name that becomes a folder name (and a Snakemake wildcard value).

    Parameters
    ----------
    key : str
        Where the name sits in the config, e.g. ``contrasts`` or ``thresholds.group``.
    name : object
        The name (a mapping key of the config; YAML may make it a number).

    Raises
    ------
    ConfigError
        Not a string of letters, digits and underscores starting with a letter
        or digit, or longer than :data:`MAX_NAME_LENGTH` characters.
    """
    text = str(name)
    if not is_folder_name(name):
        raise ConfigError(f"config {key}: name {_shown(text)} is not usable as a folder name; rename it to letters, "
                          "digits and underscores, starting with a letter or digit (quote it in YAML)")
    if len(text) > MAX_NAME_LENGTH:
        raise ConfigError(f"config {key}: name {_shown(text)} is longer than {MAX_NAME_LENGTH} characters (it "
                          f"becomes a folder name, limited to 255 bytes); rename it to at most {MAX_NAME_LENGTH} "
                          "characters")


def check_config_names(config: Mapping[str, Any]) -> None:
    """Check every name of a validated config that becomes a folder name (see :func:`check_name`).

    Parameters
    ----------
    config : mapping
        The config after schema validation (defaults filled in).

    Raises
    ------
    ConfigError
        Names the key and the name.
    """
    for name in config.get("contrasts", {}):
        check_name("contrasts", name)
    for level, settings in (config.get("thresholds") or {}).items():
        for name in settings or {}:
            check_name(f"thresholds.{level}", name)
    for model, spec in (config.get("group_models") or {}).items():
        check_name("group_models", model)
        for name in (spec or {}).get("group_contrasts", {}):
            check_name(f"group_models.{model}.group_contrasts", name)


def check_output_dir(output_dir: str | os.PathLike[str], root: str | os.PathLike[str],
                     workdir: str | os.PathLike[str] = ".") -> None:
    """Refuse an output folder that is the input root, lies inside it or holds it.

    Outputs written among the inputs could be taken for inputs by a later run's
    discovery, and clearing the results would delete the data. One place inside
    the root is allowed: its ``derivatives`` folder (``<root>/derivatives/<name>``),
    where BIDS puts the outputs of processing (common practice); run discovery
    reads only the files the input patterns name, so results there stay apart
    from the inputs unless a pattern points into the same folder.

    Parameters
    ----------
    output_dir, root : path-like
        ``output_dir`` and ``inputs.root``; relative paths are relative to ``workdir``.
    workdir : path-like
        The working folder (Snakemake's ``--directory``).

    Raises
    ------
    ConfigError
        One line naming both folders and the fix.
    """
    out = os.path.realpath(os.path.join(workdir, output_dir))
    data = os.path.realpath(os.path.join(workdir, root))
    if out == data:
        how = "is the input folder inputs.root"
    elif out.startswith(data.rstrip(os.sep) + os.sep):
        inside = os.path.relpath(out, data).split(os.sep)
        if inside[0] == "derivatives" and len(inside) > 1:
            return
        how = "lies inside the input folder inputs.root (only its derivatives/<name> folder may hold results)"
    elif data.startswith(out.rstrip(os.sep) + os.sep):
        how = "holds the input folder inputs.root"
    else:
        return
    raise ConfigError(f"config output_dir {os.fspath(output_dir)!r} ({out}) {how} ({data}); set output_dir to a "
                      "folder outside the data, e.g. results, or in the data's derivatives folder")


def check_contrast_weights(contrasts: Mapping[str, Mapping[str, Any]]) -> None:
    """Refuse a contrast whose weights (or one of whose F rows) are all zero.

    Such a contrast tests nothing; found here, it stops the workflow before the
    fits instead of at the contrast step after them. (The schema has already
    checked that every weight is a number.)

    Raises
    ------
    ConfigError
        Names the key (``contrasts.<name>.weights`` or ``contrasts.<name>.rows[i]``).
    """
    for name, spec in contrasts.items():
        for where, weights, _ in _weight_rows(spec):
            if weights and all(isinstance(w, (int, float)) and w == 0 for w in weights.values()):
                raise ConfigError(f"config contrasts.{name}.{where}: every weight is 0, so the contrast tests "
                                  "nothing; give at least one non-zero weight or delete it")


def group_design_columns(spec: Mapping[str, Any]) -> tuple[list[str], list[str]]:
    """The columns a group model's design can have, as group contrast keys name them.

    Parameters
    ----------
    spec : mapping
        One ``group_models`` entry (defaults filled in).

    Returns
    -------
    exact : list of str
        Column names known without the participants table: ``mean`` (one_sample,
        regression) and the covariates (a numeric covariate keeps its name).
    prefixes : list of str
        Columns whose indicators are ``<column>[<level>]``: the group column
        (two_sample, paired), the pair column (paired), the covariates (a text
        covariate) and the site column when ``site_as_covariate``. The levels
        come from participants.tsv and are checked by the group step.

    Notes
    -----
    The coding is :mod:`glmsteps.group`'s (its module docstring, "Design coding").
    """
    design = spec.get("design")
    covariates = [str(c) for c in spec.get("covariates") or []]
    exact = (["mean"] if design in ("one_sample", "regression") else []) + covariates
    prefixes = list(covariates)
    if design in ("two_sample", "paired"):
        prefixes.append(str(spec.get("group_column", "group")))
    if design == "paired":
        prefixes.append(str(spec.get("pair_column", "pair")))
    if spec.get("site_column") and spec.get("site_as_covariate", True):
        prefixes.append(str(spec["site_column"]))
    return exact, prefixes


def check_group_contrast_keys(group_models: Mapping[str, Mapping[str, Any]]) -> None:
    """Check that every group contrast key can be a column of its model's design (see
    :func:`group_design_columns`), so that a typo stops the workflow before the first-level work.

    Raises
    ------
    ConfigError
        One line naming the key, the design's possible columns and the fix.
    """
    for model, spec in group_models.items():
        exact, prefixes = group_design_columns(spec)
        for name, weights in (spec.get("group_contrasts") or {}).items():
            for key in map(str, weights or {}):
                head, bracket, rest = key.partition("[")
                if key in exact or (bracket and rest.endswith("]") and head in prefixes):
                    continue
                possible = exact + [f"{p}[<level>]" for p in prefixes]
                raise ConfigError(f"config group_models.{model}.group_contrasts.{name}: key {key!r} names no column "
                                  f"of the {spec.get('design')} group design (its columns: "
                                  f"{', '.join(possible) or 'none'}; levels as in participants.tsv); fix the key, or "
                                  f"add the column to group_models.{model}.covariates")


def check_participants_file(config: Mapping[str, Any], workdir: str | os.PathLike[str] = ".") -> None:
    """Refuse group models without the participants table they read (Snakemake would report a missing
    input of every group job, in many lines).

    Raises
    ------
    ConfigError
        ``group_models`` is not empty and ``inputs.root``/``inputs.participants`` is no file.
    """
    models = sorted(config.get("group_models") or {})
    inputs = config["inputs"]
    path = os.path.join(workdir, inputs["root"], inputs["participants"])
    if models and not os.path.isfile(path):
        raise ConfigError(f"config inputs.participants: {os.path.normpath(path)} is not a file, and the group "
                          f"models ({', '.join(models)}) read it; set inputs.participants to the participants "
                          "table (relative to inputs.root), or remove the group models")


def check_config_start(config: Mapping[str, Any], workdir: str | os.PathLike[str] = ".",
                       config_files: Sequence[str | os.PathLike[str]] = ()) -> None:
    """The config checks made when the workflow starts, before any job and before the DAG is built.

    The config files (Snakemake's ``--configfile``, already read by Snakemake) are
    read again with :func:`glmsteps.configfile.load_config`, which refuses a key
    given twice in one mapping: Snakemake's reader keeps the last one silently
    (a contrast or a setting replaced without a word).

    :func:`check_config_names`, :func:`check_contrast_weights`, :func:`check_group_contrast_keys`,
    :func:`check_participants_file`, then :func:`check_output_dir`.

    Raises
    ------
    ConfigError
    """
    from .configfile import load_config

    for path in config_files:
        load_config(path)
    check_config_names(config)
    check_contrast_weights(config["contrasts"])
    check_group_contrast_keys(config.get("group_models") or {})
    check_participants_file(config, workdir)
    check_output_dir(config["output_dir"], config["inputs"]["root"], workdir)
