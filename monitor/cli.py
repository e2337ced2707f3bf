"""`scenemon` command line: parses, calls the modules, maps errors to exit codes.

Exit codes: 0 ok, 1 runtime failure, 2 bad input (file, card, flag) with one sentence on
stderr naming the file and the problem; no traceback unless --debug.
"""

from __future__ import annotations

import argparse
import gc
import os
import signal
import sys
import threading
import time
import warnings
from pathlib import Path

from monitor import __version__
from monitor.errors import ScenemonError

EXAMPLES = {
    "replay": """examples:
  scenemon replay recordings/demo/tour.wav --model models/demo.tflite --truth recordings/demo/tour.tsv --fast --headless
  scenemon replay field/corridor.flac --model models/demo.int8.tflite --out recordings/corridor-1
  scenemon replay walk.wav --model m.keras --spec m.toml --smoothing ema --ema-alpha 0.3""",
    "live": """examples:
  scenemon devices
  scenemon live --model models/demo.tflite
  scenemon live --model models/demo.int8.tflite --input "USB" --headless --out recordings/site-a
  scenemon live --model m.keras --no-audio --seconds 600""",
    "demo": """examples:
  make demo                 # sets up .venv and runs this
  scenemon demo             # the bundled scene tour at real-time pace
  scenemon demo --fast      # the same, as fast as the CPU allows
  scenemon demo --mic       # the demo model on the microphone""",
    "report": """examples:
  scenemon report recordings/20261201-101500-live
  scenemon report recordings/tour-check --html tour-check.html""",
    "tune": """examples:
  scenemon tune recordings/site-a recordings/site-b
  scenemon tune recordings/tour-check --grid 'smoothing=ema;ema_alpha=0.2,0.4;confirm=1,2,3'
  scenemon tune recordings/site-a --apply models/demo.toml""",
    "harvest": """examples:
  scenemon harvest recordings/site-a recordings/site-b --out retrain/round2
  scenemon harvest recordings/* --out retrain/round2 --include disagreement,manual --drop-unknown""",
    "quantize": """examples:
  scenemon quantize --model models/demo.keras --calibrate recordings/site-a recordings/site-b --out models/site.int8.tflite""",
    "compare": """examples:
  scenemon compare --model models/demo.tflite --model models/demo.int8.tflite recordings/demo/tour.wav
  scenemon compare --model a.keras --model a.int8.tflite recordings/site-* --min-agree 0.95""",
    "vectors": """examples:
  scenemon vectors --model models/demo.int8.tflite recordings/demo/tour.wav --out golden --count 20""",
    "score": """examples:
  scenemon score field-archive --model models/demo.int8.tflite --out scores/int8
  scenemon score field-archive --model m.tflite --out scores/m --workers 2
  scenemon score field-archive --model m.tflite --out scores/m --cluster tcp://scheduler:8786""",
    "bench": """examples:
  scenemon bench
  scenemon bench --model models/demo.keras --seconds 120""",
}


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # argparse's own bad-flag path: exit 2, one line
        sys.stderr.write(f"{self.prog}: {message} (see {self.prog} --help)\n")
        raise SystemExit(2)


def _fraction(text: str) -> float:
    v = float(text)
    if not 0.0 <= v <= 1.0:
        raise argparse.ArgumentTypeError(f"{text} is not in [0, 1]")
    return v


def _positive_int(text: str) -> int:
    v = int(text)
    if v < 1:
        raise argparse.ArgumentTypeError(f"{text} is not an integer >= 1")
    return v


def _add_decision_flags(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("decision (override the card's [decision] table)")
    g.add_argument("--smoothing", choices=["none", "mean", "ema", "median"],
                   help="smoothing of the raw probabilities")
    g.add_argument("--smoothing-windows", type=_positive_int, metavar="N",
                   help="windows averaged by mean / median")
    g.add_argument("--ema-alpha", type=float, metavar="A", help="weight of the newest window (ema)")
    g.add_argument("--enter", type=_fraction, metavar="P", help="probability a class needs to be taken")
    g.add_argument("--exit", type=_fraction, metavar="P",
                   help="release the decision when its probability falls below P (0: never)")
    g.add_argument("--margin", type=_fraction, metavar="P",
                   help="lead over the current decision needed to switch")
    g.add_argument("--confirm", type=_positive_int, metavar="K",
                   help="consecutive passing windows needed to switch")
    g.add_argument("--min-hold", type=float, metavar="S", dest="min_hold_s",
                   help="seconds a decision is held before it may switch")


def _add_model_flags(p: argparse.ArgumentParser, *, required: bool = True) -> None:
    p.add_argument("--model", required=required, metavar="M",
                   help=".keras, .h5 or .tflite model; its card is M's stem + .toml")
    p.add_argument("--spec", metavar="S", help="model card TOML (default: beside the model)")
    p.add_argument("--trust-model", action="store_true",
                   help="allow Keras Lambda layers (their code runs when the model loads)")


def _add_live_flags(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("input device")
    g.add_argument("--input", metavar="DEVICE",
                   help="device index or a case-insensitive part of its name (see scenemon "
                        "devices); default: pipewire / pulse / default on Linux, else the "
                        "system default")
    g.add_argument("--seconds", type=float, metavar="S", help="stop after S seconds of audio")
    g.add_argument("--latency", default="high",
                   help="PortAudio latency: high (robust, default), low, or seconds")
    g.add_argument("--blocksize", type=int, default=None,
                   help="frames per callback (default: about 50 ms; 0: let PortAudio choose)")


def _add_session_flags(p: argparse.ArgumentParser) -> None:
    p.add_argument("--out", metavar="DIR",
                   help="session directory (default: recordings/<date>-<time>-<name>)")
    p.add_argument("--no-audio", action="store_true", help="keep no audio in the session")
    p.add_argument("--segment-min", type=float, default=60.0, metavar="M",
                   help="start a new audio file every M minutes (default 60)")
    p.add_argument("--headless", action="store_true",
                   help="no screen: one JSON object per window on stdout (default: the "
                        "terminal UI; keys: 1-9 truth, 0 truth unknown, c capture, p pause, "
                        "s stage view, r relabel, q quit)")


def build_parser() -> argparse.ArgumentParser:
    ap = _Parser(prog="scenemon",
                 description="Watch a small audio classifier decide on live or recorded sound, "
                             "record the session, and check it against the truth.",
                 epilog="example: scenemon replay recordings/demo/tour.wav --model "
                        "models/demo.tflite --truth recordings/demo/tour.tsv --fast --headless",
                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--version", action="version", version=f"scenemon {__version__}")
    ap.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("replay", help="run an audio file through the model and record a session",
                       description="Run a WAV/FLAC/OGG file through the same chain as the "
                                   "microphone and write a session directory.",
                       epilog=EXAMPLES["replay"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("audio", metavar="AUDIO", help="audio file (any rate and channel count)")
    _add_model_flags(p)
    p.add_argument("--truth", metavar="T.tsv", help="truth: onset<TAB>offset<TAB>label lines")
    p.add_argument("--fast", action="store_true", help="as fast as the CPU allows (default: real time)")
    p.add_argument("--allow-upsample", action="store_true",
                   help="accept a file below the model's rate (its top band will be empty)")
    _add_session_flags(p)
    _add_decision_flags(p)
    _add_capture_flags(p)

    p = sub.add_parser("live", help="run the model on a microphone and record a session",
                       description="Open an input device at its own rate, down-mix, resample to "
                                   "the model's rate and run the chain until Ctrl-C.",
                       epilog=EXAMPLES["live"], formatter_class=argparse.RawDescriptionHelpFormatter)
    _add_model_flags(p)
    _add_live_flags(p)
    _add_session_flags(p)
    _add_decision_flags(p)
    _add_capture_flags(p)

    p = sub.add_parser("devices", help="list the audio input devices",
                       description="List input devices: index, name, host API, channels, "
                                   "default rate; * marks the default.",
                       epilog="example:\n  scenemon devices\n  scenemon live --model m.tflite "
                              "--input 3", formatter_class=argparse.RawDescriptionHelpFormatter)

    p = sub.add_parser("demo", help="the bundled demo model on the bundled scene tour",
                       description="Run the demo model on the demo scene tour (made on first "
                                   "use under recordings/demo/) and record a session.",
                       epilog=EXAMPLES["demo"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--model", default=None, metavar="M",
                   help="model (default: models/demo.tflite)")
    p.add_argument("--fast", action="store_true", help="as fast as the CPU allows")
    p.add_argument("--mic", action="store_true", help="the microphone instead of the tour")
    _add_live_flags(p)
    _add_session_flags(p)
    _add_capture_flags(p)

    p = sub.add_parser("report", help="a session's account: accuracy, confusion, latency, plots",
                       description="Summarise a session on the terminal, and with --html as "
                                   "one self-contained page with plots and snippet players.",
                       epilog=EXAMPLES["report"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("session", metavar="SESSION", help="session directory")
    p.add_argument("--html", metavar="OUT.html", help="also write the HTML report here")
    p.add_argument("--json", action="store_true", help="print the scores as JSON instead")

    p = sub.add_parser("tune", help="sweep decision settings over recorded sessions",
                       description="Replay the stored raw probabilities of sessions with truth "
                                   "through a grid of decision settings (no model needed).",
                       epilog=EXAMPLES["tune"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("sessions", nargs="+", metavar="SESSION", help="session directories")
    p.add_argument("--grid", metavar="SPEC",
                   help="e.g. 'smoothing=mean,ema;enter=0.5,0.7;confirm=1,2' (unnamed fields "
                        "keep the default grid)")
    p.add_argument("--apply", metavar="CARD",
                   help="write the recommended settings into this card's [decision] table")
    p.add_argument("--all", action="store_true", help="list every setting, not only the front")

    p = sub.add_parser("harvest", help="gather captured snippets into a retraining set",
                       description="Collect snippets of many sessions into DIR/<label>/ with "
                                   "DIR/manifest.csv; re-running adds only what is new.",
                       epilog=EXAMPLES["harvest"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("sessions", nargs="+", metavar="SESSION", help="session directories")
    p.add_argument("--out", required=True, metavar="DIR", help="the retraining set folder")
    p.add_argument("--include", default="disagreement,uncertain,manual", metavar="REASONS",
                   help="comma-separated reasons to take (default: all three)")
    p.add_argument("--drop-unknown", action="store_true",
                   help="leave out snippets still labelled unknown")

    p = sub.add_parser("relabel", help="review a session's snippets: play, keep, drop, relabel",
                       description="The relabel view on a session directory: enter plays a "
                                   "snippet, k keeps it, d drops it, l gives it another label "
                                   "(number keys pick the class). Only sidecars change.",
                       epilog="example:\n  scenemon relabel recordings/20261201-101500-walk",
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("session", metavar="SESSION", help="session directory")

    p = sub.add_parser("quantize", help="full-integer int8 .tflite from a Keras model and field audio",
                       description="Post-training quantisation (int8 weights, activations, input "
                                   "and output) calibrated on real windows of recordings or "
                                   "sessions through the card's front end; writes the card "
                                   "beside the output.",
                       epilog=EXAMPLES["quantize"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--model", required=True, metavar="M.keras", help="the float Keras model")
    p.add_argument("--spec", metavar="S", help="model card TOML (default: beside the model)")
    p.add_argument("--calibrate", nargs="+", required=True, metavar="AUDIO_OR_SESSION",
                   help="recordings or session directories to draw calibration windows from")
    p.add_argument("--out", required=True, metavar="M.int8.tflite", help="the int8 model to write")
    p.add_argument("--windows", type=_positive_int, default=300, help="calibration windows (300)")
    p.add_argument("--seed", type=int, default=0, help="seed of the window choice")
    p.add_argument("--trust-model", action="store_true", help="allow Keras Lambda layers")

    p = sub.add_parser("compare", help="two models on exactly the same windows",
                       description="Top-1 and decision agreement, probability differences and "
                                   "the A-vs-B table of two models (e.g. float and int8) on the "
                                   "same windows; also the front end's float32 error.",
                       epilog=EXAMPLES["compare"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--model", action="append", required=True, metavar="M",
                   help="give twice: A then B (each with its card beside it)")
    p.add_argument("sources", nargs="+", metavar="AUDIO_OR_SESSION")
    p.add_argument("--min-agree", type=_fraction, metavar="P",
                   help="exit 1 when top-1 agreement is below P (for release scripts)")
    p.add_argument("--json", action="store_true", help="print the figures as JSON")

    p = sub.add_parser("vectors", help="golden vectors and the C front end for the firmware",
                       description="Write pcm.csv, features.csv, output.csv (int8 tensors too), "
                                   "meta.json, frontend_constants.h and the portable C front end "
                                   "for target validation.",
                       epilog=EXAMPLES["vectors"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--model", required=True, metavar="M")
    p.add_argument("--spec", metavar="S", help="model card TOML (default: beside the model)")
    p.add_argument("audio", metavar="AUDIO")
    p.add_argument("--out", required=True, metavar="DIR")
    p.add_argument("--count", type=_positive_int, metavar="N", help="first N windows only")

    p = sub.add_parser("repair", help="make a session that did not close cleanly whole",
                       description="Drop a torn last line, bring the audio header up to date, "
                                   "rebuild truth.tsv and write summary.json marked recovered.",
                       epilog="example:\n  scenemon repair recordings/20261201-101500-live",
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("session", metavar="SESSION", help="session directory")

    p = sub.add_parser("score", help="re-score a folder of recordings, locally or on a Dask cluster",
                       description="Run every audio file and session under ARCHIVE through the "
                                   "chain; one results file each plus an aggregate. Up-to-date "
                                   "results are skipped, so an interrupted run resumes.",
                       epilog=EXAMPLES["score"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("archive", metavar="ARCHIVE", help="folder of audio files and/or sessions")
    p.add_argument("--model", required=True, metavar="M")
    p.add_argument("--spec", metavar="S", help="model card TOML (default: beside the model)")
    p.add_argument("--out", required=True, metavar="DIR")
    p.add_argument("--truth-glob", metavar="PATTERN",
                   help="truth file beside each audio file, e.g. '{stem}.labels.tsv' "
                        "(default: the audio file's stem + .tsv)")
    p.add_argument("--workers", type=_positive_int, metavar="N",
                   help="local worker processes (default: the number of cores)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="a Dask distributed scheduler, e.g. tcp://10.0.0.5:8786")

    p = sub.add_parser("bench", help="will this model keep up on this machine?",
                       description="Measure start-up, per-window cost and fast-replay speed.",
                       epilog=EXAMPLES["bench"], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--model", default=None, metavar="M", help="model (default: models/demo.tflite)")
    p.add_argument("--spec", metavar="S", help="model card TOML (default: beside the model)")
    p.add_argument("--seconds", type=float, default=240.0, help="seconds of tour audio to replay")
    for p in sub.choices.values():  # --debug also after the command; SUPPRESS keeps the top one
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                       help="show tracebacks")
    return ap


def project_root() -> Path:
    """The checkout holding models/ (the working directory, else the package's parent)."""
    cwd = Path.cwd()
    if (cwd / "models" / "demo.toml").is_file():
        return cwd
    return Path(__file__).resolve().parent.parent


def warn_unclosed(base: Path, limit: int = 2000) -> None:
    """Say which earlier sessions under `base` did not close cleanly (killed, power loss)."""
    try:
        dirs = sorted(p.parent for p in base.glob("*/session.json"))[-limit:]
    except OSError:
        return
    for d in dirs:
        if not (d / "summary.json").exists():
            sys.stderr.write(f"scenemon: warning: {d} did not close cleanly; "
                             f"scenemon repair {d} makes it whole\n")


def session_dir(out: str | None, name: str) -> Path:
    if out:
        return Path(out)
    base = project_root() / "recordings"
    warn_unclosed(base)
    stamp = time.strftime("%Y%m%d-%H%M%S")
    safe = "".join(c if c.isalnum() or c in "-_" else "-" for c in name)[:40] or "session"
    d = base / f"{stamp}-{safe}"
    k = 1
    while d.exists():
        k += 1
        d = base / f"{stamp}-{safe}-{k}"
    return d


def _decision(card, args):
    fields = ("smoothing", "smoothing_windows", "ema_alpha", "enter", "exit", "margin",
              "confirm", "min_hold_s")
    try:
        return card.decision.replace(**{f: getattr(args, f, None) for f in fields})
    except ValueError as exc:
        raise ScenemonError(f"decision flags: {exc}") from None


def _capture(args):
    """CaptureSettings from the flags, or None for --capture none."""
    from monitor.capture import CaptureSettings

    text = getattr(args, "capture", "disagreement,uncertain") or "none"
    if text.strip() == "none":
        return None
    try:
        return CaptureSettings(
            policies=tuple(p.strip() for p in text.split(",") if p.strip()),
            on=getattr(args, "capture_on", "decision"),
            pre_roll_s=getattr(args, "pre_roll", 0.5), post_roll_s=getattr(args, "post_roll", 0.5),
            max_s=getattr(args, "max_snippet", 10.0), every_s=getattr(args, "capture_every", 5.0),
            uncertain_below=getattr(args, "uncertain_below", 0.5),
            uncertain_margin=getattr(args, "uncertain_margin", 0.1))
    except ValueError as exc:
        raise ScenemonError(f"capture flags: {exc}") from None


def _add_capture_flags(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("capture (hard examples saved under SESSION/snippets/)")
    g.add_argument("--capture", default="disagreement,uncertain", metavar="POLICIES",
                   help="comma-separated: disagreement (decision differs from the truth), "
                        "uncertain (low confidence); or none (default: both)")
    g.add_argument("--capture-on", choices=["decision", "top"], default="decision",
                   help="what must disagree with the truth: the decision or the raw top class")
    g.add_argument("--pre-roll", type=float, default=0.5, metavar="S", help="seconds before")
    g.add_argument("--post-roll", type=float, default=0.5, metavar="S", help="seconds after")
    g.add_argument("--max-snippet", type=float, default=10.0, metavar="S",
                   help="longest snippet in seconds")
    g.add_argument("--capture-every", type=float, default=5.0, metavar="S",
                   help="at most one snippet per (truth, predicted) pair every S seconds")
    g.add_argument("--uncertain-below", type=_fraction, default=0.5, metavar="P",
                   help="uncertain when the top smoothed probability is below P")
    g.add_argument("--uncertain-margin", type=_fraction, default=0.1, metavar="P",
                   help="uncertain when the top two smoothed probabilities are closer than P")


class HeadlessPrinter:
    """One JSON object per window on stdout (the windows.jsonl fields)."""

    def __init__(self, stream=None) -> None:
        self.stream = stream or sys.stdout

    def on_window(self, r) -> None:
        from monitor.session import dumps

        self.stream.write(dumps(r.record()) + "\n")
        self.stream.flush()


class ChangePrinter:
    """One readable line per decision change (the demo without a screen)."""

    def __init__(self, stream=None) -> None:
        self.stream = stream or sys.stdout
        self.last: str | None = "<start>"

    def on_window(self, r) -> None:
        if r.decision == self.last:
            return
        self.last = r.decision
        shown = r.decision or "undecided"
        truth = f"   truth {r.truth}" if r.truth else ""
        mark = "" if not r.truth or r.truth == r.decision else "   (differs)"
        conf = f"{max(r.smoothed):.2f}"
        self.stream.write(f"{r.t1:8.1f} s  {shown:<12} p={conf}{truth}{mark}\n")
        self.stream.flush()


def run_session(*, make_source, name: str, model: str, spec: str | None,
                truth_path: str | None, out: str | None, no_audio: bool, observers_extra: list,
                args, trust_model: bool = False, on_ready=None,
                stop: threading.Event | None = None, live_truth: bool = False,
                keep_features: bool = False, prepare=None) -> dict:
    """Validate everything, run one session, close it; return the summary.

    `make_source(card)` builds the source (file or microphone) once the card is known.
    Bad input is found before the session directory exists; if the source still fails to
    start (a device that cannot be opened), the empty directory is removed again.
    """
    import shutil

    from monitor.capture import CapturePolicy
    from monitor.engine import Engine
    from monitor.runners import load_runner
    from monitor.session import SessionWriter
    from monitor.spec import load_card_for_model
    from monitor.truth import LiveTruth, load_truth

    if prepare is not None:
        prepare()
    card = load_card_for_model(model, spec)
    decision = _decision(card, args)
    capture_settings = _capture(args)
    truth = load_truth(truth_path, classes=card.classes) if truth_path else None
    live = LiveTruth(card.classes) if live_truth and truth is None else None
    source = make_source(card)
    runner = load_runner(model, card, trust_model=trust_model)
    engine = Engine(card, runner, source, decision=decision,
                    truth=truth.label_for if truth else live.label_for if live else None,
                    keep_features=keep_features)
    meta = engine.describe()
    meta["truth_file"] = str(truth_path) if truth_path else None
    target = session_dir(out, name)
    existed = target.exists()
    writer = SessionWriter(target, meta, sample_rate=card.sample_rate, audio=not no_audio,
                           segment_s=60.0 * getattr(args, "segment_min", 60.0))
    capture = None
    if capture_settings is not None:
        capture = CapturePolicy(capture_settings, classes=card.classes,
                                sample_rate=card.sample_rate, sink=writer.on_snippet)
    engine.observers = [writer, *([capture] if capture else []), *observers_extra,
                        *([] if on_ready else [WriteWatch(writer)])]
    if on_ready is not None:
        on_ready(engine, capture, writer, live, card)
    stop = stop or threading.Event()
    old = signal.signal(signal.SIGINT, lambda *_: stop.set()) \
        if threading.current_thread() is threading.main_thread() else None
    summary = None
    # Start-up made many long-lived objects (modules, the model); freezing them keeps the
    # garbage collector's passes cheap while windows stream (a measurable share of live CPU).
    gc.collect()
    gc.freeze()
    try:
        summary = engine.run(stop)
        summary["session"] = str(writer.dir)
    except ScenemonError:
        writer.close(None)
        if engine.count == 0 and not existed:
            shutil.rmtree(writer.dir, ignore_errors=True)
        raise
    finally:
        if old is not None:
            signal.signal(signal.SIGINT, old)
    if capture is not None:
        capture.close()
        summary["snippets"] = dict(capture.counts)
        summary["snippets_rate_limited"] = capture.limited
    spans = truth.spans if truth else live.spans(end_t=summary["duration_s"]) if live else None
    if spans is not None:
        spans = [s for s in spans if s.onset < summary["duration_s"] + 1e-9]
    writer.close(summary, spans)
    if writer.error is not None:
        summary["write_error"] = writer.error_text
    return summary


def file_source(path: Path, *, fast: bool, allow_upsample: bool = False):
    from monitor.sources import FileSource

    return lambda card: FileSource(path, model_rate=card.sample_rate,
                                   window_samples=card.window_samples, realtime=not fast,
                                   allow_upsample=allow_upsample)


def mic_source(args):
    from monitor.sources import MicSource

    latency = args.latency
    try:
        latency = float(latency)
    except ValueError:
        pass
    return lambda card: MicSource(args.input, model_rate=card.sample_rate,
                                  window_samples=card.window_samples, latency=latency,
                                  blocksize=args.blocksize, max_seconds=args.seconds)


def finish(summary: dict) -> int:
    print_summary(summary)
    failure = summary.get("source_failure") or summary.get("write_error")
    if failure:
        sys.stderr.write(f"scenemon: {failure}\n")
        return 1
    return 0


class WriteWatch:
    """Says once, on stderr, when the session writer has stopped (disk full)."""

    def __init__(self, writer) -> None:
        self.writer, self.said = writer, False

    def on_window(self, r) -> None:
        if not self.said and self.writer.error_text:
            self.said = True
            sys.stderr.write(f"scenemon: {self.writer.error_text}; monitoring goes on\n")
            sys.stderr.flush()


def print_summary(summary: dict, stream=sys.stderr) -> None:
    acc = summary.get("accuracy")
    lines = [
        f"session   {summary.get('session')}",
        f"windows   {summary['windows']} over {summary['duration_s']:.1f} s, "
        f"{summary['decision_changes']} decision changes "
        f"({summary['switches_per_min'] or 0:.2f}/min)",
        f"compute   median {summary['ms_median'] or 0:.3f} ms, p99 "
        f"{summary['ms_p99'] or 0:.3f} ms per window",
        f"losses    {summary['overruns']} overruns, {summary['dropped_samples']} samples dropped",
    ]
    if acc is not None:
        lines.append(f"accuracy  {acc:.1%} of {summary['windows_with_truth']} windows with truth")
    stream.write("\n".join(lines) + "\n")


def run_ui(*, heading: str, **session_kw) -> int:
    """The terminal UI around one session; returns the exit code."""
    from monitor.ui.app import MonitorApp, SessionContext

    def start(hooks):
        def ready(engine, capture, writer, live, card):
            hooks.ready(SessionContext(engine, capture, writer, live, card))

        return run_session(observers_extra=[hooks.bridge], on_ready=ready, stop=hooks.stop,
                           live_truth=True, keep_features=True, **session_kw)

    app = MonitorApp(start, heading=heading)
    code = app.run()
    if app.error is not None:
        if isinstance(app.error, ScenemonError):
            sys.stderr.write(f"scenemon: {app.error}\n")
            return 2
        sys.stderr.write(f"scenemon: {type(app.error).__name__}: {app.error}\n")
        return 1
    if app.summary is not None:
        return finish(app.summary)
    return code if isinstance(code, int) else 0


def _printers(args) -> list:
    return [HeadlessPrinter()] if args.headless else [ChangePrinter()]


def _interactive() -> bool:
    return sys.stdin.isatty() and sys.stdout.isatty() and os.environ.get("TERM") != "dumb"


def _run(args, *, heading: str, **kw) -> int:
    """The terminal UI, or without a terminal (or with --headless) printed lines."""
    if args.headless or not _interactive():
        return finish(run_session(observers_extra=_printers(args), args=args, **kw))
    return run_ui(heading=heading, args=args, **kw)


def cmd_replay(args) -> int:
    audio = Path(args.audio)
    return _run(args, heading=f"replay {audio.name}{' (fast)' if args.fast else ''}",
                make_source=file_source(audio, fast=args.fast, allow_upsample=args.allow_upsample),
                name=audio.stem, model=args.model, spec=args.spec, truth_path=args.truth,
                out=args.out, no_audio=args.no_audio, trust_model=args.trust_model)


def cmd_live(args) -> int:
    return _run(args, heading=f"live {args.input or ''}".strip(), make_source=mic_source(args),
                name="live", model=args.model, spec=args.spec, truth_path=None, out=args.out,
                no_audio=args.no_audio, trust_model=args.trust_model)


def cmd_devices(args) -> int:
    from monitor.sources import import_sounddevice, input_devices

    devs = input_devices(import_sounddevice())
    if not devs:
        sys.stdout.write("no audio input devices\n")
        return 0
    sys.stdout.write(f"  {'index':>5}  {'name':<32} {'host API':<12} {'channels':>8}  rate\n")
    for d in devs:
        mark = "*" if d["default"] else " "
        sys.stdout.write(f"{mark} {d['index']:>5}  {d['name'][:32]:<32} {d['hostapi'][:12]:<12} "
                         f"{d['channels']:>8}  {d['default_rate']:.0f} Hz\n")
    sys.stdout.write("* = the system's default input\n")
    return 0


def cmd_demo(args) -> int:
    root = project_root()
    model = args.model or str(root / "models" / "demo.tflite")
    if args.mic:
        return _run(args, heading=f"demo on the microphone, {Path(model).name}",
                    make_source=mic_source(args), name="demo-mic", model=model, spec=None,
                    truth_path=None, out=args.out, no_audio=args.no_audio)
    from monitor.demo import tour_paths

    folder = root / "recordings" / "demo"
    wav, tsv = tour_paths(folder)

    def make_tour() -> None:  # synthesis imports scipy.signal: keep it off the first screen
        from monitor.demo.tour import ensure_tour

        ensure_tour(folder)

    return _run(args, heading=f"demo tour, {Path(model).name}{' (fast)' if args.fast else ''}",
                make_source=file_source(wav, fast=args.fast), name="demo", model=model,
                spec=None, truth_path=str(tsv), out=args.out, no_audio=args.no_audio,
                prepare=make_tour)


def cmd_report(args) -> int:
    import json

    from monitor.review.report import session_scores, text_report, write_html
    from monitor.session import load_session

    s = load_session(args.session)
    if not s.windows:
        raise ScenemonError(f"{args.session}: the session holds no windows")
    sc = session_scores(s)
    if args.json:
        sys.stdout.write(json.dumps(sc.to_dict(), indent=2) + "\n")
    else:
        sys.stdout.write(text_report(s, sc))
    if args.html:
        out = write_html(s, sc, Path(args.html))
        sys.stderr.write(f"wrote {out}\n")
    return 0


def cmd_tune(args) -> int:
    from monitor.review.tune import apply_to_card, parse_grid, recommend, sweep, table
    from monitor.session import load_session

    sessions = [load_session(p) for p in args.sessions]
    for s in sessions:
        if not s.windows:
            raise ScenemonError(f"{s.dir}: the session holds no windows")
        for n in s.notes:
            sys.stderr.write(f"scenemon: warning: {s.dir}: {n}\n")
    if len({tuple(s.classes) for s in sessions}) > 1:
        raise ScenemonError(f"{sessions[1].dir}: its classes differ from {sessions[0].dir}'s")
    t = time.perf_counter()
    rows = sweep(sessions, parse_grid(args.grid))
    best = recommend(rows)
    if args.all:
        for r in rows:
            r.front = True
    sys.stdout.write(table(rows, best, limit=len(rows) if args.all else 25))
    sys.stdout.write(f"recommended: {best.label()}  ({best.accuracy:.1%}, "
                     f"{best.switches_per_min:.2f} switches/min; {time.perf_counter() - t:.1f} s)\n")
    if args.apply:
        apply_to_card(Path(args.apply), best.settings)
        sys.stdout.write(f"wrote the [decision] table of {args.apply}\n")
    return 0


def cmd_harvest(args) -> int:
    from monitor.review.harvest import harvest, progress_bar

    include = tuple(x.strip() for x in args.include.split(",") if x.strip())
    bad = [x for x in include if x not in ("disagreement", "uncertain", "manual")]
    if bad:
        raise ScenemonError(f"--include: unknown reason {bad[0]!r} (use disagreement, "
                            f"uncertain, manual)")
    res = harvest([Path(p) for p in args.sessions], Path(args.out), include=include,
                  drop_unknown=args.drop_unknown, progress=progress_bar())
    for n in res.notes:
        sys.stderr.write(f"scenemon: note: {n}\n")
    sys.stdout.write(f"harvest {args.out}: {sum(res.added.values())} new snippet(s); "
                     f"{res.duplicates} duplicate(s), {res.dropped} dropped, "
                     f"{res.unknown_skipped} unknown left out, {res.excluded} of other reasons\n")
    for label in sorted(res.total):
        sys.stdout.write(f"  {label:<24} {res.total[label]:>5}  (+{res.added.get(label, 0)})\n")
    return 0


def cmd_relabel(args) -> int:
    from monitor.session import load_session
    from monitor.ui.app import RelabelApp

    s = load_session(args.session)
    if not (s.dir / "snippets").is_dir():
        raise ScenemonError(f"{s.dir}: the session has no snippets to relabel")
    RelabelApp(s.dir, s.classes).run()
    return 0


def cmd_quantize(args) -> int:
    from monitor.device.parity import calibration_features, quantize
    from monitor.spec import load_card_for_model

    card = load_card_for_model(args.model, args.spec)
    feats = calibration_features(card, [Path(p) for p in args.calibrate], count=args.windows,
                                 seed=args.seed)
    res = quantize(Path(args.model), card, feats, Path(args.out), trust_model=args.trust_model)
    sys.stdout.write(f"wrote {res['model']} ({res['bytes']} bytes) and {res['card']} from "
                     f"{res['windows']} calibration windows\n")
    return 0


def cmd_compare(args) -> int:
    import json

    from monitor.device.parity import compare, compare_text
    from monitor.runners import load_runner
    from monitor.spec import load_card_for_model

    if len(args.model) != 2:
        raise ScenemonError("compare: give --model exactly twice (A, then B)")
    cards = [load_card_for_model(m) for m in args.model]
    runners = [load_runner(m, c) for m, c in zip(args.model, cards)]
    res = compare(runners[0], cards[0], runners[1], cards[1], [Path(p) for p in args.sources])
    sys.stdout.write(json.dumps(res, indent=2) + "\n" if args.json
                     else compare_text(res, args.model[0], args.model[1]))
    if args.min_agree is not None and res["top1_agreement"] < args.min_agree:
        sys.stderr.write(f"scenemon: top-1 agreement {res['top1_agreement']:.2%} is below "
                         f"--min-agree {args.min_agree:.2%}\n")
        return 1
    return 0


def cmd_vectors(args) -> int:
    from monitor.device.parity import write_vectors
    from monitor.runners import load_runner
    from monitor.spec import load_card_for_model

    card = load_card_for_model(args.model, args.spec)
    runner = load_runner(args.model, card)
    meta = write_vectors(runner, card, Path(args.audio), Path(args.out), count=args.count)
    sys.stdout.write(f"wrote {meta['windows']} windows of golden vectors to {args.out}\n")
    return 0


def cmd_repair(args) -> int:
    from monitor.repair import repair

    res = repair(args.session)
    if not res["repaired"]:
        sys.stdout.write(f"{res['session']}: {res['note']}\n")
        return 0
    sys.stdout.write(f"{res['session']}: repaired\n" + "".join(f"  {a}\n" for a in res["actions"]))
    return 0


def cmd_score(args) -> int:
    from monitor.score import aggregate_text, run_score

    agg = run_score(Path(args.archive), args.model, Path(args.out), spec=args.spec,
                    truth_glob=args.truth_glob, workers=args.workers, cluster=args.cluster,
                    progress=sys.stderr.isatty())
    sys.stdout.write(aggregate_text(agg))
    return 0


def cmd_bench(args) -> int:
    from monitor.bench import run_bench

    root = project_root()
    model = args.model or str(root / "models" / "demo.tflite")
    run_bench(model, spec=args.spec, seconds=args.seconds)
    return 0


def main(argv: list[str] | None = None) -> int:
    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
    ap = build_parser()
    args = ap.parse_args(argv)
    if not args.command:
        ap.print_help()
        return 2
    debug = getattr(args, "debug", False)
    handlers = {"replay": cmd_replay, "live": cmd_live, "devices": cmd_devices,
                "demo": cmd_demo, "bench": cmd_bench, "report": cmd_report,
                "tune": cmd_tune, "harvest": cmd_harvest, "relabel": cmd_relabel,
                "quantize": cmd_quantize, "compare": cmd_compare, "vectors": cmd_vectors,
                "repair": cmd_repair, "score": cmd_score}
    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = _show_warning
        try:
            return handlers[args.command](args)
        except ScenemonError as exc:
            if debug:
                raise
            sys.stderr.write(f"scenemon: {exc}\n")
            return 2
        except KeyboardInterrupt:
            return 130
        except Exception as exc:  # runtime failure
            if debug:
                raise
            sys.stderr.write(f"scenemon: {type(exc).__name__}: {exc} (run with --debug for details)\n")
            return 1


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    if issubclass(category, (DeprecationWarning, FutureWarning)):
        return
    sys.stderr.write(f"scenemon: warning: {message}\n")


if __name__ == "__main__":
    sys.exit(main())
