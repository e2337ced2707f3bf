"""`scenemon` command line: parses the flags, builds plans, dispatches to the modules.

Exit codes (`errors.ExitCode`): 0 ok, 1 runtime failure, 2 bad input (file, card, flag) with
one sentence on stderr naming the file and the problem; no traceback unless --debug.

Owns: the entry point, the flag groups (`flags`) and one module per command beside them.
May import: everything below it.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from pathlib import Path

from monitor import __version__
from monitor.base.errors import ExitCode, ScenemonError, exit_code_for, one_sentence
from monitor.base.files import terminal_safe
from monitor.cli.flags import (
    EXAMPLES,
    Parser,
    add_capture_flags,
    add_decision_flags,
    add_live_flags,
    add_model_flags,
    add_session_flags,
    fraction,
    mic_input,
    model_plans,
    positive,
    positive_int,
    seconds,
    session_plan,
    subcommand,
)

CARD_CHECK_HELP = """\
Compare the card's features of one window of AUDIO with FEATURES.npy: what your
training code computed for the window that starts at --start, unscaled (or with
--scaled after the card's scaling), in the model's input order (a channel axis of
1 allowed). Prints the shapes, the max abs difference (tolerance: 1e-3 of the
file's range) and which frames and bands it sits in. When they differ, it tries
the card with one key changed, then two (center, pad_mode, window_in_frame,
mel_scale, mel_norm, mel_triangles, power, log, log_offset/log_floor, db_ref,
top_db, window, window_symmetric, pcm_bits, layout, dct_norm) and prints the card
lines that make it match. Exit 0 match, 1 mismatch, 2 bad input."""


def build_parser() -> argparse.ArgumentParser:
    """The `scenemon` parser: every command, its flags, help and examples."""
    ap = Parser(prog="scenemon",
                 description="Watch a small audio classifier decide on live or recorded sound, "
                             "record the session, and check it against the truth.",
                 epilog="example: scenemon replay recordings/demo/tour.wav --model "
                        "models/demo.tflite --truth recordings/demo/tour.tsv --fast --headless",
                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--version", action="version", version=f"scenemon {__version__}")
    ap.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = ap.add_subparsers(dest="command", metavar="COMMAND", parser_class=Parser)

    p = subcommand(sub, "replay", "run an audio file through the model and record a session",
             "Run a WAV/FLAC/OGG file through the same chain as the microphone and write a "
             "session directory.")
    p.add_argument("audio", metavar="AUDIO", help="audio file (any rate and channel count)")
    add_model_flags(p, many=True)
    p.add_argument("--truth", metavar="TRUTH.tsv", help="truth: onset<TAB>offset<TAB>label lines")
    p.add_argument("--fast", action="store_true", help="as fast as the CPU allows (default: real time)")
    p.add_argument("--allow-upsample", action="store_true",
                   help="accept a file below the model's rate (its top band will be empty)")
    add_session_flags(p)
    add_decision_flags(p)
    add_capture_flags(p)

    p = subcommand(sub, "live", "run the model on a microphone and record a session",
             "Open an input device at its own rate, down-mix, resample to the model's rate and "
             "run the chain until Ctrl-C.")
    add_model_flags(p, many=True)
    add_live_flags(p)
    add_session_flags(p)
    add_decision_flags(p)
    add_capture_flags(p)

    subcommand(sub, "devices", "list the audio input devices",
         "List input devices: index, name, host API, channels, default rate; * marks the default.",
         "example:\n  scenemon devices\n  scenemon live --model m.tflite --input 3")

    p = subcommand(sub, "demo", "the bundled demo model on the bundled scene tour",
             "Run the demo model on the demo scene tour (made on first use under "
             "recordings/demo/) and record a session.")
    add_model_flags(p, required=False, many=True, default_help=" (default: models/demo.tflite)")
    p.add_argument("--fast", action="store_true", help="as fast as the CPU allows")
    p.add_argument("--mic", action="store_true", help="the microphone instead of the tour")
    add_live_flags(p)
    add_session_flags(p)
    add_capture_flags(p)

    p = subcommand(sub, "report", "a session's account: accuracy, confusion, latency, plots",
             "Summarise a session on the terminal, and with --html as one self-contained page "
             "with plots and snippet players.")
    p.add_argument("session", metavar="SESSION", help="session directory")
    p.add_argument("--html", metavar="OUT.html", help="also write the HTML report here")
    p.add_argument("--json", action="store_true", help="print the scores as JSON instead")

    p = subcommand(sub, "tune", "sweep decision settings over recorded sessions",
             "Replay the stored raw probabilities of sessions with truth through a grid of "
             "decision settings (no model needed).")
    p.add_argument("sessions", nargs="+", metavar="SESSION", help="session directories")
    p.add_argument("--grid", metavar="SPEC",
                   help="e.g. 'smoothing=mean,ema;enter=0.5,0.7;confirm=1,2' (unnamed fields "
                        "keep the default grid)")
    p.add_argument("--apply", metavar="CARD",
                   help="write the recommended settings into this card's [decision] table")
    p.add_argument("--all", action="store_true", help="list every setting, not only the front")
    p.add_argument("--model-b", action="store_true",
                   help="tune the second model of A/B sessions (windows.b.jsonl)")

    p = subcommand(sub, "harvest", "gather captured snippets into a retraining set",
             "Collect snippets of many sessions into DIR/<label>/ with DIR/manifest.csv; "
             "re-running adds only what is new. Folders that are not sessions are skipped.")
    p.add_argument("sessions", nargs="+", metavar="SESSION", help="session directories")
    p.add_argument("--out", required=True, metavar="DIR", help="the retraining set folder")
    p.add_argument("--include", metavar="REASONS",
                   help="comma-separated reasons to take (default: all of disagreement, "
                        "uncertain, manual, models_disagree, unfamiliar)")
    p.add_argument("--drop-unknown", action="store_true",
                   help="leave out snippets still labelled unknown")

    p = subcommand(sub, "relabel", "review a session's snippets: play, keep, drop, relabel",
             "The relabel view on a session directory: enter (or space) plays a snippet, k "
             "keeps it, d drops it, l gives it another label (number keys pick the class). "
             "Only sidecars change. Needs a terminal.",
             "example:\n  scenemon relabel recordings/20261201-101500-walk")
    p.add_argument("session", metavar="SESSION", help="session directory")

    p = subcommand(sub, "quantize", "full-integer int8 .tflite from a Keras model and field audio",
             "Post-training quantisation (int8 weights, activations, input and output) "
             "calibrated on real windows of recordings or sessions through the card's front "
             "end; writes the card beside the output.")
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

    p = subcommand(sub, "compare", "two models (or one model in two runtimes) on the same windows",
             "Top-1 and decision agreement, probability differences and the A-vs-B table of two "
             "models (float and int8, or one .tflite in LiteRT and in the microcontroller "
             "runtime) on exactly the same windows; also the front end's float32 error.")
    add_model_flags(p, many=True)
    p.add_argument("sources", nargs="+", metavar="AUDIO_OR_SESSION",
                   help="recordings or session directories whose windows both models see")
    p.add_argument("--min-agree", type=fraction, metavar="FRACTION",
                   help="exit 1 when the top-1 agreement (a fraction, e.g. 0.95) is below it")
    p.add_argument("--json", action="store_true", help="print the figures as JSON")

    p = subcommand(sub, "vectors", "golden vectors, the C front end and a check program for firmware",
             "Write pcm.csv, features.csv, output.csv (int8 tensors too, from the "
             "microcontroller runtime), meta.json, frontend_constants.h, the portable C front "
             "end and check.c with its Makefile into DIR.")
    add_model_flags(p, runtime="micro")  # cmd_vectors: a .tflite runs in micro unless told
    p.add_argument("audio", metavar="AUDIO", help="the recording to cut windows from")
    p.add_argument("--out", required=True, metavar="DIR", help="folder to write (new or empty)")
    p.add_argument("--count", type=positive_int, metavar="N",
                   help="N windows spread over the recording, every predicted class covered "
                        "(default: all windows)")
    p.add_argument("--seed", type=int, default=0, metavar="N",
                   help="seed of the window choice (default 0)")

    p = subcommand(sub, "repair", "make a session that did not close cleanly whole",
             "Drop a torn last line, bring the audio header up to the frames on disk, rebuild "
             "truth.tsv and write summary.json marked recovered. A session still being "
             "recorded is refused.", "example:\n  scenemon repair recordings/20261201-101500-live")
    p.add_argument("session", metavar="SESSION", help="session directory")

    p = subcommand(sub, "score", "re-score a folder of recordings, locally or on a Dask cluster",
             "Run every audio file and session under ARCHIVE through the chain; one results "
             "file each plus an aggregate. Up-to-date results are skipped, so an interrupted "
             "run resumes.")
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

    p = subcommand(sub, "bench", "will this model keep up on this machine?",
             "Measure start-up, per-window cost and fast-replay speed.")
    add_model_flags(p, required=False, default_help=" (default: models/demo.tflite)")
    p.add_argument("--seconds", type=positive, default=240.0, metavar="SECONDS",
                   help="seconds of tour audio to replay (default 240)")

    p = subcommand(sub, "profile", "learn what a model's own sounds look like (for unfamiliar sounds)",
             "Fit the feature profile beside a model from audio it is meant for: recordings "
             "or sessions. Later sessions mark windows far from it as unfamiliar.")
    add_model_flags(p)
    p.add_argument("sources", nargs="+", metavar="AUDIO_OR_SESSION",
                   help="recordings or session directories of the model's own scenes")
    p.add_argument("--out", metavar="M.profile.npz", help="default: beside the model")
    p.add_argument("--quantile", type=fraction, default=0.995, metavar="FRACTION",
                   help="threshold at this quantile of held-out profile windows (default 0.995)")

    p = subcommand(sub, "budget", "what the model and its front end cost on the microcontroller",
             "RAM (the interpreter's recorded arena, the front end's buffers), flash (model "
             "and tables), every operator and the ones the microcontroller runtime cannot run, "
             "and the work per window; with --clock-mhz an estimated duty cycle.")
    add_model_flags(p, runtime=None)  # the microcontroller runtime's budget: no other runtime
    p.add_argument("--clock-mhz", type=positive, metavar="MHZ",
                   help="the target's clock, for a duty-cycle estimate (an assumption of "
                        "cycles per operation, not a measurement)")
    p.add_argument("--json", action="store_true",
                   help="print arena_bytes, ram_bytes, flash_bytes, macs, ops, "
                        "unsupported_ops and the rest as JSON")

    p = subcommand(sub, "card", "check a model card against features from training code",
             "Model card tools. card check: compute one window of AUDIO through the card's "
             "front end and compare it with FEATURES.npy from your own training code; when "
             "they differ, say where, and try the card with one key, then two keys changed.")
    actions = p.add_subparsers(dest="card_command", metavar="ACTION", parser_class=Parser,
                               help="check: compare one window's features with training's")
    c = actions.add_parser("check", help="compare the card's features with a .npy from training",
                           description=CARD_CHECK_HELP,
                           epilog=EXAMPLES["card check"],
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

    for p in sub.choices.values():  # --debug also after the command; SUPPRESS keeps the top one
        p.add_argument("--debug", action="store_true", default=argparse.SUPPRESS,
                       help="show tracebacks")
    return ap


def _interactive() -> bool:
    return sys.stdin.isatty() and sys.stdout.isatty() and os.environ.get("TERM") != "dumb"


def _run(args, plan, heading: str) -> int:
    """The terminal UI, or without a terminal (or with --headless) printed lines."""
    if args.headless or not _interactive():
        from monitor.assembly.run import run_printed

        return run_printed(plan, json_lines=args.headless)
    from monitor.ui.app import run_ui

    return run_ui(plan, heading=heading)


# --- commands ----------------------------------------------------------------------------------
def cmd_replay(args) -> int:
    """`scenemon replay`: a recording through the chain into a session (UI or printed lines)."""
    from monitor.assembly.plan import FileInput

    audio = Path(args.audio)
    plan = session_plan(args, FileInput(audio, not args.fast, args.allow_upsample),
                        name=audio.stem, truth=args.truth)
    return _run(args, plan, f"replay {audio.name}{' (fast)' if args.fast else ''}")


def cmd_live(args) -> int:
    """`scenemon live`: an input device through the chain into a session."""
    return _run(args, session_plan(args, mic_input(args), name="live"),
                f"live {args.input or ''}".strip())


def cmd_demo(args) -> int:
    """`scenemon demo`: the demo model(s) on the demo tour (made on first use) or the microphone."""
    from monitor.assembly.assemble import project_root
    from monitor.assembly.plan import FileInput
    from monitor.demo import tour_paths

    root = project_root()
    default = str(root / "models" / "demo.tflite")
    names = " + ".join(Path(m).name for m in (args.model or [default]))
    if args.mic:
        return _run(args, session_plan(args, mic_input(args), name="demo-mic", default_model=default),
                    f"demo on the microphone, {names}")
    folder = root / "recordings" / "demo"
    wav, tsv = tour_paths(folder)

    def make_tour() -> None:  # synthesis imports scipy.signal: keep it off the first screen
        from monitor.demo.tour import ensure_tour

        ensure_tour(folder)

    plan = session_plan(args, FileInput(wav, not args.fast), name="demo", default_model=default,
                        truth=str(tsv), prepare=make_tour,
                        prepare_note="making the demo tour (the first run only) …")
    return _run(args, plan, f"demo tour, {names}{' (fast)' if args.fast else ''}")


def cmd_devices(args) -> int:
    """`scenemon devices`: the input devices, one line each."""
    from monitor.sound.sources import device_table

    sys.stdout.write(device_table())
    return 0


def cmd_report(args) -> int:
    """`scenemon report`: a session's account on the terminal, as JSON or as HTML."""
    from monitor.review.report import run_report

    return run_report(Path(args.session), html=Path(args.html) if args.html else None,
                      as_json=args.json)


def cmd_tune(args) -> int:
    """`scenemon tune`: the decision-settings sweep over sessions with truth."""
    from monitor.review.tune import run_tune

    return run_tune([Path(p) for p in args.sessions], grid=args.grid,
                    apply=Path(args.apply) if args.apply else None, show_all=args.all,
                    model=1 if args.model_b else 0)


def cmd_harvest(args) -> int:
    """`scenemon harvest`: sessions' snippets into a retraining set."""
    from monitor.review.harvest import run_harvest

    return run_harvest([Path(p) for p in args.sessions], Path(args.out), include=args.include,
                       drop_unknown=args.drop_unknown)


def cmd_relabel(args) -> int:
    """`scenemon relabel`: the relabel view on a session (needs a terminal)."""
    from monitor.ui.app import run_relabel

    return run_relabel(Path(args.session), interactive=_interactive())


def cmd_quantize(args) -> int:
    """`scenemon quantize`: a full-integer int8 .tflite calibrated on field audio."""
    from monitor.device.quantize import run_quantize

    return run_quantize(Path(args.model), card=Path(args.card) if args.card else None,
                        calibrate=[Path(p) for p in args.calibrate], out=Path(args.out),
                        windows=args.windows, seed=args.seed, trust_model=args.trust_model)


def cmd_compare(args) -> int:
    """`scenemon compare`: two models, or one model in two runtimes, on the same windows."""
    from monitor.device.compare import run_compare

    plans = model_plans(args)
    if len(plans) != 2:
        raise ScenemonError("compare: give --model twice (A, then B; the same file twice with "
                            "two --runtime values compares two runtimes)")
    return run_compare(plans, [Path(p) for p in args.sources], min_agree=args.min_agree,
                       as_json=args.json)


def cmd_vectors(args) -> int:
    """`scenemon vectors`: golden vectors, the C front end and its check program."""
    import dataclasses

    from monitor.device.vectors import run_vectors

    plan = model_plans(args)[0]
    if args.runtime is None and plan.path.suffix.lower() == ".tflite":
        plan = dataclasses.replace(plan, runtime="micro")  # the firmware's own kernels
    return run_vectors(plan, Path(args.audio), Path(args.out), count=args.count, seed=args.seed)


def cmd_budget(args) -> int:
    """`scenemon budget`: RAM, flash, operators and work per window on the target."""
    import dataclasses

    from monitor.device.budget import run_budget

    plan = dataclasses.replace(model_plans(args)[0], runtime="micro")
    return run_budget(plan, clock_mhz=args.clock_mhz, as_json=args.json)


def cmd_repair(args) -> int:
    """`scenemon repair`: make a session that did not close cleanly whole."""
    from monitor.session.repair import run_repair

    return run_repair(Path(args.session))


def cmd_score(args) -> int:
    """`scenemon score`: re-score an archive of recordings and sessions."""
    from monitor.review.score import run_score_command

    return run_score_command(Path(args.archive), model_plans(args), Path(args.out),
                             truth_glob=args.truth_glob, workers=args.workers,
                             cluster=args.cluster)


def cmd_bench(args) -> int:
    """`scenemon bench`: will this model keep up on this machine?"""
    from monitor.assembly.assemble import project_root
    from monitor.cli.bench import run_bench

    plan = model_plans(args, str(project_root() / "models" / "demo.tflite"))[0]
    run_bench(plan, seconds=args.seconds)
    return 0


def cmd_profile(args) -> int:
    """`scenemon profile`: fit the unfamiliar-sound profile beside a model."""
    from monitor.assembly.run import run_profile

    return run_profile(model_plans(args)[0], [Path(p) for p in args.sources],
                       out=Path(args.out) if args.out else None, quantile=args.quantile)


def cmd_card(args) -> int:
    """`scenemon card check`: the card's features of one window against training's."""
    if args.card_command != "check":
        raise ScenemonError("card: give an action: scenemon card check CARD AUDIO FEATURES.npy "
                            "(see scenemon card --help)")
    from monitor.features.cardcheck import run_card_check

    return run_card_check(Path(args.card), Path(args.audio), Path(args.features),
                          start_s=args.start, scaled=args.scaled)


HANDLERS = {"replay": cmd_replay, "live": cmd_live, "devices": cmd_devices, "demo": cmd_demo,
            "bench": cmd_bench, "report": cmd_report, "tune": cmd_tune, "harvest": cmd_harvest,
            "relabel": cmd_relabel, "quantize": cmd_quantize, "compare": cmd_compare,
            "vectors": cmd_vectors, "repair": cmd_repair, "score": cmd_score,
            "profile": cmd_profile, "budget": cmd_budget, "card": cmd_card}


def main(argv: list[str] | None = None) -> int:
    """Run `scenemon` with `argv` (default: the process's arguments); return the exit code.

    Parameters
    ----------
    argv : list of str, optional
        The arguments after the program name.

    Returns
    -------
    int
        0 ok, 1 runtime failure, 2 bad input (`errors.ExitCode`); every error is one sentence
        on stderr, with a traceback only under ``--debug``.
    """
    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
    ap = build_parser()
    args = ap.parse_args(argv)
    if not args.command:
        ap.print_help()
        return ExitCode.BAD_INPUT
    debug = getattr(args, "debug", False)
    from monitor.base.native import keep_freed_memory, quiet_tensorflow

    quiet_tensorflow(debug)
    keep_freed_memory()
    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = _show_warning
        try:
            return int(HANDLERS[args.command](args))
        except (Exception, KeyboardInterrupt) as exc:
            if debug and not isinstance(exc, KeyboardInterrupt):
                raise
            if not isinstance(exc, KeyboardInterrupt):
                sys.stderr.write(terminal_safe(f"scenemon: {one_sentence(exc)}\n"))
            return exit_code_for(exc)


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    if issubclass(category, (DeprecationWarning, FutureWarning)):
        return
    sys.stderr.write(f"scenemon: warning: {message}\n")


if __name__ == "__main__":
    sys.exit(main())
