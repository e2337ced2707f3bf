"""`scenemon demo`: the demo model(s) on the demo tour or the microphone.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.cli.flags import (
    add_capture_flags,
    add_live_flags,
    add_model_flags,
    add_session_flags,
    mic_input,
    session_plan,
)
from monitor.cli.screen import run_chain

NAME = 'demo'
HELP = 'the bundled demo model on the bundled scene tour'
DESCRIPTION = 'Run the demo model on the demo scene tour (made on first use under recordings/demo/ in the current folder) and record a session.'
EXAMPLES = 'examples:\n  make demo                 # sets up .venv and runs this\n  scenemon demo             # the bundled scene tour at real-time pace\n  scenemon demo --fast      # the same, as fast as the CPU allows\n  scenemon demo --mic       # the demo model on the microphone\n  scenemon demo --serve 8765   # also in browsers: links and a QR code on stderr\n  scenemon demo --model models/demo.tflite --model models/demo-mfcc.tflite   # two models'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon demo`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    add_model_flags(p, required=False, many=True, default_help=" (default: models/demo.tflite)")
    p.add_argument("--fast", action="store_true", help="as fast as the CPU allows")
    p.add_argument("--mic", action="store_true", help="the microphone instead of the tour")
    add_live_flags(p)
    add_session_flags(p)
    add_capture_flags(p)


def run(args: argparse.Namespace) -> int:
    """`scenemon demo`: the demo model(s) on the demo tour (made on first use) or the microphone.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon demo`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.assembly.assemble import demo_models, recordings_dir
    from monitor.assembly.plan import FileInput
    from monitor.demo import tour_paths

    default = str(demo_models() / "demo.tflite")
    names = " + ".join(Path(m).name for m in (args.model or [default]))
    if args.mic:
        return run_chain(args, session_plan(args, mic_input(args), name="demo-mic", default_model=default),
                    f"demo on the microphone, {names}")
    folder = recordings_dir() / "demo"
    wav, tsv = tour_paths(folder)

    def make_tour() -> None:  # synthesis imports scipy.signal: keep it off the first screen
        from monitor.demo.tour import ensure_tour

        ensure_tour(folder)

    plan = session_plan(args, FileInput(wav, not args.fast), name="demo", default_model=default,
                        truth=str(tsv), prepare=make_tour,
                        prepare_note="making the demo tour (the first run only) …")
    return run_chain(args, plan, f"demo tour, {names}{' (fast)' if args.fast else ''}")
