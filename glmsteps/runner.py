"""Run the glmsteps workflow with Snakemake: find its files, check config files, build the command.

The workflow (``Snakefile``, ``rules/``, ``scripts/``, ``config/``, ``profiles/``) sits at the
top of a clone. A wheel carries a copy of the same files inside the package, as
``glmsteps/_workflow/`` (``setup.py`` copies them when the wheel is built), so that
``glmsteps run`` works after a plain ``pip install`` as well. This module imports only the
standard library until a config file is read (``glmsteps.configfile``), and never imports
snakemake: the workflow runs in a ``python -m snakemake`` process of the same interpreter.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

from .errors import ConfigError, GlmstepsError

#: The workflow's files and folders, relative to its folder (what a wheel must carry).
WORKFLOW_PARTS: tuple[str, ...] = ("Snakefile", "rules", "scripts", "config", "profiles")
#: Folder of the workflow's copy inside an installed package.
PACKAGED_WORKFLOW = "_workflow"
#: Snakemake options that name config files (each takes one or more paths).
_CONFIGFILE_OPTIONS = ("--configfile", "--configfiles")
#: Top-level key that makes Snakemake evaluate the config file as a template (Python expressions).
TEMPLATE_KEY = "__use_yte__"


def is_workflow_dir(folder: Path) -> bool:
    """Whether ``folder`` holds the glmsteps workflow (its Snakefile and the rules it includes)."""
    return (folder / "Snakefile").is_file() and (folder / "rules" / "common.smk").is_file()


def workflow_dir() -> Path:
    """The folder holding the Snakefile that ``glmsteps run`` uses.

    A clone (or an editable install of one) uses its own top-level files, so edits to the
    rules take effect at once; an installed wheel uses its packaged copy.

    Returns
    -------
    Path
        Absolute folder with ``Snakefile``, ``rules/``, ``scripts/``, ``config/``, ``profiles/``.

    Raises
    ------
    GlmstepsError
        Neither location holds the workflow (a broken installation).
    """
    package = Path(__file__).resolve().parent
    for folder in (package.parent, package / PACKAGED_WORKFLOW):
        if is_workflow_dir(folder):
            return folder
    raise GlmstepsError(f"{package}: the workflow files (Snakefile, rules/) are not installed with glmsteps; "
                        "reinstall it from a wheel or a clone (pip install glmsteps)")


def _option_values(args: Sequence[str], matches: Callable[[str], bool]) -> list[list[tuple[int, str]]]:
    """Each occurrence of a long option for which ``matches(name)`` holds: its (index, value) pairs.

    Handles ``--opt=value`` and ``--opt v1 v2 ...`` (values up to the next argument that
    starts with ``-``), as Snakemake's parser reads them.
    """
    found: list[list[tuple[int, str]]] = []
    i = 0
    while i < len(args):
        name, eq, value = args[i].partition("=")
        if name.startswith("--") and matches(name):
            if eq:
                found.append([(i, value)])
            else:
                found.append([])
                i += 1
                while i < len(args) and not args[i].startswith("-"):
                    found[-1].append((i, args[i]))
                    i += 1
                continue
        i += 1
    return found


def _is_configfile_option(name: str) -> bool:
    """``--configfile`` or ``--configfiles`` (Snakemake's parser refuses the ambiguous abbreviations)."""
    return name in _CONFIGFILE_OPTIONS


def config_files_in(args: Sequence[str]) -> list[str]:
    """The config files Snakemake will read from its arguments (``--configfile`` / ``--configfiles``).

    When the option is given more than once, Snakemake keeps the last one, and so does this.

    Examples
    --------
    >>> config_files_in(["--configfile", "a.yaml", "b.yaml", "--cores", "8"])
    ['a.yaml', 'b.yaml']
    """
    occurrences = _option_values(args, _is_configfile_option)
    return [value for _, value in occurrences[-1]] if occurrences else []


def check_config_file(path: str | os.PathLike[str]) -> dict:
    """Read a config file safely (nothing in it is executed) and refuse what Snakemake would evaluate.

    Parameters
    ----------
    path : path-like
        YAML or JSON config file.

    Returns
    -------
    dict
        The raw mapping (schema validation stays the workflow's job).

    Raises
    ------
    ConfigError
        One line naming the file (and line): a syntax error, a tag other than plain data
        (``!!python/...``), a key given twice, an empty file or a top level that is not a
        mapping (all from ``glmsteps.configfile.load_config``), or the template switch
        ``__use_yte__``, with which Snakemake would evaluate Python expressions in the file.
    """
    from .configfile import load_config

    config = load_config(path)
    if TEMPLATE_KEY in config:
        raise ConfigError(f"{path}: top-level key {TEMPLATE_KEY!r} would make Snakemake evaluate the file as a "
                          "template (Python expressions); glmsteps config files hold plain values only: "
                          f"remove {TEMPLATE_KEY} and write the values out")
    return config


def snakemake_command(args: Sequence[str], workflow: Path | None = None, python: str | None = None) -> list[str]:
    """The ``python -m snakemake`` command that runs the workflow with the user's arguments.

    Parameters
    ----------
    args : sequence of str
        Snakemake arguments (``--cores 8 --configfile my.yaml -n`` ...), passed on unchanged
        except a ``--profile`` that names one of the workflow's own profiles by its path inside
        the workflow (``config/slurm``): that becomes the absolute path of the installed copy,
        unless the same path exists in the current folder.
    workflow : Path, optional
        Workflow folder (default: :func:`workflow_dir`).
    python : str, optional
        Interpreter (default: the running one, so that jobs find this glmsteps).

    Returns
    -------
    list of str

    Raises
    ------
    ConfigError
        ``args`` name another Snakefile (``-s`` / ``--snakefile``): ``glmsteps run`` always
        runs glmsteps' own workflow.
    """
    folder = workflow if workflow is not None else workflow_dir()
    args = list(args)
    options = args[:args.index("--")] if "--" in args else args  # after "--" come targets only
    for arg in options:
        if (arg.startswith("-s") and not arg.startswith("--")) or \
                (arg.startswith("--sn") and "--snakefile".startswith(arg.partition("=")[0])):
            raise ConfigError(f"argument {arg!r}: glmsteps run always runs glmsteps' own workflow "
                              f"({folder / 'Snakefile'}); drop the option, or call snakemake directly "
                              "for another Snakefile")
    for i, value in (pair for occurrence in _option_values(args, lambda name: name == "--profile")
                     for pair in occurrence):
        packaged = folder / value
        if not Path(value).exists() and packaged.is_dir():
            args[i] = args[i].replace(value, str(packaged)) if args[i].startswith("--") else str(packaged)
    return [python or sys.executable, "-m", "snakemake", "--snakefile", str(folder / "Snakefile"), *args]


def prepare_run(args: Sequence[str]) -> list[str]:
    """Check every config file named in ``args``, then return the Snakemake command.

    Without ``--configfile`` the workflow uses its own ``config/config.yaml`` (the toy study),
    which is checked as well.

    Raises
    ------
    ConfigError
        As :func:`check_config_file` and :func:`snakemake_command`.
    """
    folder = workflow_dir()
    command = snakemake_command(args, folder)
    files = config_files_in(args) or [str(folder / "config" / "config.yaml")]
    for path in files:
        check_config_file(path)
    return command
