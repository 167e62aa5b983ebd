"""prescreen: budget-aware screening of 2D candidates for high spin-orbit spillage.

Each command lives in its own module under ``prescreen.cli`` with ``add_arguments`` and
``run``; the module's first docstring line is its one-line help. Heavy libraries are
imported inside ``run`` so that ``prescreen --help`` answers at once.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

__all__ = ["main", "COMMANDS"]

#: Command name -> module under prescreen.cli, in the order shown by --help.
COMMANDS: dict[str, str] = {
    "create": "create",
    "add": "add",
    "ingest": "ingest",
    "status": "status",
    "train": "train",
    "rank": "rank",
    "propose": "propose",
    "label": "label",
    "z2": "z2",
    "report": "report",
}

#: One-line help per command (kept here so --help does not import every module).
HELP: dict[str, str] = {
    "create": "Create a campaign folder from candidate sources.",
    "add": "Add more candidate sources to an existing campaign.",
    "ingest": "Ingest DFT spillage results (CSV or JSON) into a campaign.",
    "status": "Show what a campaign holds: candidates, flags, labels, rounds.",
    "train": "Train the classifier on the open data plus the campaign's own results.",
    "rank": "Rank every candidate by its probability of high spillage (CSV and Parquet).",
    "propose": "Propose the next batch to compute under a core-hour budget.",
    "label": "Compute spillage with the built-in DFT labeller (GPAW) and ingest it.",
    "z2": "Compute the Z2 invariant of candidates with DFT (GPAW): parities or Wilson loops.",
    "report": "Write the allocation report (one HTML file) for a campaign round.",
}


def build_parser() -> argparse.ArgumentParser:
    from prescreen import __version__

    parser = argparse.ArgumentParser(
        prog="prescreen",
        description="Rank 2D candidates by their probability of high spin-orbit spillage "
        "and plan which to compute next under a core-hour budget.",
    )
    parser.add_argument("--version", action="version", version=f"prescreen {__version__}")
    parser.add_argument("--traceback", action="store_true",
                        help="show the full traceback when an error occurs")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        sub.add_parser(name, help=HELP[name], description=HELP[name])
    return parser


def _plain_warnings() -> None:
    """Show prescreen's own warnings as one ``warning: ...`` line, without source lines."""
    import warnings

    from prescreen.errors import PrescreenWarning

    shown = warnings.showwarning

    def show(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, PrescreenWarning):
            print(f"warning: {message}", file=sys.stderr)
        else:
            shown(message, category, filename, lineno, file, line)

    warnings.showwarning = show


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status (0 ok, 2 user error)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    # Find the command name first, then let only that module add its own options.
    command = next((a for a in argv if not a.startswith("-")), None)
    if command in COMMANDS:
        module = importlib.import_module(f"prescreen.cli.{COMMANDS[command]}")
        sub_parsers = next(a for a in parser._actions
                           if isinstance(a, argparse._SubParsersAction))
        module.add_arguments(sub_parsers.choices[command])
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 0
    from prescreen.errors import PrescreenError

    _plain_warnings()
    try:
        return int(module.run(args) or 0)
    except (PrescreenError, FileNotFoundError, PermissionError, IsADirectoryError) as exc:
        if args.traceback:
            raise
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("error: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # The reader went away (`prescreen rank c | head`): what was done is stored; point
        # stdout at /dev/null so that Python's final flush does not complain again.
        import os

        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
