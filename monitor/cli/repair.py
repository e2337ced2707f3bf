"""`scenemon repair`: make a session that did not close cleanly whole.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

NAME = 'repair'
HELP = 'make a session that did not close cleanly whole'
DESCRIPTION = 'Drop a torn last line, bring the audio header up to the frames on disk, rebuild truth.tsv and write summary.json marked recovered. A session still being recorded is refused.'
EXAMPLES = 'example:\n  scenemon repair recordings/20261201-101500-live'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon repair`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("session", metavar="SESSION", help="session directory")


def run(args: argparse.Namespace) -> int:
    """`scenemon repair`: make a session that did not close cleanly whole.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon repair`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.session.repair import run_repair

    return run_repair(Path(args.session))
