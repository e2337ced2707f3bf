"""`scenemon replay`: a recording through the chain into a session.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.cli.flags import (
    add_capture_flags,
    add_decision_flags,
    add_model_flags,
    add_session_flags,
    session_plan,
)
from monitor.cli.screen import run_chain

NAME = 'replay'
HELP = 'run an audio file through the model and record a session'
DESCRIPTION = 'Run a WAV/FLAC/OGG file through the same chain as the microphone and write a session directory.'
EXAMPLES = 'examples:\n  scenemon replay recordings/demo/tour.wav --model models/demo.tflite --truth recordings/demo/tour.tsv --fast --headless\n  scenemon replay field/corridor.flac --model models/demo.int8.tflite --out recordings/corridor-1\n  scenemon replay walk.wav --model m.keras --card m.toml --smoothing ema --ema-alpha 0.3\n  scenemon replay walk.wav --model models/demo.tflite --model models/demo-mfcc.tflite   # A/B'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon replay`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("audio", metavar="AUDIO", help="audio file (any rate and channel count)")
    add_model_flags(p, many=True)
    p.add_argument("--truth", metavar="TRUTH.tsv", help="truth: onset<TAB>offset<TAB>label lines")
    p.add_argument("--fast", action="store_true", help="as fast as the CPU allows (default: real time)")
    p.add_argument("--allow-upsample", action="store_true",
                   help="accept a file below the model's rate (its top band will be empty)")
    add_session_flags(p)
    add_decision_flags(p)
    add_capture_flags(p)


def run(args: argparse.Namespace) -> int:
    """`scenemon replay`: a recording through the chain into a session (UI or printed lines).

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon replay`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.assembly.plan import FileInput

    audio = Path(args.audio)
    plan = session_plan(args, FileInput(audio, not args.fast, args.allow_upsample),
                        name=audio.stem, truth=args.truth)
    return run_chain(args, plan, f"replay {audio.name}{' (fast)' if args.fast else ''}")
