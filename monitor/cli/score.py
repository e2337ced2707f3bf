"""`scenemon score`: re-score an archive of recordings and sessions.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.cli.flags import add_model_flags, model_plans, positive_int

NAME = 'score'
HELP = 're-score a folder of recordings, locally or on a Dask cluster'
DESCRIPTION = 'Run every audio file and session under ARCHIVE through the chain; one results file each plus an aggregate. Up-to-date results are skipped, so an interrupted run resumes.'
EXAMPLES = 'examples:\n  scenemon score field-archive --model models/demo.int8.tflite --out scores/int8\n  scenemon score field-archive --model m.tflite --out scores/m --workers 2\n  scenemon score field-archive --model a.tflite --model b.tflite --out scores/ab\n  scenemon score field-archive --model m.tflite --out scores/m --cluster tcp://scheduler:8786'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon score`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    p.add_argument("archive", metavar="ARCHIVE", help="folder of audio files and/or sessions")
    add_model_flags(p, many=True)
    p.add_argument("--out", required=True, metavar="DIR",
                   help="results folder (results/*.jsonl and aggregate.json)")
    p.add_argument("--truth-glob", metavar="PATTERN",
                   help="truth file beside each audio file, e.g. '{stem}.labels.tsv' "
                        "(default: the audio file's stem + .tsv)")
    p.add_argument("--workers", type=positive_int, metavar="N",
                   help="local worker processes (default: the number of cores)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="a Dask distributed scheduler, e.g. tcp://10.0.0.5:8786")


def run(args: argparse.Namespace) -> int:
    """`scenemon score`: re-score an archive of recordings and sessions.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon score`.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.review.score import run_score_command

    return run_score_command(Path(args.archive), model_plans(args), Path(args.out),
                             truth_glob=args.truth_glob, workers=args.workers,
                             cluster=args.cluster)
