"""`scenemon live`: an input device through the chain into a session.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse

from monitor.cli.flags import (
    add_capture_flags,
    add_decision_flags,
    add_live_flags,
    add_model_flags,
    add_session_flags,
    mic_input,
    session_plan,
)
from monitor.cli.screen import run_chain

NAME = 'live'
HELP = 'run the model on a microphone and record a session'
DESCRIPTION = "Open an input device at its own rate, down-mix, resample to the model's rate and run the chain until Ctrl-C."
EXAMPLES = 'examples:\n  scenemon devices\n  scenemon live --model models/demo.tflite\n  scenemon live --model models/demo.int8.tflite --input "USB" --headless --out recordings/site-a\n  scenemon live --model m.tflite --runtime micro --no-audio --seconds 600\n  scenemon live --model models/demo.tflite --headless --serve 0.0.0.0:8765   # phones on the network'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon live`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    add_model_flags(p, many=True)
    add_live_flags(p)
    add_session_flags(p)
    add_decision_flags(p)
    add_capture_flags(p)


def run(args: argparse.Namespace) -> int:
    """`scenemon live`: an input device through the chain into a session.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon live`.

    Returns
    -------
    int
        The exit code.
    """
    return run_chain(args, session_plan(args, mic_input(args), name="live"),
                f"live {args.input or ''}".strip())
