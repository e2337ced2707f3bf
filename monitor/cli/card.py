"""`scenemon card`: model card tools: card check, card write.

Its name, help, examples, flags and handler, in one place; `monitor.cli` collects it.
"""

from __future__ import annotations

import argparse
import io
from pathlib import Path

import numpy as np

from monitor.base.errors import ScenemonError
from monitor.cli.flags import Parser, positive_int, seconds
from monitor.features.card import OUTPUTS

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
EXAMPLES = 'examples:\n  scenemon card check models/demo.toml recordings/demo/tour.wav train_feats.npy\n  scenemon card write walk.toml --call "librosa.feature.melspectrogram(y=y, sr=16000, n_fft=512, hop_length=160, n_mels=40)" --call "librosa.power_to_db(S, ref=np.max)" --classes quiet,voices --window-seconds 1 --hop-seconds 0.5'
CARD_WRITE_HELP = """\
Write a model card from the calls your training code makes for its features, pasted as
they are written there (they are parsed, never run): librosa's melspectrogram with
power_to_db or amplitude_to_db, or mfcc; torchaudio's MelSpectrogram with AmplitudeToDB, or
MFCC; tf.signal's stft (inside abs or square), linear_to_mel_weight_matrix, the log with its
offset, and mfccs_from_log_mel_spectrograms. What a call leaves out is the library's
documented default. The scaler's mean_ and scale_ go beside the card. With --check, card
check compares the new card with features your code saved at once."""
WRITE_EXAMPLES = 'examples:\n  scenemon card write walk.toml --call "librosa.feature.melspectrogram(y=y, sr=16000, n_fft=512, hop_length=160, win_length=400, n_mels=40, fmax=8000)" --call "librosa.power_to_db(S, ref=1.0, top_db=None)" --classes quiet_room,voices,traffic,machinery --window-seconds 1 --hop-seconds 0.5 --scaler scaler.npz --output logits --check walk.wav feats.npy\n  scenemon card write m.toml --call "torchaudio.transforms.MelSpectrogram(sample_rate=16000, n_fft=512, hop_length=160, n_mels=64)" --call "torchaudio.transforms.AmplitudeToDB(top_db=80)" --classes a,b --window-seconds 1 --hop-seconds 0.5'


def add_arguments(p: argparse.ArgumentParser) -> None:
    """The flags and arguments of `scenemon card`.

    Parameters
    ----------
    p : argparse.ArgumentParser
        The command's own parser.
    """
    actions = p.add_subparsers(dest="card_command", metavar="ACTION", parser_class=Parser,
                               help="check: compare one window's features with training's; write: a card "
                                    "from the training code's calls")
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
    w = actions.add_parser("write", help="write a card from the training code's feature calls",
                           description=CARD_WRITE_HELP, epilog=WRITE_EXAMPLES,
                           formatter_class=argparse.RawDescriptionHelpFormatter)
    w.add_argument("out", metavar="CARD", help="the card to write (.toml; not over a file)")
    w.add_argument("--call", action="append", required=True, metavar="CODE",
                   help="a feature call as the training code writes it; once per call, "
                        "in order")
    w.add_argument("--classes", required=True, metavar="A,B,...",
                   help="the model's classes in its output order, comma-separated")
    w.add_argument("--window-seconds", type=seconds, required=True, metavar="SECONDS",
                   help="seconds of audio per window the model takes")
    w.add_argument("--hop-seconds", type=seconds, required=True, metavar="SECONDS",
                   help="seconds between windows")
    w.add_argument("--sample-rate", type=positive_int, metavar="HZ",
                   help="where no call gives it (sr=, sample_rate=)")
    w.add_argument("--mfcc", type=positive_int, metavar="N",
                   help="MFCCs kept, where the code keeps them by slicing")
    w.add_argument("--output", choices=OUTPUTS, default="probabilities",
                   help="what the model's output is (default probabilities)")
    w.add_argument("--scaler", metavar="FILE",
                   help="the training features' scaler: an .npz of mean_ and scale_ (or mean "
                        "and std), or a pickled scikit-learn StandardScaler with "
                        "--trust-pickle")
    w.add_argument("--trust-pickle", action="store_true",
                   help="read a pickled scaler (unpickling runs code: never for a stranger's "
                        "file)")
    w.add_argument("--check", nargs=2, metavar=("AUDIO", "FEATURES.npy"),
                   help="then run card check on the new card at once")
    w.add_argument("--start", type=seconds, default=0.0, metavar="SECONDS",
                   help="with --check: where the features' window starts in AUDIO")
    w.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
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
    if args.card_command == "write":
        return run_write(args)
    if args.card_command != "check":
        raise ScenemonError("card: give an action: scenemon card check CARD AUDIO FEATURES.npy, "
                            "or scenemon card write CARD --call ... (see scenemon card --help)")
    from monitor.features.cardcheck import run_card_check

    return run_card_check(Path(args.card), Path(args.audio), Path(args.features),
                          start_s=args.start, scaled=args.scaled)


def read_scaler(path: Path, *, trust_pickle: bool) -> tuple[np.ndarray, np.ndarray]:
    """A scaler's mean and scale from an ``.npz`` (or, trusted, a pickled StandardScaler).

    Parameters
    ----------
    path : Path
        ``.npz`` holding ``mean_`` and ``scale_`` (or ``mean`` and ``std``); or a pickle.
    trust_pickle : bool
        Read a pickle (unpickling runs code).

    Returns
    -------
    mean, std : numpy.ndarray
        float32.

    Raises
    ------
    ScenemonError
        A file that cannot be read or holds no scaler, or a pickle without `trust_pickle`.
    """
    if path.suffix.lower() == ".npz":
        try:
            with np.load(path, allow_pickle=False) as z:
                names = set(z.files)
                for m, sd in (("mean_", "scale_"), ("mean", "std")):
                    if {m, sd} <= names:
                        return (np.asarray(z[m], np.float32), np.asarray(z[sd], np.float32))
        except (OSError, ValueError) as exc:
            raise ScenemonError(f"{path}: cannot be read as an .npz ({exc})") from None
        raise ScenemonError(f"{path}: holds {sorted(names)}, not mean_ and scale_ (a "
                            f"StandardScaler's, np.savez(path, mean_=s.mean_, scale_=s.scale_))")
    if not trust_pickle:
        raise ScenemonError(f"{path}: a pickled scaler runs code when it is read; save its "
                            f"mean_ and scale_ with np.savez, or pass --trust-pickle for a "
                            f"file of your own")
    import pickle

    try:
        with open(path, "rb") as f:
            scaler = pickle.load(f)  # noqa: S301 - only with --trust-pickle
        return (np.asarray(scaler.mean_, np.float32), np.asarray(scaler.scale_, np.float32))
    except Exception as exc:  # noqa: BLE001 - whatever the pickle holds
        raise ScenemonError(f"{path}: not a pickled scaler with mean_ and scale_ "
                            f"({type(exc).__name__})") from None


def run_write(args: argparse.Namespace) -> int:
    """`scenemon card write`: a card from the training code's calls, checked when asked.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags of `scenemon card write`.

    Returns
    -------
    int
        0 (written; with --check, card check's exit code).

    Raises
    ------
    ScenemonError
        The card exists, a call or the scaler cannot be read, or the card written does not
        load.
    """
    from monitor.base.files import atomic_write
    from monitor.features.card import load_card
    from monitor.features.fromcode import card_keys, card_text, parse_call

    out = Path(args.out)
    if out.exists() or out.is_symlink():
        raise ScenemonError(f"{out}: exists; card write writes over nothing (choose another "
                            f"name)")
    classes = [c.strip() for c in args.classes.split(",") if c.strip()]
    keys = card_keys([parse_call(c) for c in args.call], sample_rate=args.sample_rate,
                     mfcc=args.mfcc)
    scaling = None
    if args.scaler:
        mean, std = read_scaler(Path(args.scaler), trust_pickle=args.trust_pickle)
        scaling = f"{out.stem}.scaling.npz"
        buf = io.BytesIO()
        np.savez(buf, mean=mean, std=std)
        atomic_write(out.parent / scaling, buf.getvalue())
    text = card_text(classes, keys, window_s=args.window_seconds, hop_s=args.hop_seconds,
                     output=args.output, scaling_file=scaling, source=args.call)
    atomic_write(out, text.encode())
    try:
        card = load_card(out)
    except ScenemonError:
        out.unlink()
        raise
    shape = " x ".join(str(n) for n in card.feature_shape)
    print(f"card      {out} ({card.frontend.kind}, {shape} a window)")
    if not args.check:
        print(f"next      scenemon card check {out} AUDIO FEATURES.npy")
        return 0
    from monitor.features.cardcheck import run_card_check

    return run_card_check(out, Path(args.check[0]), Path(args.check[1]), start_s=args.start)
