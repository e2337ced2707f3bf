"""`scenemon status`: is a field run still listening? For a person, or (--json) a script.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

NAME = "status"
HELP = "say whether a field run is healthy (exit 0) or not (exit 1)"
DESCRIPTION = ("Read RUN/status.json, which scenemon field rewrites every few seconds: last "
               "window, decisions in the last hour, overruns, gaps, disk left, budget used. "
               "Exit 0 when healthy, 1 when not, so a monitoring system can poll it over SSH.")
EXAMPLES = ("examples:\n  scenemon status /srv/scenemon/plant-room\n"
            "  ssh board scenemon status /srv/scenemon/plant-room --json")


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon status`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("run", metavar="RUN", help="the run folder")
    p.add_argument("--json", action="store_true",
                   help="print the status with 'healthy' and 'problems' as JSON")


def run(args: argparse.Namespace) -> int:
    """`scenemon status`: print the run's status; the exit code says healthy (0) or not (1).

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon status`.

    Returns
    -------
    int
        0 healthy, 1 not healthy, 2 not a run folder.
    """
    import sys

    from monitor.base.errors import ExitCode
    from monitor.base.files import dumps, session_is_live, terminal_safe
    from monitor.session.runfolder import health, read_status, status_text

    run_dir = Path(args.run)
    st = read_status(run_dir)
    problems = health(st, running=session_is_live(run_dir))
    if args.json:
        sys.stdout.write(dumps({**st, "healthy": not problems, "problems": problems},
                               indent=2) + "\n")
    else:
        sys.stdout.write(terminal_safe(status_text(st, problems)))
    return ExitCode.OK if not problems else ExitCode.FAILURE
