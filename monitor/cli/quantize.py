"""`scenemon quantize`: a full-integer int8 .tflite calibrated on field audio.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.cli.flags import positive_int

NAME = 'quantize'
HELP = 'full-integer int8 .tflite from a Keras model and field audio'
DESCRIPTION = "Post-training quantisation (int8 weights, activations, input and output) calibrated on real windows of recordings or sessions through the card's front end; writes the card beside the output."
EXAMPLES = 'examples:\n  scenemon quantize --model models/demo.keras --calibrate recordings/site-a recordings/site-b --out models/site.int8.tflite'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon quantize`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("--model", required=True, metavar="M.keras", help="the float Keras model")
    p.add_argument("--card", metavar="CARD", help="model card TOML (default: beside the model)")
    p.add_argument("--spec", dest="card", help=argparse.SUPPRESS)
    p.add_argument("--calibrate", nargs="+", required=True, metavar="AUDIO_OR_SESSION",
                   help="recordings or session directories to draw calibration windows from")
    p.add_argument("--out", required=True, metavar="M.int8.tflite", help="the int8 model to write")
    p.add_argument("--windows", type=positive_int, default=300, metavar="N",
                   help="calibration windows (default 300)")
    p.add_argument("--seed", type=int, default=0, metavar="N",
                   help="seed of the window choice (default 0)")
    p.add_argument("--trust-model", action="store_true", help="allow Keras Lambda layers")


def run(args: argparse.Namespace) -> int:
    """`scenemon quantize`: a full-integer int8 .tflite calibrated on field audio.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon quantize`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.device.quantize import run_quantize

    return run_quantize(Path(args.model), card=Path(args.card) if args.card else None,
                        calibrate=[Path(p) for p in args.calibrate], out=Path(args.out),
                        windows=args.windows, seed=args.seed, trust_model=args.trust_model)
