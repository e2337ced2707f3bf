"""`scenemon tune`: the decision-settings sweep over sessions with truth.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

NAME = 'tune'
HELP = 'sweep decision settings over recorded sessions'
DESCRIPTION = 'Replay the stored raw probabilities of sessions with truth through a grid of decision settings (no model needed).'
EXAMPLES = "examples:\n  scenemon tune recordings/site-a recordings/site-b\n  scenemon tune recordings/tour-check --grid 'smoothing=ema;ema_alpha=0.2,0.4;confirm=1,2,3'\n  scenemon tune recordings/site-a --apply models/demo.toml"


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon tune`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("sessions", nargs="+", metavar="SESSION", help="session directories or run folders (their sessions)")
    p.add_argument("--grid", metavar="SPEC",
                   help="e.g. 'smoothing=mean,ema;enter=0.5,0.7;confirm=1,2' (unnamed fields "
                        "keep the default grid)")
    p.add_argument("--apply", metavar="CARD",
                   help="write the recommended settings into this card's [decision] table")
    p.add_argument("--all", action="store_true", help="list every setting, not only the front")
    p.add_argument("--model-b", action="store_true",
                   help="tune the second model of A/B sessions (windows.b.jsonl)")


def run(args: argparse.Namespace) -> int:
    """`scenemon tune`: the decision-settings sweep over sessions with truth.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon tune`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.review.tune import run_tune

    return run_tune([Path(p) for p in args.sessions], grid=args.grid,
                    apply=Path(args.apply) if args.apply else None, show_all=args.all,
                    model=1 if args.model_b else 0)
