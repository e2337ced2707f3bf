"""`scenemon harvest`: sessions' snippets into a retraining set.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

NAME = 'harvest'
HELP = 'gather captured snippets into a retraining set'
DESCRIPTION = 'Collect snippets of many sessions into DIR/<label>/ with DIR/manifest.csv; re-running adds only what is new. Folders that are not sessions are skipped.'
EXAMPLES = 'examples:\n  scenemon harvest recordings/site-a recordings/site-b --out retrain/round2\n  scenemon harvest recordings/* --out retrain/round2 --include disagreement,manual --drop-unknown'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon harvest`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("sessions", nargs="+", metavar="SESSION", help="session directories or run folders (their sessions)")
    p.add_argument("--out", required=True, metavar="DIR", help="the retraining set folder")
    p.add_argument("--include", metavar="REASONS",
                   help="comma-separated reasons to take (default: all of disagreement, "
                        "uncertain, manual, models_disagree, unfamiliar)")
    p.add_argument("--drop-unknown", action="store_true",
                   help="leave out snippets still labelled unknown")


def run(args: argparse.Namespace) -> int:
    """`scenemon harvest`: sessions' snippets into a retraining set.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon harvest`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.review.harvest import run_harvest

    return run_harvest([Path(p) for p in args.sessions], Path(args.out), include=args.include,
                       drop_unknown=args.drop_unknown)
