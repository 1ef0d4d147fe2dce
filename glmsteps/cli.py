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


_COMMANDS = {"audit": _run_audit, "diff": _run_diff, "toy-study": _run_toy_study}


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
        a failed verification; 2 a user error (one line on stderr).
    """
    args = build_parser().parse_args(argv)
    try:
        return _COMMANDS[args.command](args)
    except GlmstepsError as exc:
        print(f"glmsteps {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_USER_ERROR


if __name__ == "__main__":
    sys.exit(main())
