"""The command line's shared flag groups, their value types and the commands' examples.

Defaults shown in the help come from the settings dataclasses themselves
(`card.DecisionSettings`, `capture.CaptureSettings`, `plan`), so the help and the behaviour
cannot drift apart; a flag left out is None and the card's or the dataclass's value stands.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path
from typing import Literal

from monitor.base.errors import ExitCode, ScenemonError


class Parser(argparse.ArgumentParser):
    """The command line's parser: a bad flag is one line on stderr and exit code 2 (BAD_INPUT)."""

    def error(self, message: str) -> None:  # argparse's own bad-flag path: exit 2, one line
        """Print argparse's complaint in one line that points to ``--help``, then exit.

        Raises
        ------
        SystemExit
            Always, with `ExitCode.BAD_INPUT`.
        """
        sys.stderr.write(f"{self.prog}: {message} (see {self.prog} --help)\n")
        raise SystemExit(ExitCode.BAD_INPUT)


def number(text: str) -> float:
    """A flag value as a finite float.

    Raises
    ------
    argparse.ArgumentTypeError
        Not a number, or NaN or an infinity; argparse reports it against the flag.

    Parameters
    ----------
    text : str
        The flag's value as typed.

    Returns
    -------
    float
        The value.
    """
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"{text} is not a finite number")
    return v


def fraction(text: str) -> float:
    """A flag value as a finite number in [0, 1] (a probability, the ema weight).

    Raises
    ------
    argparse.ArgumentTypeError
        Not a finite number, or outside [0, 1].

    Parameters
    ----------
    text : str
        The flag's value as typed.

    Returns
    -------
    float
        The value.
    """
    v = number(text)
    if not 0.0 <= v <= 1.0:
        raise argparse.ArgumentTypeError(f"{text} is not a fraction in [0, 1]")
    return v


def seconds(text: str) -> float:
    """A flag value as a finite number of seconds >= 0 (rolls, hold times, rate limits).

    Raises
    ------
    argparse.ArgumentTypeError
        Not a finite number, or negative.

    Parameters
    ----------
    text : str
        The flag's value as typed.

    Returns
    -------
    float
        The value.
    """
    v = number(text)
    if v < 0:
        raise argparse.ArgumentTypeError(f"{text} is not a number of seconds >= 0")
    return v


def positive(text: str) -> float:
    """A flag value as a finite number above 0 (durations that cannot be empty).

    Raises
    ------
    argparse.ArgumentTypeError
        Not a finite number, or 0 or below.

    Parameters
    ----------
    text : str
        The flag's value as typed.

    Returns
    -------
    float
        The value.
    """
    v = number(text)
    if v <= 0:
        raise argparse.ArgumentTypeError(f"{text} must be above 0")
    return v


def positive_int(text: str) -> int:
    """A flag value as an integer >= 1 (window counts, ``--confirm``).

    Raises
    ------
    argparse.ArgumentTypeError
        Not an integer, or below 1.

    Parameters
    ----------
    text : str
        The flag's value as typed.

    Returns
    -------
    int
        The value.
    """
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
    if v < 1:
        raise argparse.ArgumentTypeError(f"{text} is not an integer >= 1")
    return v


MIN_SEGMENT_MIN, MAX_SEGMENT_MIN = 0.1, 1440.0  # an audio file per 6 s at least, a day at most
MAX_LATENCY_S = 1.0  # PortAudio's suggested latency: "high" is about 0.1 s on most hosts
MAX_BLOCKSIZE = 1 << 16  # frames per callback: 1.4 s at 48 kHz


def segment_minutes(text: str) -> float:
    """``--segment-min``: minutes per audio file, from 0.1 (6 s) to 1440 (a day).

    Raises
    ------
    argparse.ArgumentTypeError
        Not a finite number, or outside the bounds (a tiny value would write one file per
        few samples).

    Parameters
    ----------
    text : str
        The flag's value as typed.

    Returns
    -------
    float
        The value.
    """
    v = number(text)
    if not MIN_SEGMENT_MIN <= v <= MAX_SEGMENT_MIN:
        raise argparse.ArgumentTypeError(f"{text} is not a number of minutes from "
                                         f"{MIN_SEGMENT_MIN:g} to {MAX_SEGMENT_MIN:g}")
    return v


def latency(text: str) -> str | float:
    """``--latency``: "high", "low", or a number of seconds above 0 and at most 1.

    Raises
    ------
    argparse.ArgumentTypeError
        Another word, a number that is not finite, or one outside (0, 1].

    Parameters
    ----------
    text : str
        The flag's value as typed.

    Returns
    -------
    str or float
        The value.
    """
    if text in ("high", "low"):
        return text
    try:
        v = number(text)
    except argparse.ArgumentTypeError:
        raise argparse.ArgumentTypeError(f"{text!r} is not high, low or a number of seconds") \
            from None
    if not 0.0 < v <= MAX_LATENCY_S:
        raise argparse.ArgumentTypeError(f"{text} is not a number of seconds above 0 and at "
                                         f"most {MAX_LATENCY_S:g}")
    return v


def blocksize(text: str) -> int:
    """``--blocksize``: frames per callback, 0 (PortAudio's choice) to 65536.

    Raises
    ------
    argparse.ArgumentTypeError
        Not an integer, or outside the bounds.

    Parameters
    ----------
    text : str
        The flag's value as typed.

    Returns
    -------
    int
        The value.
    """
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not an integer") from None
    if not 0 <= v <= MAX_BLOCKSIZE:
        raise argparse.ArgumentTypeError(f"{text} is not a number of frames from 0 to "
                                         f"{MAX_BLOCKSIZE}")
    return v


def serve_address(text: str) -> tuple[str, int]:
    """``--serve [HOST:]PORT``: where the stage server listens (HOST 127.0.0.1 when left out).

    Raises
    ------
    argparse.ArgumentTypeError
        No port, a port that is not an integer from 0 to 65535, or an empty host.

    Parameters
    ----------
    text : str
        The flag's value as typed: ``8765``, ``0.0.0.0:8765``, ``[::1]:8765``; port 0 takes
        any free port.

    Returns
    -------
    tuple of (str, int)
        The host and the port.
    """
    host, sep, port = text.rpartition(":")
    if not sep:
        host = "127.0.0.1"
    elif host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    if sep and not host:
        raise argparse.ArgumentTypeError(f"{text!r} has an empty host; give HOST:PORT or PORT")
    try:
        number_ = int(port)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not [HOST:]PORT with PORT a number "
                                         f"from 0 to 65535") from None
    if not 0 <= number_ <= 65535:
        raise argparse.ArgumentTypeError(f"port {number_} is not from 0 to 65535")
    return host, number_


def subcommand(sub, name: str, help_: str, description: str, epilog: str | None = None):
    """Add the command `name` to the sub-parsers `sub`, with its examples as the epilog.

    Parameters
    ----------
    sub : argparse subparsers action
        What ``add_subparsers()`` returned.
    name : str
        The command's name.
    help_ : str
        Its line in the list of commands.
    description : str
        The paragraph at the top of its own ``--help``.
    epilog : str, optional
        Text after the flags: the command's examples.

    Returns
    -------
    argparse.ArgumentParser
        The command's parser; its raw-description formatter keeps the examples' line breaks.
    """
    return sub.add_parser(name, help=help_, description=description,
                          epilog=epilog,
                          formatter_class=argparse.RawDescriptionHelpFormatter)


def add_decision_flags(p: argparse.ArgumentParser) -> None:
    """Add the ``[decision]`` overrides, ``--smoothing`` to ``--min-hold``, to `p`.

    Each defaults to None, so only a flag that is given replaces the card's value; the help
    shows the built-in `DecisionSettings` defaults in brackets.

    Parameters
    ----------
    p : argparse.ArgumentParser
        A command's parser.
    """
    from monitor.features.card import DecisionSettings

    d = DecisionSettings()
    g = p.add_argument_group("decision (override the card's [decision] table; card defaults "
                             "in brackets are the built-in ones)")
    g.add_argument("--smoothing", choices=["none", "mean", "ema", "median"],
                   help=f"smoothing of the raw probabilities [{d.smoothing}]")
    g.add_argument("--smoothing-windows", type=positive_int, metavar="N",
                   help=f"windows averaged by mean / median [{d.smoothing_windows}]")
    g.add_argument("--ema-alpha", type=fraction, metavar="A",
                   help=f"weight of the newest window for ema, a fraction [{d.ema_alpha}]")
    g.add_argument("--enter", type=fraction, metavar="P",
                   help=f"smoothed probability a class needs to be taken, a fraction [{d.enter}]")
    g.add_argument("--exit", type=fraction, metavar="P",
                   help=f"release the decision below this probability (0: never) [{d.exit}]")
    g.add_argument("--margin", type=fraction, metavar="P",
                   help=f"lead over the current decision needed to switch [{d.margin}]")
    g.add_argument("--confirm", type=positive_int, metavar="K",
                   help=f"consecutive passing windows needed to switch [{d.confirm}]")
    g.add_argument("--min-hold", type=seconds, metavar="SECONDS", dest="min_hold_s",
                   help=f"seconds a decision is held before it may switch [{d.min_hold_s}]")


def add_model_flags(p: argparse.ArgumentParser, *, required: bool = True, many: bool = False,
                     default_help: str = "",
                     runtime: Literal["litert", "micro"] | None = "litert") -> None:
    """Add ``--model``, ``--card``, ``--runtime`` and ``--trust-model`` to `p`.

    Parameters
    ----------
    p : argparse.ArgumentParser
    required : bool
        ``--model`` must be given.
    many : bool
        ``--model``, ``--card`` and ``--runtime`` may be given more than once and collect into
        lists, in order (model A, then B).
    default_help : str
        Added to ``--model``'s help: what is used without it.
    runtime : {"litert", "micro"} or None
        The runtime the command gives a ``.tflite`` model when ``--runtime`` is left out, as
        its help says (the command itself applies it); None: the command runs one runtime
        only and has no ``--runtime``.

    Notes
    -----
    The hidden ``--spec`` is the old name of ``--card`` and fills the same list.
    """
    p.add_argument("--model", action="append" if many else "store", required=required,
                   metavar="M", help=(".keras, .h5 or .tflite model; its card is M's stem + "
                                      ".toml" + ("; give twice for two models side by side (A, "
                                                 "then B)" if many else "") + default_help))
    p.add_argument("--card", action="append" if many else "store", metavar="CARD",
                   help="model card TOML (default: beside the model)"
                        + ("; once per --model, in order" if many else ""))
    p.add_argument("--spec", action="append" if many else "store", dest="card",
                   help=argparse.SUPPRESS)  # the old name of --card, kept for a release
    if runtime is not None:
        micro = "the microcontroller interpreter of tflite-micro"
        choices = (f"micro (default), {micro} (the firmware's own kernels), or litert, "
                   f"LiteRT's interpreter" if runtime == "micro"
                   else f"litert (default) or micro, {micro}")
        p.add_argument("--runtime", action="append" if many else "store",
                       choices=["litert", "micro"],
                       help=f"for a .tflite model: {choices}"
                            + ("; once per --model" if many else ""))
    p.add_argument("--trust-model", action="store_true",
                   help="allow Keras Lambda layers (their code runs when the model loads; "
                        "never for a file from a stranger)")


def add_live_flags(p: argparse.ArgumentParser) -> None:
    """Add the input device flags: ``--input``, ``--seconds``, ``--latency``, ``--blocksize``.

    Parameters
    ----------
    p : argparse.ArgumentParser
        A command's parser.
    """
    g = p.add_argument_group("input device")
    g.add_argument("--input", metavar="DEVICE",
                   help="device index or a case-insensitive part of its name (see scenemon "
                        "devices); default: pipewire / pulse / default on Linux, else the "
                        "system default")
    g.add_argument("--seconds", type=positive, metavar="SECONDS",
                   help="stop after this many seconds of audio (also with the terminal UI)")
    g.add_argument("--latency", type=latency, default="high", metavar="LATENCY",
                   help=f"PortAudio latency: high (robust, default), low, or seconds (at most "
                        f"{MAX_LATENCY_S:g})")
    g.add_argument("--blocksize", type=blocksize, default=None, metavar="FRAMES",
                   help=f"frames per callback, up to {MAX_BLOCKSIZE} (default: about 50 ms; "
                        f"0: let PortAudio choose)")


def add_session_flags(p: argparse.ArgumentParser) -> None:
    """Add the session flags: ``--out``, ``--no-audio``, ``--segment-min``, ``--headless``.

    Parameters
    ----------
    p : argparse.ArgumentParser
        A command's parser.
    """
    from monitor.assembly.plan import DEFAULT_SEGMENT_S

    p.add_argument("--out", metavar="DIR",
                   help="session directory (default: recordings/<date>-<time>-<name> in the "
                        "current folder)")
    p.add_argument("--no-audio", action="store_true", help="keep no audio in the session")
    p.add_argument("--segment-min", type=segment_minutes, default=DEFAULT_SEGMENT_S / 60.0,
                   metavar="MINUTES",
                   help=f"start a new audio file every MINUTES, from {MIN_SEGMENT_MIN:g} to "
                        f"{MAX_SEGMENT_MIN:g} (default {DEFAULT_SEGMENT_S / 60:g})")
    p.add_argument("--headless", action="store_true",
                   help="no screen: one JSON object per window on stdout (default: the "
                        "terminal UI when there is a terminal)")
    p.add_argument("--serve", type=serve_address, metavar="[HOST:]PORT",
                   help="also show the stage view to browsers at http://HOST:PORT (HOST "
                        "127.0.0.1 unless given; 0.0.0.0 for phones on the network; PORT 0: "
                        "any free one); the links, with their access tokens, and a QR code "
                        "are printed on stderr; no audio is served")


def add_capture_flags(p: argparse.ArgumentParser) -> None:
    """Add the ``--capture*`` flags, the rolls and the uncertainty thresholds to `p`.

    Each defaults to None, so `CaptureSettings`'s own default stands unless the flag is given.

    Parameters
    ----------
    p : argparse.ArgumentParser
        A command's parser.
    """
    from monitor.session.capture import POLICIES, CaptureSettings

    c = CaptureSettings()
    g = p.add_argument_group("capture (hard examples saved under SESSION/snippets/)")
    g.add_argument("--capture", metavar="POLICIES",
                   help=f"comma-separated from {', '.join(POLICIES)}; or none (default: all, "
                        f"each where it applies: disagreement needs truth, models_disagree two "
                        f"models, unfamiliar a profile)")
    g.add_argument("--capture-on", choices=["decision", "top"],
                   help=f"what must disagree with the truth: the decision or the raw top class "
                        f"[{c.on}]")
    g.add_argument("--pre-roll", type=seconds, metavar="SECONDS",
                   help=f"seconds kept before a snippet [{c.pre_roll_s}]")
    g.add_argument("--post-roll", type=seconds, metavar="SECONDS",
                   help=f"seconds kept after a snippet [{c.post_roll_s}]")
    g.add_argument("--max-snippet", type=positive, metavar="SECONDS",
                   help=f"longest snippet [{c.max_s}]")
    g.add_argument("--capture-every", type=seconds, metavar="SECONDS",
                   help=f"at most one snippet of a kind this often: per (truth, predicted) pair for "
                        f"disagreements, per reason for unfamiliar and uncertain sounds [{c.every_s}]")
    g.add_argument("--uncertain-below", type=fraction, metavar="P",
                   help=f"uncertain when the top smoothed probability is below P [{c.uncertain_below}]")
    g.add_argument("--uncertain-margin", type=fraction, metavar="P",
                   help=f"uncertain when the top two are closer than P [{c.uncertain_margin}]")


# --- plans from parsed flags --------------------------------------------------------------------------
def _per_model(values, n: int, flag: str) -> list:
    """A per-model flag's values, one per model in order (None where not given)."""
    values = values if isinstance(values, list) else [values] if values is not None else []
    if len(values) > n:
        raise ScenemonError(f"{flag} is given {len(values)} times for {n} model(s)")
    return values + [None] * (n - len(values))


def model_plans(args, default: str | None = None) -> tuple:
    """The `plan.ModelPlan` of each ``--model`` (with its ``--card`` and ``--runtime``, in order).

    Raises
    ------
    ScenemonError
        More than two models, or a per-model flag given more often than ``--model``.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags.
    default : str, optional
        The model when ``--model`` is not given.

    Returns
    -------
    tuple of ModelPlan
        One or two.
    """
    from monitor.assembly.plan import ModelPlan

    models = args.model if isinstance(args.model, list) else [args.model] if args.model else []
    if not models and default:
        models = [default]
    if len(models) > 2:
        raise ScenemonError(f"--model is given {len(models)} times; give one model, or two (A, B)")
    cards = _per_model(getattr(args, "card", None), len(models), "--card")
    runtimes = _per_model(getattr(args, "runtime", None), len(models), "--runtime")
    return tuple(ModelPlan(Path(m), Path(c) if c else None, r or "litert",
                           getattr(args, "trust_model", False))
                 for m, c, r in zip(models, cards, runtimes))


def capture_settings(args):
    """`CaptureSettings` from the ``--capture*`` flags (None for ``--capture none``).

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags.

    Returns
    -------
    CaptureSettings or None
        The settings.

    Raises
    ------
    ScenemonError
        An unknown capture policy, or settings the capture refuses (naming the flag).
    """
    from monitor.session.capture import POLICIES, CaptureSettings

    text = args.capture
    if text is not None and text.strip() == "none":
        return None
    given = {"on": args.capture_on, "pre_roll_s": args.pre_roll, "post_roll_s": args.post_roll,
             "max_s": args.max_snippet, "every_s": args.capture_every,
             "uncertain_below": args.uncertain_below, "uncertain_margin": args.uncertain_margin}
    kw = {k: v for k, v in given.items() if v is not None}
    if text is not None:
        kw["policies"] = tuple(p.strip() for p in text.split(",") if p.strip())
    try:
        return CaptureSettings(**kw)
    except ValueError as exc:
        text = str(exc)
        for field, flag in CAPTURE_FLAGS.items():  # name the flag the user typed
            text = text.replace(f"{field}=", f"{flag} ")
        raise ScenemonError(f"capture flags: {text} (policies: {', '.join(POLICIES)})") from None


CAPTURE_FLAGS = {"pre_roll_s": "--pre-roll", "post_roll_s": "--post-roll",
                 "max_s": "--max-snippet", "every_s": "--capture-every",
                 "uncertain_below": "--uncertain-below", "uncertain_margin": "--uncertain-margin",
                 "manual_s": "manual_s"}


def session_plan(args, source, *, name: str, default_model: str | None = None,
                 truth: str | None = None, live_truth: bool = True, prepare=None,
                 prepare_note: str = "preparing the input …"):
    """The `plan.SessionPlan` of a session command: `source`, the models, output, the decision
    flags given (the card's values stand for the rest), capture and truth.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags.
    source : FileInput or MicInput
        What to listen to.
    name : str
        The session's name in a new directory's name.
    default_model : str, optional
        The model when ``--model`` is not given.
    truth : str, optional
        A truth file.
    live_truth : bool
        The truth may be told with keys.
    prepare : callable, optional
        Run before the source opens.
    prepare_note : str
        Shown while `prepare` runs.

    Returns
    -------
    SessionPlan
        The plan.
    """
    from monitor.assembly.plan import OutputPlan, SessionPlan
    from monitor.features.card import DecisionSettings

    decision = {f: getattr(args, f, None) for f in DecisionSettings.__dataclass_fields__}
    return SessionPlan(
        source=source, models=model_plans(args, default_model),
        output=OutputPlan(Path(args.out) if args.out else None, name, not args.no_audio,
                          60.0 * args.segment_min),
        decision={k: v for k, v in decision.items() if v is not None},
        capture=capture_settings(args), truth=Path(truth) if truth else None, live_truth=live_truth,
        prepare=prepare, prepare_note=prepare_note)


def mic_input(args):
    """The `plan.MicInput` of the ``--input``/``--latency``/``--blocksize``/``--seconds`` flags.

    Parameters
    ----------
    args : argparse.Namespace
        The parsed flags.

    Returns
    -------
    MicInput
        The input device's plan.
    """
    from monitor.assembly.plan import MicInput

    return MicInput(args.input, args.latency, args.blocksize, args.seconds)
