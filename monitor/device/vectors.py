"""`scenemon vectors`: golden vectors, the portable C front end and a check program for the
firmware, in one folder.

The golden int8 outputs come from the microcontroller runtime (the firmware's own kernels:
they are what the firmware must reproduce exactly). With ``--count N`` the windows are
spread over the recording so that every class the model predicts there is covered: at least
one window of each predicted class, the rest shared in proportion to how often each is
predicted, each class's share spread evenly over its windows (seeded), in time order.

Nothing written names a path of the machine that wrote it (file names only). The folder
also holds ``check.c``, ``check_params.h`` and a ``Makefile``: ``make -C DIR check`` builds
the check with the shipped front end, runs ``pcm.csv`` through it and compares against
``features.csv`` and ``input_int8.csv`` (exit 0 within tolerance).
"""

from __future__ import annotations

import io
import sys
from pathlib import Path

import numpy as np

from monitor.assembly.plan import ModelPlan
from monitor.base.errors import ExitCode, ScenemonError
from monitor.base.files import terminal_safe
from monitor.features.card import ModelCard

CHECK_SOURCES = (Path(__file__).with_name("check.c"), Path(__file__).with_name("check.mk"))
FEATURE_TOL_OF_RANGE = 1e-3  # C against Python: 1e-3 of the features' range (common practice)
INT8_TOL_STEPS = 1  # a float difference of ~1e-5 can move a value across a rounding edge


def pick_windows(top: np.ndarray, count: int | None, seed: int = 0) -> np.ndarray:
    """Indices of `count` windows covering every predicted class (module docstring).

    Parameters
    ----------
    top : numpy.ndarray
        ``(n,)`` predicted class of each window.
    count : int or None
        Windows wanted (None: all).
    seed : int
        Seed of the choice.

    Returns
    -------
    numpy.ndarray
        ``(min(count, n),)`` sorted window indices (all ``n`` when `count` is None).

    Raises
    ------
    ScenemonError
        `count` is below the number of predicted classes.
    """
    n = len(top)
    if count is None or count >= n:
        return np.arange(n)
    classes, sizes = np.unique(top, return_counts=True)
    if count < len(classes):
        raise ScenemonError(f"--count {count} cannot cover the {len(classes)} classes the model "
                            f"predicts in this recording; give at least {len(classes)}")
    alloc = np.ones(len(classes), int)
    rest = count - len(classes)
    share = rest * sizes / sizes.sum()
    alloc += np.floor(share).astype(int)
    left = count - alloc.sum()
    for k in np.argsort(-(share - np.floor(share)), kind="stable")[:left]:
        alloc[k] += 1
    alloc = np.minimum(alloc, sizes)
    while alloc.sum() < count:  # a class smaller than its share: give the rest to others
        room = sizes - alloc
        alloc[int(np.argmax(room))] += 1
    rng = np.random.default_rng(seed)
    picked = []
    for c, k in zip(classes, alloc):
        idx = np.flatnonzero(top == c)
        edges = np.linspace(0, len(idx), k + 1)
        for a, b in zip(edges, edges[1:]):
            picked.append(int(idx[int(rng.integers(int(a), max(int(a) + 1, int(b))))]))
    return np.array(sorted(picked))


def _csv(path: Path, rows: np.ndarray, fmt: str) -> None:
    buf = io.BytesIO()
    np.savetxt(buf, rows.reshape(len(rows), -1), fmt=fmt, delimiter=",")
    _put(path, buf.getvalue())


def _put(path: Path, data: bytes) -> None:
    """Write one file of the folder atomically: a link there is replaced, never followed."""
    from monitor.base.files import atomic_write

    atomic_write(path, data)


def read_csv(path: Path, dtype=np.float64) -> np.ndarray:
    """A vectors CSV file as a 2-D array, one window per row (`dtype` for the integer files).

    Parameters
    ----------
    path : Path
        A CSV file of the vectors folder.
    dtype : numpy dtype
        Of the result.

    Returns
    -------
    numpy.ndarray
        ``(windows, values)``.
    """
    return np.loadtxt(path, delimiter=",", dtype=dtype, ndmin=2)


def _check_target(out: Path) -> None:
    if out.exists() and not out.is_dir():
        raise ScenemonError(f"{out}: exists and is not a folder; --out names the folder the "
                            f"vectors go into")
    if out.is_dir() and any(out.iterdir()) and not (out / "meta.json").is_file():
        raise ScenemonError(f"{out}: holds other files; choose a new or empty folder")
    if out.is_symlink():
        raise ScenemonError(f"{out}: is a link; --out names a folder, not a link to one")
    links = sorted(p.name for p in out.iterdir() if p.is_symlink()) if out.is_dir() else []
    if links:
        raise ScenemonError(f"{out / links[0]}: is a link; vectors never write through links "
                            f"(remove it, or choose a new folder)")


# every file a vectors folder may hold: an earlier run's are removed before a new one writes,
# so that a folder rewritten for another card keeps no file of the other front end (the
# Makefile and `emulate` choose the front end's source by the files there)
OWNED = ("meta.json", "pcm.csv", "features.csv", "output.csv", "input_int8.csv",
         "output_int8.csv", "features_q16.csv", "frontend_constants.h", "frontend.c",
         "frontend_q15.c", "frontend.h", "check.c", "check_params.h", "Makefile",
         "frontend_signal.tflite", "graph_q.csv", "graph_shift.csv")


def _forget_earlier(out: Path) -> None:
    """Remove an earlier vectors run's files from `out` (`OWNED`; nothing else)."""
    for name in OWNED:
        p = out / name
        if p.is_file() and not p.is_symlink():
            p.unlink()


def check_params(card: ModelCard, runner, windows: int, features: np.ndarray) -> str:
    """The text of ``check_params.h``: what ``check.c`` checks against and its tolerances.

    Parameters
    ----------
    card : ModelCard
        The card: a q15 front end is checked exactly (tolerances 0).
    runner : Runner
        An int8 model also gives the input tensor's scale and zero point, so the check can
        quantise the C front end's features itself.
    windows : int
        Windows written; the check insists on reading exactly as many.
    features : numpy.ndarray
        The written features; the feature tolerance is `FEATURE_TOL_OF_RANGE` of their range.

    Returns
    -------
    str
        The header's text.
    """
    from monitor.device.constants import cfloat

    span = float(features.max() - features.min()) if features.size else 1.0
    int8 = getattr(runner, "in_dtype", None) == np.int8
    exact = card.frontend.pcm.arithmetic == "q15"  # integers: the C must equal Python exactly
    lines = ["/* check_params.h: written by `scenemon vectors` for check.c */",
             "#ifndef SCENEMON_CHECK_PARAMS_H", "#define SCENEMON_CHECK_PARAMS_H",
             f"#define SM_CHECK_WINDOWS {windows}",
             f"#define SM_CHECK_INT8 {int(int8)}",
             f"#define SM_CHECK_FEATURE_TOL "
             f"{cfloat(0.0 if exact else FEATURE_TOL_OF_RANGE * max(span, 1e-6))}",
             f"#define SM_CHECK_INT8_STEPS {0 if exact else INT8_TOL_STEPS}"]
    if int8:
        lines += [f"#define SM_INPUT_SCALE {cfloat(runner.in_scale)}",
                  f"#define SM_INPUT_ZERO_POINT {int(runner.in_zero)}"]
    lines += ["#endif", ""]
    return "\n".join(lines)


def write_vectors(loaded, audio: Path, out: Path, *, count: int | None = None,
                  seed: int = 0) -> dict:
    """Write the golden vectors folder (see module docstring); returns meta.json's content.

    Parameters
    ----------
    loaded : LoadedModel
        The model.
    audio : Path
        The recording.
    out : Path
        The folder (new, empty, or an earlier vectors folder without links).
    count : int, optional
        Windows wanted (None: all).
    seed : int
        Seed of the window choice.

    Returns
    -------
    dict
        meta.json's content.

    Raises
    ------
    ScenemonError
        `out` is not a folder, holds files other than an earlier vectors folder's, or is or
        holds a link; or `count` is below the number of classes the model predicts there.
    """
    from monitor.assembly.assemble import file_windows
    from monitor.base.files import atomic_write, dumps
    from monitor.device import c_sources
    from monitor.device.constants import header
    from monitor.features.frontend import FrontEnd
    from monitor.sound.samples import from_pcm16, to_pcm16

    card, runner = loaded.card, loaded.runner
    _check_target(out)
    _forget_earlier(out)
    pcm_all = to_pcm16(file_windows(audio, card))
    fe = FrontEnd(card)
    x_all = from_pcm16(pcm_all)  # what the device's microphone gives
    pick = np.arange(len(x_all))
    if count is not None and count < len(x_all):
        top = np.argmax(runner.predict(fe.batch_of_stream(x_all)), axis=1)
        pick = pick_windows(top, count, seed)
    pcm, x = pcm_all[pick], x_all[pick]
    feats = fe.batch(x)
    probs = runner.predict(feats)
    out.mkdir(parents=True, exist_ok=True)
    _csv(out / "pcm.csv", pcm, "%d")
    _csv(out / "features.csv", feats, "%.9g")
    _csv(out / "output.csv", probs, "%.9g")
    hop = card.hop_samples / card.sample_rate
    meta = {"card": {k: v for k, v in card.settings_dict().items() if k != "card"},
            "card_file": Path(card.name).name, "model": runner.path.name,
            "model_sha256": runner.sha256, "model_kind": runner.model_kind,
            "runtime": runner.runtime, "windows": int(len(pick)),
            "window_starts_s": [round(float(i) * hop, 6) for i in pick],
            "predicted": [card.classes[int(k)] for k in np.argmax(probs, 1)],
            "window_samples": card.window_samples, "hop_samples": card.hop_samples,
            "layout": card.layout,
            "feature_shape": list(card.feature_shape), "classes": list(card.classes),
            "source": Path(audio).name, "seed": seed,
            "files": {"pcm.csv": "int16 samples, one window per row",
                      "features.csv": "scaled features in the model's input order, one window per row",
                      "output.csv": "probabilities, one window per row"}}
    if getattr(runner, "in_dtype", None) == np.int8:
        raw = [runner.raw(f) for f in feats]
        _csv(out / "input_int8.csv", np.stack([r[0] for r in raw]), "%d")
        _csv(out / "output_int8.csv", np.stack([r[1] for r in raw]), "%d")
        meta["quantization"] = {"input_scale": runner.in_scale, "input_zero_point": runner.in_zero,
                                "output_scale": runner.out_scale,
                                "output_zero_point": runner.out_zero}
        meta["files"]["input_int8.csv"] = "the int8 input tensor, one window per row"
        meta["files"]["output_int8.csv"] = (f"the int8 output tensor, one window per row "
                                            f"({runner.runtime} runtime)")
    if fe.signal is not None:  # the firmware runs the graph: it, and its exact outputs
        meta["signal_graph"] = _write_graph(fe, x, out, meta["files"])
        if runner.path.suffix.lower() == ".tflite":  # the C front end's figures do not apply
            meta["budget"] = {k: v for k, v in _budget(loaded, card, runner).items()
                              if not k.startswith("frontend_")}
        atomic_write(out / "meta.json", dumps(meta, indent=2).encode())
        return meta
    _put(out / "frontend_constants.h", header(card, model_sha256=runner.sha256).encode())
    for src in c_sources(card):
        _put(out / src.name, src.read_bytes())
    if fe.fixed is not None:
        from monitor.features.fixedpoint import to_pcm16 as pcm64

        q16 = fe.fixed.scaled_q(fe.fixed.unscaled_q(pcm64(x)))
        _csv(out / "features_q16.csv", q16, "%d")
        meta["files"]["features_q16.csv"] = ("the model input in q16 integers (value / 65536), "
                                             "one window per row: the q15 front end's exact output")
    _put(out / "check.c", CHECK_SOURCES[0].read_bytes())
    _put(out / "Makefile", CHECK_SOURCES[1].read_bytes())
    _put(out / "check_params.h", check_params(card, runner, len(pick), feats).encode())
    meta["files"].update({"check.c": "the firmware-side check (make check)",
                          "Makefile": "builds and runs check.c with frontend.c"})
    if runner.path.suffix.lower() == ".tflite":
        meta["budget"] = _budget(loaded, card, runner)
    atomic_write(out / "meta.json", dumps(meta, indent=2).encode())
    return meta


def _budget(loaded, card: ModelCard, runner) -> dict:
    try:
        from monitor.device.budget import budget

        b = budget(loaded.plan, card, runner=runner)  # the micro runner is reused
        return {k: v for k, v in b.to_dict().items() if k != "layers"}
    except ScenemonError as exc:
        return {"error": str(exc)}


def _write_graph(fe, x: np.ndarray, out: Path, files: dict) -> dict:
    """The front-end graph of a ``micro-signal`` card and its outputs for each written window.

    Writes ``frontend_signal.tflite`` (the graph the firmware runs, one frame per invoke),
    ``graph_q.csv`` (its int16 log bands, frame after frame, one window per row) and
    ``graph_shift.csv`` (each frame's auto-scale shift); returns meta.json's description.
    """
    from monitor.features import signalgraph as sg

    g = fe.signal
    samples = fe._run(fe._samples, x)  # pcm quantisation and centre padding, as the graph gets
    frames = fe.framing.run(samples)
    pcm = np.clip(np.round(frames.astype(np.float64) * 32768), -32768, 32767).astype(np.int16)
    q, shift = g.run_frames(pcm)
    _put(out / sg.GRAPH_FILE, g.model)
    _csv(out / "graph_q.csv", q.reshape(len(x), -1), "%d")
    _csv(out / "graph_shift.csv", shift.reshape(len(x), -1), "%d")
    files[sg.GRAPH_FILE] = ("the front end as a tflite-micro graph of signal-library operators: "
                         "input one frame of int16 samples, outputs the int16 log bands and "
                         "the two auto scales' shifts")
    files["graph_q.csv"] = "the graph's log bands of every frame, frame after frame, one window per row"
    files["graph_shift.csv"] = ("the graph's shift of every frame (outputs 1 and 2 added), one "
                                "window per row")
    c = sg.correction_bits(frame_length=g.frame_length, fft_length=g.fft_length)
    return {"file": sg.GRAPH_FILE, "graph_bytes": len(g.model),
            "frames_per_window": int(frames.shape[1]),
            "frame_length": g.frame_length, "frame_step": fe.framing.cfg.frame_step,
            "fft_length": g.fft_length, "bands": g.bands, "window_bits": sg.WINDOW_BITS,
            "weight_bits": sg.WEIGHT_BITS, "weight_gain": g.tables.gain,
            "output_scale": sg.OUTPUT_SCALE,
            "correction_bits": c,
            "operators": ["MAXIMUM", "SignalFftAutoScale", "SignalWindow", "SignalFftAutoScale",
                          "SignalRfft", "SignalEnergy", "SignalFilterBank",
                          "SignalFilterBankSquareRoot", "SignalFilterBankLog"],
            "mel_power": "P = exp(2 q / output_scale) * fft_length^2 / (2^(2 correction_bits "
                         "+ 2 shift + 30) * weight_gain), 0 where q = 0; then the card's log, "
                         "layout and scaling"}


def run_vectors(plan: ModelPlan, audio: Path, out: Path, *, count: int | None,
                seed: int = 0) -> int:
    """`scenemon vectors`.

    Parameters
    ----------
    plan : ModelPlan
        The model.
    audio : Path
        The recording.
    out : Path
        The folder.
    count : int or None
        Windows wanted.
    seed : int
        Seed of the window choice.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.assembly.assemble import load_model

    meta = write_vectors(load_model(plan), audio, out, count=count, seed=seed)
    classes = sorted(set(meta["predicted"]))
    sys.stdout.write(terminal_safe(f"wrote {meta['windows']} windows of golden vectors to "
                                   f"{out} ({meta['runtime']} runtime; predicted classes "
                                   f"covered: {', '.join(classes)})", one_line=True) + "\n")
    if (out / "Makefile").is_file():
        sys.stdout.write(f"check them with the shipped C front end: make -C {out} check\n")
    if "signal_graph" in meta:
        sys.stdout.write(terminal_safe(f"the front end is the graph {out / meta['signal_graph']['file']}: "
                                       f"feed it each frame of pcm.csv and compare with "
                                       f"graph_q.csv and graph_shift.csv (exact)", one_line=True)
                         + "\n")
    return ExitCode.OK
