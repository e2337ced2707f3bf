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


def _wait_for_enter() -> None:
    """Hold the links and the QR code on the terminal until Enter (the live view covers them)."""
    sys.stderr.write("scenemon: press Enter to open the live view (the links work for the whole "
                     "session)\n")
    sys.stderr.flush()
    sys.stdin.readline()


def run_chain(args: argparse.Namespace, plan, heading: str) -> int:
    """The terminal UI, or without a terminal (or with --headless) printed lines; with
    ``--serve``, the stage server beside either, for the session's whole life.

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
    served = None
    try:
        if getattr(args, "serve", None):  # before the session: a port in use is bad input
            from monitor.web.server import StageServer

            host, port = args.serve
            server = StageServer(host, port, heading=heading)
            server.start()
            served = server
            served.announce(sys.stderr)
            if not args.headless and interactive():  # the screen would cover the links at once
                _wait_for_enter()
        extra = dict(observers=[served.feed], on_ready=served.attach) if served else {}
        if args.headless or not interactive():
            from monitor.assembly.run import run_printed

            return run_printed(plan, json_lines=args.headless, **extra)
        from monitor.ui.app import run_ui

        return run_ui(plan, heading=heading, **extra)
    finally:
        if served is not None:
            served.stop()
