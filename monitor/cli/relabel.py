"""`scenemon relabel`: the relabel view on a session.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.cli.screen import interactive

NAME = 'relabel'
HELP = "review a session's snippets: play, keep, drop, relabel"
DESCRIPTION = 'The relabel view on a session directory: enter (or space) plays a snippet, k keeps it, d drops it, l gives it another label (number keys pick the class). Only sidecars change. Needs a terminal.'
EXAMPLES = 'example:\n  scenemon relabel recordings/20261201-101500-walk'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon relabel`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("session", metavar="SESSION", help="session directory")


def run(args: argparse.Namespace) -> int:
    """`scenemon relabel`: the relabel view on a session (needs a terminal).

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon relabel`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.ui.app import run_relabel

    return run_relabel(Path(args.session), interactive=interactive())
