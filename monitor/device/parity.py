"""Quantise, compare and write golden vectors, on the windows of real recordings.

Audio for all three comes through the same path as file replay (down-mix, soxr HQ
resampling to the card's rate), then is cut into windows of the card's window and hop.
A session directory stands for its ``audio.wav``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import soundfile as sf

from monitor.decide import decide_sequence
from monitor.errors import AudioError, ModelError, ScenemonError
from monitor.frontend import FrontEnd, mel_filterbank, window_coefficients
from monitor.session import atomic_write, audio_segments, dumps, to_pcm16
from monitor.sources import StreamResampler, check_audio_file, downmix
from monitor.spec import ModelCard


def audio_of(path: Path) -> list[Path]:
    path = Path(path)
    if path.is_dir():
        segs = audio_segments(path)
        if not segs:
            raise AudioError(f"{path}: a session directory without audio.wav (recorded with "
                             f"--no-audio?)")
        return segs
    return [path]


def load_audio(path: Path, card: ModelCard) -> np.ndarray:
    """Mono float32 at the card's rate, exactly as file replay feeds the ring (a session's
    audio segments joined)."""
    return np.concatenate([_load_one(w, card) for w in audio_of(path)])


def _load_one(wav: Path, card: ModelCard) -> np.ndarray:
    check_audio_file(wav, model_rate=card.sample_rate, window_samples=card.window_samples)
    info = sf.info(str(wav))
    rs = StreamResampler(info.samplerate, card.sample_rate)
    parts = []
    with sf.SoundFile(str(wav)) as f:
        for block in f.blocks(blocksize=1 << 16, dtype="float32", always_2d=True):
            parts.append(rs(downmix(block)))
    parts.append(rs(np.zeros(0, np.float32), last=True))
    return np.concatenate(parts)


def windows_of(x: np.ndarray, card: ModelCard) -> np.ndarray:
    n = 1 + (x.size - card.window_samples) // card.hop_samples
    idx = np.arange(card.window_samples)[None, :] + card.hop_samples * np.arange(n)[:, None]
    return x[idx]


# --- quantize --------------------------------------------------------------------------------
def calibration_features(card: ModelCard, sources: list[Path], *, count: int = 300,
                         seed: int = 0) -> np.ndarray:
    """About `count` windows spread evenly over all files (seeded jitter), as model input."""
    fe = FrontEnd(card)
    per = max(1, count // len(sources))
    rng = np.random.default_rng(seed)
    feats = []
    for src in sources:
        w = windows_of(load_audio(src, card), card)
        k = min(per, len(w))
        edges = np.linspace(0, len(w), k + 1)
        pick = [int(rng.integers(int(a), max(int(a) + 1, int(b)))) for a, b in zip(edges, edges[1:])]
        feats.append(fe.batch(w[pick]))
    return np.concatenate(feats)


def quantize(model: Path, card: ModelCard, features: np.ndarray, out: Path, *,
             trust_model: bool = False) -> dict:
    """Full-integer post-training quantisation (int8 weights, activations, input, output).

    TensorFlow's converter leaks memory on every call (tensorflow issue 122598), so this
    converts once per process.
    """
    import os

    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
    from monitor.runners import KerasRunner

    if Path(model).suffix.lower() not in (".keras", ".h5"):
        raise ModelError(f"{model}: quantize needs the Keras model (.keras or .h5)")
    runner = KerasRunner(Path(model), card, trust_model=trust_model)
    import tensorflow as tf

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
    data = conv.convert()
    out.parent.mkdir(parents=True, exist_ok=True)
    atomic_write(out, data)
    card_out = out.with_suffix(".toml")
    src_text = card.path.read_text(encoding="utf-8") if card.path else ""
    note = (f"# int8 model {out.name}: quantised by scenemon quantize from {Path(model).name} "
            f"with {len(features)} calibration windows; same front end as {card.name}\n")
    atomic_write(card_out, (note + src_text).encode("utf-8"))
    return {"model": str(out), "card": str(card_out), "windows": int(len(features)),
            "bytes": len(data)}


# --- compare ---------------------------------------------------------------------------------
def logmel64(card: ModelCard, windows: np.ndarray) -> np.ndarray:
    """The same card computed in float64 throughout (the reference for the float32 path)."""
    x = np.asarray(windows, np.float64)
    if card.pcm_bits == 16:
        x = np.clip(np.round(x * 32768.0), -32768, 32767) / 32768.0
    win = window_coefficients(card.frame_length, kind=card.window,
                              symmetric=card.window_symmetric).astype(np.float64)
    n = card.frames_per_window
    idx = np.arange(card.frame_length)[None, :] + card.frame_step * np.arange(n)[:, None]
    frames = x[:, idx] * win
    spec = np.abs(np.fft.rfft(frames, n=card.fft_length, axis=-1))
    if card.power == 2.0:
        spec = spec ** 2
    w = mel_filterbank(sample_rate=card.sample_rate, fft_length=card.fft_length,
                       mel_bands=card.mel_bands, fmin=card.fmin, fmax=card.fmax,
                       scale=card.mel_scale, norm=card.mel_norm, triangles=card.mel_triangles,
                       dtype=np.float64)
    mel = spec @ w.T + card.log_offset
    if card.log == "ln":
        return np.log(mel)
    if card.log == "log10":
        return np.log10(mel)
    return (20.0 / card.power) * np.log10(mel)


def compare(runner_a, card_a: ModelCard, runner_b, card_b: ModelCard,
            sources: list[Path]) -> dict:
    for key in ("sample_rate", "window_samples", "hop_samples"):
        if getattr(card_a, key) != getattr(card_b, key):
            raise ScenemonError(f"{card_b.name}: {key} {getattr(card_b, key)} differs from "
                                f"{card_a.name}'s {getattr(card_a, key)}; the two models cannot "
                                f"see the same windows")
    fa, fb = FrontEnd(card_a), FrontEnd(card_b)
    pa, pb, fe_err, fe_err_scaled = [], [], 0.0, 0.0
    t1 = []
    for src in sources:
        w = windows_of(load_audio(src, card_a), card_a)
        xa, xb = fa.batch(w), fb.batch(w)
        pa.append(runner_a.predict(xa))
        pb.append(runner_b.predict(xb))
        t1.append((np.arange(len(w)) * card_a.hop_samples + card_a.window_samples)
                  / card_a.sample_rate)
        if card_a.kind == "logmel":
            ref = logmel64(card_a, w)
            ours = fa.logmel(w)
            fe_err = max(fe_err, float(np.max(np.abs(ours - ref))))
            ref_scaled = (ref - card_a.mean.astype(np.float64)) / card_a.std.astype(np.float64)
            if card_a.layout == "mel_time":
                ref_scaled = np.swapaxes((ref - card_a.mean.T) / card_a.std.T, 1, 2)
            fe_err_scaled = max(fe_err_scaled, float(np.max(np.abs(xa - ref_scaled))))
    classes = list(card_a.classes)
    top_a = np.concatenate([np.argmax(p, 1) for p in pa])
    top_b = np.concatenate([np.argmax(p, 1) for p in pb])
    diff = np.abs(np.concatenate(pa) - np.concatenate(pb))
    per_class = {}
    for i, c in enumerate(classes):
        m = top_a == i
        per_class[c] = {"windows": int(m.sum()),
                        "agreement": float(np.mean(top_b[m] == i)) if m.any() else None}
    cm = np.zeros((len(classes), len(classes)), int)
    for a, b in zip(top_a, top_b):
        cm[a, b] += 1
    dec_same = dec_n = 0
    for p_a, p_b, t in zip(pa, pb, t1):
        _, da = decide_sequence(p_a, t, card_a.decision)
        _, db = decide_sequence(p_b, t, card_a.decision)
        dec_same += sum(int(x == y) for x, y in zip(da, db))
        dec_n += len(da)
    return {
        "windows": int(top_a.size), "classes": classes,
        "top1_agreement": float(np.mean(top_a == top_b)),
        "per_class": per_class,
        "prob_diff_mean": float(diff.mean()), "prob_diff_max": float(diff.max()),
        "confusion_a_vs_b": cm.tolist(),
        "decision_agreement": dec_same / dec_n if dec_n else None,
        "frontend_float32_vs_float64_max_abs": fe_err,
        "frontend_scaled_max_abs": fe_err_scaled,
    }


def compare_text(res: dict, name_a: str, name_b: str) -> str:
    lines = [f"A = {name_a}", f"B = {name_b}", f"windows            {res['windows']}",
             f"top-1 agreement    {res['top1_agreement']:.2%}",
             f"decision agreement {res['decision_agreement']:.2%} (after smoothing and hysteresis, "
             f"A's card settings)",
             f"probability diff   mean {res['prob_diff_mean']:.5f}, max {res['prob_diff_max']:.5f}",
             f"front end          float32 vs float64 log-mel max abs error "
             f"{res['frontend_float32_vs_float64_max_abs']:.2e} (scaled "
             f"{res['frontend_scaled_max_abs']:.2e})", "", "  per class (by A's top class)"]
    for c, m in res["per_class"].items():
        ag = "-" if m["agreement"] is None else f"{m['agreement']:.2%}"
        lines.append(f"    {c:<16} {m['windows']:>6} windows  agreement {ag}")
    lines += ["", "  A (rows) vs B (columns)"]
    cls = res["classes"]
    w = max(8, *(len(c) for c in cls)) + 1
    lines.append("    " + " " * w + "".join(f"{c[:w - 1]:>{w}}" for c in cls))
    for c, row in zip(cls, res["confusion_a_vs_b"]):
        lines.append(f"    {c:<{w}}" + "".join(f"{v:>{w}}" for v in row))
    return "\n".join(lines) + "\n"


# --- vectors ---------------------------------------------------------------------------------
def _csv(path: Path, rows: np.ndarray, fmt: str) -> None:
    np.savetxt(path, rows.reshape(len(rows), -1), fmt=fmt, delimiter=",")


def write_vectors(runner, card: ModelCard, audio: Path, out: Path, *,
                  count: int | None = None) -> dict:
    """Golden vectors for target validation (see the README's format description)."""
    from monitor.device import C_SOURCES
    from monitor.device.constants import header

    out.mkdir(parents=True, exist_ok=True)
    w = windows_of(load_audio(audio, card), card)
    if count is not None:
        w = w[:count]
    pcm = to_pcm16(w)
    x = pcm.astype(np.float32) / np.float32(32768.0)  # what the device's microphone gives
    feats = FrontEnd(card).batch(x)
    probs = runner.predict(feats)
    _csv(out / "pcm.csv", pcm, "%d")
    _csv(out / "features.csv", feats, "%.9g")
    _csv(out / "output.csv", probs, "%.9g")
    meta = {"card": card.settings_dict(), "card_file": card.name, "model": str(runner.path),
            "model_sha256": runner.sha256, "model_kind": runner.kind, "windows": int(len(w)),
            "window_samples": card.window_samples, "hop_samples": card.hop_samples,
            "layout": card.layout if card.kind == "logmel" else "samples",
            "feature_shape": list(card.feature_shape), "classes": list(card.classes),
            "source": str(audio),
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
        meta["files"]["output_int8.csv"] = "the int8 output tensor, one window per row"
    if card.kind == "logmel":
        (out / "frontend_constants.h").write_text(header(card, model_sha256=runner.sha256))
        for src in C_SOURCES:
            (out / src.name).write_text(src.read_text())
    atomic_write(out / "meta.json", dumps(meta, indent=2).encode())
    return meta


def read_csv(path: Path, dtype=np.float64) -> np.ndarray:
    return np.loadtxt(path, delimiter=",", dtype=dtype, ndmin=2)


__all__ = ["quantize", "calibration_features", "compare", "compare_text", "write_vectors",
           "read_csv", "logmel64"]
