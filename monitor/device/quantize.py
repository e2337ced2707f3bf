"""`scenemon quantize`: full-integer int8 post-training quantisation from field audio.

Calibration windows are drawn from real recordings or sessions (seeded, spread evenly over
every file) through the card's own front end; the converter then gets int8 weights,
activations, input and output (TFLite int8 quantization spec: ``q = clip(round(x / scale) +
zero_point, -128, 127)``). TensorFlow's converter leaks memory on every call (tensorflow
issue 122598), so this converts once per process.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from monitor.base.errors import ExitCode, ModelError, ScenemonError
from monitor.features.card import ModelCard

CARD_MARK = "quantised by scenemon quantize"


def calibration_features(card: ModelCard, sources: list[Path], *, count: int = 300,
                         seed: int = 0) -> np.ndarray:
    """About `count` windows spread evenly over all recordings (seeded jitter), as model
    input ``(n, *card.feature_shape)``.

    Parameters
    ----------
    card : ModelCard
        The card.
    sources : list of Path
        Recordings or sessions.
    count : int
        Windows wanted.
    seed : int
        Seed of the jitter.

    Returns
    -------
    numpy.ndarray
        ``(n, *card.feature_shape)`` float32.
    """
    from monitor.assembly.assemble import file_windows
    from monitor.features.frontend import FrontEnd

    fe = FrontEnd(card)
    per = max(1, count // len(sources))
    rng = np.random.default_rng(seed)
    feats = []
    for src in sources:
        w = file_windows(src, card)
        k = min(per, len(w))
        edges = np.linspace(0, len(w), k + 1)
        pick = [int(rng.integers(int(a), max(int(a) + 1, int(b)))) for a, b in zip(edges, edges[1:])]
        feats.append(fe.batch(w[pick]))
    return np.concatenate(feats)


def _check_target(out: Path) -> None:
    """Refuse to write over a file that is not an earlier output of this command."""
    card = out.with_suffix(".toml")
    for p in (out, card):
        if p.is_symlink() or (p.exists() and not p.is_file()):
            raise ScenemonError(f"{p}: exists and is not a regular file; choose another --out")
    if card.exists() and CARD_MARK not in card.read_text(encoding="utf-8", errors="replace")[:400]:
        raise ScenemonError(f"{card}: exists and was not written by scenemon quantize; choose "
                            f"another --out (its card would be written there)")
    if out.exists() and not card.exists():
        raise ScenemonError(f"{out}: exists and was not written by scenemon quantize; choose "
                            f"another --out")


def quantize(model: Path, card: ModelCard, features: np.ndarray, out: Path, *,
             trust_model: bool = False, debug: bool = False) -> dict:
    """Convert the Keras `model` to a full-integer `.tflite` at `out`, its card beside it.

    Parameters
    ----------
    model : Path
        The Keras model (``.keras`` or ``.h5``).
    card : ModelCard
        Its card.
    features : numpy.ndarray
        Calibration windows' model input, ``(n, *card.feature_shape)`` float32
        (`calibration_features`).
    out : Path
        The ``.tflite`` to write.
    trust_model : bool
        Allow Keras Lambda layers.
    debug : bool
        Leave the converter's output on the terminal.

    Returns
    -------
    dict
        The model and card written, the calibration windows and the model's bytes.

    Raises
    ------
    ModelError
        Not a Keras model (``.keras`` or ``.h5``), or one that cannot be loaded or does not
        fit its card.

    References
    ----------
    TensorFlow Lite 8-bit quantization specification (full-integer post-training quantisation).
    """
    from monitor.base.files import atomic_write
    from monitor.base.native import quiet_native_stderr, silence_absl
    from monitor.inference.runners import KerasRunner

    if Path(model).suffix.lower() not in (".keras", ".h5"):
        raise ModelError(f"{model}: quantize needs the Keras model (.keras or .h5)")
    runner = KerasRunner(Path(model), card, trust_model=trust_model)
    import tensorflow as tf

    silence_absl()
    shape = runner._one_shape

    def representative():
        for f in features:
            yield [f.reshape(shape).astype(np.float32)]

    conv = tf.lite.TFLiteConverter.from_keras_model(runner.model)
    conv.optimizations = [tf.lite.Optimize.DEFAULT]
    conv.representative_dataset = representative
    conv.target_spec.supported_ops = [tf.lite.OpsSet.TFLITE_BUILTINS_INT8]
    conv.inference_input_type = tf.int8
    conv.inference_output_type = tf.int8
    if debug:
        data = conv.convert()
    else:  # the converter's passes print dozens of lines on fd 2, and Keras' export on stdout
        import contextlib
        import io

        with quiet_native_stderr(), contextlib.redirect_stdout(io.StringIO()):
            data = conv.convert()
    out.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(out, data)
    card_out = out.with_suffix(".toml")
    src_text = card.path.read_text(encoding="utf-8-sig") if card.path else ""
    note = (f"# int8 model {out.name}: {CARD_MARK} from {Path(model).name} with "
            f"{len(features)} calibration windows; same front end as {Path(card.name).name}\n")
    atomic_write(card_out, (note + src_text).encode("utf-8"))
    return {"model": str(out), "card": str(card_out), "windows": int(len(features)),
            "bytes": len(data)}


def run_quantize(model: Path, *, card: Path | None, calibrate: list[Path], out: Path,
                 windows: int, seed: int, trust_model: bool) -> int:
    """`scenemon quantize`.

    Parameters
    ----------
    model : Path
        The Keras model.
    card : Path or None
        Its card (None: beside it).
    calibrate : list of Path
        Recordings or sessions.
    out : Path
        The ``.tflite`` to write.
    windows : int
        Calibration windows.
    seed : int
        Seed of the window choice.
    trust_model : bool
        Allow Keras Lambda layers.

    Returns
    -------
    int
        The exit code.
    """
    from monitor.features.card import card_for_model

    c = card_for_model(model, card)
    _check_target(out)
    feats = calibration_features(c, calibrate, count=windows, seed=seed)
    from monitor.base import native

    res = quantize(model, c, feats, out, trust_model=trust_model, debug=native.DEBUG)
    sys.stdout.write(f"wrote {res['model']} ({res['bytes']} bytes) and {res['card']} from "
                     f"{res['windows']} calibration windows\n")
    return ExitCode.OK
