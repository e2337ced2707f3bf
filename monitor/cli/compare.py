"""`scenemon compare`: two models, or one model in two runtimes, on the same windows.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.base.errors import ScenemonError
from monitor.cli.flags import add_model_flags, fraction, model_plans

NAME = 'compare'
HELP = 'two models (or one model in two runtimes) on the same windows'
DESCRIPTION = "Top-1 and decision agreement, probability differences and the A-vs-B table of two models (float and int8, or one .tflite in LiteRT and in the microcontroller runtime) on exactly the same windows; also the front end's error against float64, and with --q15 the fixed-point front end against A's."
EXAMPLES = 'examples:\n  scenemon compare --model models/demo.tflite --model models/demo.int8.tflite recordings/demo/tour.wav\n  scenemon compare --model a.keras --model a.int8.tflite recordings/site-* --min-agree 0.95\n  scenemon compare --model m.int8.tflite --runtime litert --model m.int8.tflite --runtime micro tour.wav\n  scenemon compare --model models/demo.tflite --model models/demo.int8.tflite --q15 recordings/demo/tour.wav'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon compare`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    add_model_flags(p, many=True)
    p.add_argument("sources", nargs="+", metavar="AUDIO_OR_SESSION",
                   help="recordings or session directories whose windows both models see")
    p.add_argument("--min-agree", type=fraction, metavar="FRACTION",
                   help="exit 1 when the top-1 agreement (a fraction, e.g. 0.95) is below it")
    p.add_argument("--q15", action="store_true",
                   help="B computes its front end in fixed point (card arithmetic = \"q15\", "
                        "int16 samples), whatever its card says: what the board's integer "
                        "front end costs in accuracy against A")
    p.add_argument("--json", action="store_true", help="print the figures as JSON")


def run(args: argparse.Namespace) -> int:
    """`scenemon compare`: two models, or one model in two runtimes, on the same windows.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon compare`.

    Returns
    -------
    int
        The exit code.

    Raises
    ------
    ScenemonError
        ``--model`` not given exactly twice.
    """
    from monitor.device.compare import run_compare

    plans = model_plans(args)
    if len(plans) != 2:
        raise ScenemonError("compare: give --model twice (A, then B; the same file twice with "
                            "two --runtime values compares two runtimes)")
    return run_compare(plans, [Path(p) for p in args.sources], min_agree=args.min_agree,
                       as_json=args.json, b_arithmetic="q15" if args.q15 else None)
