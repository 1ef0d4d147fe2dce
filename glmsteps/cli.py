"""The ``glmsteps`` console script.

Subcommands
-----------
``audit PATH [--root DIR] [--json] [--verify]``
    Print the chain of steps that made an output, back to the raw inputs.
    With ``--verify``, re-hash every recorded file; exit 1 if any changed or is
    missing.
``diff A B [--root DIR] [--json]``
    Show the settings and raw inputs that differ between two outputs'
    lineages; exit 0 for identical lineage, 1 otherwise.
``toy-study DIR [--seed N]``
    Write the invented demo study to ``DIR``.
``run [SNAKEMAKE ARGUMENTS]``
    Run the workflow with Snakemake in the current folder (``--configfile my.yaml --cores 8
    -n`` ...: every argument goes to Snakemake). The config files are read safely first: a
    syntax error or a tag that would run code is one line naming the file and the line, and
    Snakemake is not started.
``workflow-dir``
    Print the folder holding the workflow's Snakefile, rules and ``config/config.yaml`` (the
    template to copy for a study of one's own).

User errors (a missing file, an output without provenance) print one line on
stderr and exit with code 2.
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from pathlib import Path

from . import __version__
from .errors import GlmstepsError

#: Exit codes.
EXIT_OK, EXIT_DIFFERS, EXIT_USER_ERROR = 0, 1, 2


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``glmsteps`` command."""
    parser = argparse.ArgumentParser(prog="glmsteps", description="Task-fMRI GLM workflow: tools around its outputs.")
    parser.add_argument("--version", action="version", version=f"glmsteps {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    audit = sub.add_parser("audit", help="show the chain of steps and settings that made an output",
                           description="Show the chain of steps that made an output, back to its raw inputs.")
    audit.add_argument("path", metavar="PATH", help="an output written by glmsteps (or its JSON sidecar)")
    audit.add_argument("--root", metavar="DIR", default=None,
                       help="folder the workflow ran in (recorded paths are relative to it); "
                            "default: found by walking up from PATH")
    audit.add_argument("--json", action="store_true", help="print JSON instead of text")
    audit.add_argument("--full", action="store_true",
                       help="every job and file of the chain (default: each step once, raw inputs by kind)")
    audit.add_argument("--verify", action="store_true",
                       help="re-hash the recorded files; exit 1 if any changed or is missing")

    diff = sub.add_parser("diff", help="show what differs between the lineages of two outputs",
                          description="Show settings and raw inputs that differ between two outputs' lineages; "
                                      "exit 0 when the lineage is identical, 1 otherwise.")
    diff.add_argument("path_a", metavar="A", help="first output")
    diff.add_argument("path_b", metavar="B", help="second output")
    diff.add_argument("--root", metavar="DIR", default=None,
                      help="folder both workflows ran in; default: found for each output separately")
    diff.add_argument("--json", action="store_true", help="print JSON instead of text")

    toy = sub.add_parser("toy-study", help="write the invented demo study",
                         description="Write the invented demo study (BOLD, events, confounds) to DIR.")
    toy.add_argument("dest", metavar="DIR", type=Path, help="destination folder")
    toy.add_argument("--seed", metavar="N", type=int, default=None,
                     help="random seed (default: the generator's own)")

    run = sub.add_parser(
        "run", help="run the workflow with Snakemake (all arguments go to Snakemake)",
        description="Run the glmsteps workflow with Snakemake in the current folder. Every argument is "
                    "passed to Snakemake (python -m snakemake --help lists them), e.g. "
                    "glmsteps run --configfile my.yaml --cores 8 -n. The config files are read safely "
                    "first; a mistake in one is reported as one line before Snakemake starts. "
                    "Without --configfile the toy study's config is used (data in toy_study/data: "
                    "glmsteps toy-study toy_study/data). --profile config/slurm finds the cluster "
                    "profile shipped with the workflow.")
    run.add_argument("snakemake_args", metavar="SNAKEMAKE_ARGUMENTS", nargs="*",
                     help="arguments for Snakemake")

    sub.add_parser("workflow-dir", help="print the folder of the workflow's Snakefile, rules and config",
                   description="Print the folder holding the Snakefile, rules/, scripts/, config/ and profiles/ "
                               "that glmsteps run uses; copy config/config.yaml from there to start a study.")
    return parser


def _run_audit(args: argparse.Namespace) -> int:
    from . import audit

    chain = audit.load_chain(args.path, args.root)
    checks = None
    if args.verify:
        root = chain.root
        checks = audit.verify_chain(chain, lambda p: audit.current_sha256(p, root),
                                    target_sha256=audit.hash_file(args.path))
    if args.json:
        sys.stdout.write(audit.render_json(chain, checks))
    else:
        sys.stdout.write(audit.render_text(chain) if args.full else audit.render_summary(chain))
        if checks is not None:
            sys.stdout.write(audit.render_checks(checks))
    if checks is not None and any(c.status not in ("ok", "unrecorded") for c in checks):
        return EXIT_DIFFERS
    return EXIT_OK


def _run_diff(args: argparse.Namespace) -> int:
    import json

    from . import audit

    result = audit.diff_chains(audit.load_chain(args.path_a, args.root), audit.load_chain(args.path_b, args.root))
    if args.json:
        sys.stdout.write(json.dumps(audit.diff_to_dict(result), indent=2, ensure_ascii=False) + "\n")
    else:
        sys.stdout.write(audit.render_diff_text(result))
    return EXIT_OK if result.identical else EXIT_DIFFERS


def _run_toy_study(args: argparse.Namespace) -> int:
    try:
        from .toystudy import write_toy_study
    except ModuleNotFoundError as exc:
        if exc.name != f"{__package__}.toystudy":
            raise
        raise GlmstepsError("the demo study generator (glmsteps.toystudy) is not installed; "
                            "update glmsteps") from exc
    written = write_toy_study(args.dest) if args.seed is None else write_toy_study(args.dest, seed=args.seed)
    print(f"toy study written to {written}")
    return EXIT_OK


def _run_workflow_dir(args: argparse.Namespace) -> int:
    from .runner import workflow_dir

    print(workflow_dir())
    return EXIT_OK


def _run_workflow(snakemake_args: list[str]) -> int:
    """``glmsteps run``: check the config files, then become ``python -m snakemake`` (never returns then)."""
    import os

    from .runner import prepare_run

    if any(arg in ("-h", "--help") for arg in snakemake_args):
        build_parser().parse_args(["run", "--help"])  # prints the help, exits 0
    try:
        command = prepare_run(snakemake_args)
    except GlmstepsError as exc:
        print(f"glmsteps run: error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR
    sys.stdout.flush()
    sys.stderr.flush()
    # exec, not a child process: Snakemake gets the terminal, Ctrl-C and the exit status as if started itself
    os.execv(command[0], command)
    return EXIT_OK  # not reached


_COMMANDS = {"audit": _run_audit, "diff": _run_diff, "toy-study": _run_toy_study,
             "workflow-dir": _run_workflow_dir}


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``glmsteps`` command; return its exit code.

    Parameters
    ----------
    argv : sequence of str, optional
        Arguments without the program name (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        0 success / identical lineage / all files verified; 1 a difference or
        a failed verification; 2 a user error (one line on stderr). ``run``
        replaces this process with Snakemake, whose exit status is the command's.
    """
    argv = list(sys.argv[1:] if argv is None else argv)
    if argv[:1] == ["run"]:
        # not through argparse: Snakemake's options (-n, --cores 8, ...) must pass unchanged
        return _run_workflow(argv[1:])
    args = build_parser().parse_args(argv)
    try:
        return _COMMANDS[args.command](args)
    except GlmstepsError as exc:
        print(f"glmsteps {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR


if __name__ == "__main__":
    sys.exit(main())
