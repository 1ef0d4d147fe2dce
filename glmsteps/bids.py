"""BIDS-style path patterns: run discovery and entity parsing (file names only); the results'
dataset description.

Discovery matches the configured ``bold`` pattern against the file system with
one ``glob`` and a regular expression; no image is opened, so the Snakefile
stays cheap to parse on a cluster where every job re-reads it.
"""

from __future__ import annotations

import glob
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

from .errors import ConfigError

#: Placeholders a path pattern may use; ``session`` is optional.
PLACEHOLDERS: tuple[str, ...] = ("subject", "session", "task", "run")
_VALUE = r"[A-Za-z0-9]+"


@dataclass(frozen=True, order=True)
class RunKey:
    """One run of one subject, identified by its BIDS entities."""

    subject: str
    task: str
    run: str
    session: str = ""

    @property
    def run_id(self) -> str:
        """Folder name of the run under its subject, e.g. ``ses-1_task-stroop_run-2``."""
        parts = ([f"ses-{self.session}"] if self.session else []) + [f"task-{self.task}", f"run-{self.run}"]
        return "_".join(parts)

    def fill(self, pattern: str) -> str:
        """Substitute this run's entities into a path pattern."""
        return pattern.format(subject=self.subject, session=self.session, task=self.task, run=self.run)


def parse_run_id(subject: str, run_id: str) -> RunKey:
    """Inverse of :attr:`RunKey.run_id`.

    Examples
    --------
    >>> parse_run_id("01", "task-stroop_run-2")
    RunKey(subject='01', task='stroop', run='2', session='')
    """
    m = re.fullmatch(rf"(?:ses-(?P<session>{_VALUE})_)?task-(?P<task>{_VALUE})_run-(?P<run>{_VALUE})", run_id)
    if not m:
        raise ConfigError(f"run folder name {run_id!r} is not of the form [ses-X_]task-Y_run-Z")
    return RunKey(subject=subject, task=m["task"], run=m["run"], session=m["session"] or "")


def run_label(wildcards: Mapping[str, str]) -> str:
    """A run named as in its folder, for figure titles: ``sub-04 task-beacon_run-1``.

    Parameters
    ----------
    wildcards : mapping of str to str
        ``subject`` and ``run_id`` (the workflow's wildcards), or ``subject``,
        ``session``, ``task``, ``run``; other keys are ignored, empty values
        skipped.

    Returns
    -------
    str
        ``""`` when nothing identifies the run.

    Examples
    --------
    >>> run_label({"subject": "04", "run_id": "task-beacon_run-1"})
    'sub-04 task-beacon_run-1'
    >>> run_label({"subject": "01", "session": "2", "task": "demo", "run": "1"})
    'sub-01 ses-2_task-demo_run-1'
    """
    get = {k: str(v) for k, v in dict(wildcards).items() if v}
    parts = [f"sub-{get['subject']}"] if "subject" in get else []
    if "run_id" in get:
        parts.append(get["run_id"])
    else:
        entities = [f"{prefix}-{get[key]}" for key, prefix in (("session", "ses"), ("task", "task"), ("run", "run"))
                    if key in get]
        if entities:
            parts.append("_".join(entities))
    return " ".join(parts)


def check_pattern(name: str, pattern: str) -> None:
    """Check that a path pattern uses only known placeholders and includes subject, task, run."""
    used = set(re.findall(r"{([^{}]*)}", pattern))
    unknown = used - set(PLACEHOLDERS)
    if unknown:
        raise ConfigError(f"config inputs.{name}: unknown placeholder(s) {sorted(unknown)} in {pattern!r}; "
                          f"use only {{subject}}, {{session}}, {{task}}, {{run}}")
    missing = {"subject", "task", "run"} - used
    if name == "bold" and missing:
        raise ConfigError(f"config inputs.bold: pattern {pattern!r} lacks {sorted(missing)}; "
                          "the bold pattern must identify subject, task and run")


def pattern_to_regex(pattern: str) -> re.Pattern[str]:
    """Compile a path pattern into a regex with one named group per placeholder."""
    out, pos, seen = [], 0, set()
    for m in re.finditer(r"{(subject|session|task|run)}", pattern):
        out.append(re.escape(pattern[pos:m.start()]))
        name = m.group(1)
        out.append(f"(?P={name})" if name in seen else f"(?P<{name}>{_VALUE})")
        seen.add(name)
        pos = m.end()
    out.append(re.escape(pattern[pos:]))
    return re.compile("".join(out))


def discover_runs(root: str | os.PathLike[str], bold_pattern: str) -> list[RunKey]:
    """Find every run whose BOLD file matches ``bold_pattern`` below ``root``.

    Parameters
    ----------
    root : path-like
        Dataset folder.
    bold_pattern : str
        Path pattern relative to ``root`` with ``{subject}``, ``{task}``,
        ``{run}`` and optionally ``{session}``.

    Returns
    -------
    list of RunKey
        Sorted by subject, task, run, session.
    """
    check_pattern("bold", bold_pattern)
    root_path = Path(root)
    if not root_path.is_dir():
        raise ConfigError(f"config inputs.root: folder {root} does not exist; set it to your dataset folder")
    regex = pattern_to_regex(bold_pattern)
    wildcard = re.sub(r"{[^{}]*}", "*", bold_pattern)
    runs = []
    for found in glob.glob(wildcard, root_dir=root_path):
        m = regex.fullmatch(found.replace(os.sep, "/"))
        if m:
            g = m.groupdict()
            runs.append(RunKey(subject=g["subject"], task=g["task"], run=g["run"], session=g.get("session") or ""))
    return sorted(set(runs))


#: The BIDS version the results' ``dataset_description.json`` declares (the toy study's too).
BIDS_VERSION = "1.9.0"
#: File name of a BIDS dataset's description, at the top of the dataset.
DATASET_DESCRIPTION = "dataset_description.json"


def derivative_description(version: str) -> dict[str, object]:
    """The ``dataset_description.json`` that marks the output folder as a BIDS derivative dataset.

    Parameters
    ----------
    version : str
        The glmsteps version that wrote the results.

    Returns
    -------
    dict
        ``Name``, ``BIDSVersion``, ``DatasetType`` (``"derivative"``) and ``GeneratedBy``
        (one entry: glmsteps and its version), the fields the BIDS specification requires of
        a derivative dataset's description (BIDS 1.9, "Derived dataset and pipeline
        description"; from memory).

    Examples
    --------
    >>> derivative_description("1.2.3")["GeneratedBy"]
    [{'Name': 'glmsteps', 'Version': '1.2.3', 'Description': 'task-fMRI GLM statistical maps'}]
    """
    return {
        "Name": "glmsteps statistical maps",
        "BIDSVersion": BIDS_VERSION,
        "DatasetType": "derivative",
        "GeneratedBy": [{"Name": "glmsteps", "Version": version, "Description": "task-fMRI GLM statistical maps"}],
    }
