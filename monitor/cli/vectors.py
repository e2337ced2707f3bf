"""`scenemon vectors`: golden vectors, the C front end and its check program.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.cli.flags import add_model_flags, model_plans, positive_int

NAME = 'vectors'
HELP = 'golden vectors, the C front end and a check program for firmware'
DESCRIPTION = 'Write pcm.csv, features.csv, output.csv (int8 tensors too, from the microcontroller runtime), meta.json, frontend_constants.h, the portable C front end and check.c with its Makefile into DIR.'
EXAMPLES = 'examples:\n  scenemon vectors --model models/demo.int8.tflite recordings/demo/tour.wav --out golden --count 20\n  make -C golden check      # builds and runs the firmware-side check'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon vectors`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    add_model_flags(p, runtime="micro")  # cmd_vectors: a .tflite runs in micro unless told
    p.add_argument("audio", metavar="AUDIO", help="the recording to cut windows from")
    p.add_argument("--out", required=True, metavar="DIR", help="folder to write (new or empty)")
    p.add_argument("--count", type=positive_int, metavar="N",
                   help="N windows spread over the recording, every predicted class covered "
                        "(default: all windows)")
    p.add_argument("--seed", type=int, default=0, metavar="N",
                   help="seed of the window choice (default 0)")


def run(args: argparse.Namespace) -> int:
    """`scenemon vectors`: golden vectors, the C front end and its check program.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon vectors`.

    Returns
    -------
    int
        The exit code.
    """
    import dataclasses

    from monitor.device.vectors import run_vectors

    plan = model_plans(args)[0]
    if args.runtime is None and plan.path.suffix.lower() == ".tflite":
        plan = dataclasses.replace(plan, runtime="micro")  # the firmware's own kernels
    return run_vectors(plan, Path(args.audio), Path(args.out), count=args.count, seed=args.seed)
