"""`scenemon report`: a session's account on the terminal, as JSON or as HTML.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

NAME = 'report'
HELP = "a session's account: accuracy, confusion, latency, plots"
DESCRIPTION = 'Summarise a session on the terminal, and with --html as one self-contained page with plots and snippet players.'
EXAMPLES = 'examples:\n  scenemon report recordings/20261201-101500-live\n  scenemon report recordings/tour-check --html tour-check.html'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon report`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("session", metavar="SESSION", help="session directory, or a run folder of scenemon field (its account)")
    p.add_argument("--html", metavar="OUT.html", help="also write the HTML report here")
    p.add_argument("--json", action="store_true", help="print the scores as JSON instead")


def run(args: argparse.Namespace) -> int:
    """`scenemon report`: a session's account on the terminal, as JSON or as HTML.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon report`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.review.report import run_report

    return run_report(Path(args.session), html=Path(args.html) if args.html else None,
                      as_json=args.json)
