"""`scenemon card`: model card tools: card check.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from monitor.base.errors import ScenemonError
from monitor.cli.flags import Parser, seconds

NAME = 'card'
HELP = 'check a model card against features from training code'
DESCRIPTION = "Model card tools. card check: compute one window of AUDIO through the card's front end and compare it with FEATURES.npy from your own training code; when they differ, say where, and try the card with one key, then two keys changed."
CARD_CHECK_HELP = """\
Compare the card's features of one window of AUDIO with FEATURES.npy: what your
training code computed for the window that starts at --start (or for several
windows one hop apart: a leading axis), unscaled (or with --scaled after the
card's scaling), in the model's input order (a channel axis of 1 allowed). Prints
the shapes, the max abs difference (tolerance: 1e-3 of each band's range in the
file), which frames and bands it sits in, and the keys the windows cannot tell
apart. When they differ, it tries
the card with one key changed, then two (center, pad_mode, window_in_frame,
mel_scale, mel_norm, mel_triangles, power, log, log_offset/log_floor, db_ref,
top_db, window, window_symmetric, pcm_bits, layout, dct_norm) and prints the card
lines that make it match. Exit 0 match, 1 mismatch, 2 bad input."""
CHECK_EXAMPLES = 'examples:\n  scenemon card check models/demo.toml recordings/demo/tour.wav train_feats.npy\n  scenemon card check m.toml clip.wav clip_features.npy --start 2.5 --scaled\n\n  # train_feats.npy: what your training code gives for the window, e.g.\n  #   np.save("train_feats.npy", my_features(audio[0:16000]))'
EXAMPLES = 'examples:\n  scenemon card check models/demo.toml recordings/demo/tour.wav train_feats.npy'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon card`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    actions = p.add_subparsers(dest="card_command", metavar="ACTION", parser_class=Parser,
                               help="check: compare one window's features with training's")
    c = actions.add_parser("check", help="compare the card's features with a .npy from training",
                           description=CARD_CHECK_HELP,
                           epilog=CHECK_EXAMPLES,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    c.add_argument("card", metavar="CARD", help="the model card (.toml)")
    c.add_argument("audio", metavar="AUDIO", help="the recording the features were made from")
    c.add_argument("features", metavar="FEATURES.npy",
                   help="one window's features from your training code (numpy.save)")
    c.add_argument("--start", type=seconds, default=0.0, metavar="SECONDS",
                   help="where the window starts in AUDIO (default 0)")
    c.add_argument("--scaled", action="store_true",
                   help="FEATURES.npy is after the card's [scaling] (default: before it)")
    c.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                   help="show tracebacks")


def run(args: argparse.Namespace) -> int:
    """`scenemon card check`: the card's features of one window against training's.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon card`.

    Returns
    -------
    int
        The exit code.

    Raises
    ------
    ScenemonError
        No action given (`scenemon card check`).
    """
    if args.card_command != "check":
        raise ScenemonError("card: give an action: scenemon card check CARD AUDIO FEATURES.npy "
                            "(see scenemon card --help)")
    from monitor.features.cardcheck import run_card_check

    return run_card_check(Path(args.card), Path(args.audio), Path(args.features),
                          start_s=args.start, scaled=args.scaled)
