"""`scenemon profile`: fit the unfamiliar-sound profile beside a model.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.cli.flags import add_model_flags, fraction, model_plans

NAME = 'profile'
HELP = "learn what a model's own sounds look like (for unfamiliar sounds)"
DESCRIPTION = 'Fit the feature profile beside a model from audio it is meant for: recordings or sessions. Later sessions mark windows far from it as unfamiliar.'
EXAMPLES = 'examples:\n  scenemon profile --model models/demo.tflite recordings/site-a recordings/site-b\n  scenemon profile --model m.tflite training/clips/*.wav --out m.profile.npz --quantile 0.99'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon profile`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    add_model_flags(p)
    p.add_argument("sources", nargs="+", metavar="AUDIO_OR_SESSION",
                   help="recordings or session directories of the model's own scenes")
    p.add_argument("--out", metavar="M.profile.npz", help="default: beside the model")
    p.add_argument("--quantile", type=fraction, default=0.995, metavar="FRACTION",
                   help="threshold at this quantile of held-out profile windows (default 0.995)")


def run(args: argparse.Namespace) -> int:
    """`scenemon profile`: fit the unfamiliar-sound profile beside a model.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon profile`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.assembly.run import run_profile

    return run_profile(model_plans(args)[0], [Path(p) for p in args.sources],
                       out=Path(args.out) if args.out else None, quantile=args.quantile)
