"""How a session command shows itself: the terminal UI on a terminal, else printed lines."""

from __future__ import annotations

import argparse
import os
import sys


def interactive() -> bool:
    """True when stdin and stdout are a terminal that can draw the UI.

    Returns
    -------
    bool
        Both are terminals and ``TERM`` is not "dumb".
    """
    return sys.stdin.isatty() and sys.stdout.isatty() and os.environ.get("TERM") != "dumb"


def run_chain(args: argparse.Namespace, plan, heading: str) -> int:
    """The terminal UI, or without a terminal (or with --headless) printed lines.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags (``headless``).
    plan : SessionPlan
        The session to run.
    heading : str
        The UI's title line.

    Returns
    -------
    int
        The exit code.
    """
    if args.headless or not interactive():
        from monitor.assembly.run import run_printed

        return run_printed(plan, json_lines=args.headless)
    from monitor.ui.app import run_ui

    return run_ui(plan, heading=heading)
