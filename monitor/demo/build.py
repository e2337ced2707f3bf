"""Deterministic build of the demo models: `python -m monitor.demo.build [--out models]`.

Two models of the same four places, one per front end: ``demo`` on log-mel features and
``demo-mfcc`` on MFCCs (13 coefficients of the same log-mel, DCT-II "uniform" as
TensorFlow's ``mfccs_from_log_mel_spectrograms``). For each: synthesises seeded clips,
computes features with the very front end its card describes, trains a small
depthwise-separable CNN (Zhang et al. 2017, "Hello Edge") with fixed seeds and
deterministic ops on the CPU, and writes ``NAME.keras``, ``NAME.tflite`` (float),
``NAME.int8.tflite`` (full-integer), ``NAME.toml`` and ``NAME.int8.toml`` (`make models`
then fits the novelty profiles with `monitor.demo.profile`). Also prints the held-out window accuracy (other seeds). Each model is built in a process of its
own (TensorFlow's converter leaks memory on every call), so one model's build never depends
on the other's.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

from monitor.demo import CLASSES
from monitor.demo.synth import clip
from monitor.features.card import card_from_dict
from monitor.features.frontend import FrontEnd
from monitor.sound.windower import windows_of

CARD = {
    "classes": list(CLASSES),
    "audio": {"sample_rate": 16000, "window_s": 1.0, "hop_s": 0.5},
    "frontend": {"kind": "logmel", "frame_length": 400, "frame_step": 160, "fft_length": 512,
                 "window": "hann", "mel_bands": 40, "fmin": 0.0, "fmax": 8000.0,
                 "mel_scale": "htk", "mel_norm": "none", "mel_triangles": "mel",
                 "power": 2.0, "log": "ln", "log_offset": 1e-6, "layout": "time_mel",
                 "pcm_bits": 16},
    "decision": {"smoothing": "mean", "smoothing_windows": 3, "ema_alpha": 0.5,
                 "enter": 0.6, "exit": 0.0, "margin": 0.1, "confirm": 2, "min_hold_s": 0.0},
}
MFCC_CARD = {**CARD, "frontend": {**CARD["frontend"], "kind": "mfcc", "mfcc": 13,
                                   "dct_norm": "uniform"}}
MODELS = {"demo": CARD, "demo-mfcc": MFCC_CARD}
TRAIN_SEEDS = range(1000, 1070)
HELD_OUT_SEEDS = range(9000, 9016)
CLIP_S = 3.0


def dataset(seeds, fe: FrontEnd) -> tuple[np.ndarray, np.ndarray]:
    """Training windows of every place for each seed, through the front end unscaled.

    Parameters
    ----------
    seeds : iterable of int
        One clip of every place per seed.
    fe : FrontEnd
        The demo card's front end.

    Returns
    -------
    x : numpy.ndarray
        ``(n, *feature_shape)`` float32 features before scaling.
    y : numpy.ndarray
        ``(n,)`` class index of each window.
    """
    c = fe.card
    xs, ys = [], []
    for seed in seeds:
        for k, place in enumerate(CLASSES):
            # a contiguous copy, as the committed models were built from
            w = np.ascontiguousarray(windows_of(clip(place, CLIP_S, seed), c.window_samples,
                                                c.hop_samples))
            xs.append(fe.unscaled(w))
            ys.append(np.full(len(w), k))
    return np.concatenate(xs).astype(np.float32), np.concatenate(ys)


def card_toml(card: dict, mean: np.ndarray, std: np.ndarray, note: str,
              per: str = "per mel band") -> str:
    """The text of a demo model's card.

    Parameters
    ----------
    card : dict
        The card's classes and its audio, frontend and decision tables.
    mean, std : numpy.ndarray
        The scaling learned from the training features.
    note : str
        The card's first comment line.
    per : str
        What the scaling holds one value per, for the comment.

    Returns
    -------
    str
        The TOML.
    """

    def v(x):
        if isinstance(x, bool):
            return "true" if x else "false"
        if isinstance(x, str):
            return f'"{x}"'
        if isinstance(x, float):
            return repr(x)
        return str(x)

    lines = [f"# {note}", "classes = [" + ", ".join(f'"{c}"' for c in card["classes"]) + "]", ""]
    for table in ("audio", "frontend"):
        lines.append(f"[{table}]")
        lines += [f"{k} = {v(x)}" for k, x in card[table].items()]
        lines.append("")
    lines.append(f"[scaling]  # {per}, from the training features")
    lines.append("mean = [" + ", ".join(f"{m:.6f}" for m in mean) + "]")
    lines.append("std = [" + ", ".join(f"{s:.6f}" for s in std) + "]")
    lines.append("")
    lines.append("[decision]")
    lines += [f"{k} = {v(x)}" for k, x in card["decision"].items()]
    return "\n".join(lines) + "\n"


def build_model(shape, n_classes, input_name="logmel"):
    """The small demo network: depthwise-separable convolutions on the feature picture.

    Parameters
    ----------
    shape : tuple of int
        One window's features (a channel axis of 1 is added).
    n_classes : int
        Outputs (softmax).
    input_name : str
        The input layer's name.

    Returns
    -------
    keras.Model
        The untrained model.

    References
    ----------
    Y. Zhang, N. Suda, L. Lai and V. Chandra, "Hello Edge: Keyword Spotting on
    Microcontrollers", arXiv:1711.07128, 2017 (the depthwise-separable CNN family).
    """
    import keras
    from keras import layers

    inp = keras.Input(shape=(*shape, 1), name=input_name)
    x = layers.Conv2D(12, 3, strides=2, padding="same", use_bias=False)(inp)
    x = layers.BatchNormalization()(x)
    x = layers.ReLU()(x)
    for filters in (24, 32):
        x = layers.DepthwiseConv2D(3, padding="same", use_bias=False)(x)
        x = layers.BatchNormalization()(x)
        x = layers.ReLU()(x)
        x = layers.Conv2D(filters, 1, use_bias=False)(x)
        x = layers.BatchNormalization()(x)
        x = layers.ReLU()(x)
        x = layers.MaxPooling2D(2)(x)
    x = layers.GlobalAveragePooling2D()(x)
    x = layers.Dropout(0.2)(x)
    out = layers.Dense(n_classes, activation="softmax", name="probs")(x)
    return keras.Model(inp, out, name="demo_scene_cnn")


def main(argv: list[str] | None = None) -> int:
    """`python -m monitor.demo.build`: build every demo model, each in a process of its own.

    Parameters
    ----------
    argv : list of str, optional
        The arguments (``--out``, ``--epochs``, ``--only``).

    Returns
    -------
    int
        0, or the first failing build's exit code.
    """
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="models", help="output folder (default: models)")
    ap.add_argument("--epochs", type=int, default=30)
    ap.add_argument("--only", choices=list(MODELS),
                    help="build this model here (default: each in a process of its own)")
    args = ap.parse_args(argv)
    if args.only:
        return build(args.only, Path(args.out), epochs=args.epochs)
    import subprocess

    for name in MODELS:
        r = subprocess.run([sys.executable, "-m", "monitor.demo.build", "--out", args.out,
                            "--epochs", str(args.epochs), "--only", name])
        if r.returncode:
            return r.returncode
    return 0


def build(name: str, out: Path, *, epochs: int = 30) -> int:
    """Train and write one demo model (module docstring).

    Parameters
    ----------
    name : str
        The demo model to build ("demo" or "demo-mfcc").
    out : Path
        The models folder.
    epochs : int
        Training epochs.

    Returns
    -------
    int
        0.
    """
    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
    os.environ["TF_DETERMINISTIC_OPS"] = "1"
    t_start = time.time()
    out.mkdir(parents=True, exist_ok=True)
    card = MODELS[name]

    base = card_from_dict(card)
    fe = FrontEnd(base)
    x_train, y_train = dataset(TRAIN_SEEDS, fe)
    x_test, y_test = dataset(HELD_OUT_SEEDS, fe)
    mean = x_train.mean(axis=(0, 1)).astype(np.float32)
    std = (x_train.std(axis=(0, 1)) + 1e-3).astype(np.float32)
    print(f"{name} features: train {x_train.shape}, held out {x_test.shape} "
          f"({time.time() - t_start:.1f} s)", flush=True)

    import tensorflow as tf

    tf.config.threading.set_intra_op_parallelism_threads(2)
    tf.config.threading.set_inter_op_parallelism_threads(1)
    import keras

    keras.utils.set_random_seed(7)
    tf.config.experimental.enable_op_determinism()
    xt = ((x_train - mean) / std)[..., None]
    xv = ((x_test - mean) / std)[..., None]
    model = build_model(x_train.shape[1:], len(CLASSES), base.kind)
    model.compile(optimizer=keras.optimizers.Adam(3e-3),
                  loss="sparse_categorical_crossentropy", metrics=["accuracy"])
    model.fit(xt, y_train, epochs=epochs, batch_size=32, shuffle=True, verbose=2,
              validation_data=(xv, y_test))
    acc = float(np.mean(np.argmax(model.predict(xv, verbose=0), axis=1) == y_test))
    print(f"{name} held-out window accuracy (seeds {HELD_OUT_SEEDS.start}-"
          f"{HELD_OUT_SEEDS.stop - 1}): {acc:.4f}", flush=True)
    model.save(out / f"{name}.keras")

    conv = tf.lite.TFLiteConverter.from_keras_model(model)
    (out / f"{name}.tflite").write_bytes(conv.convert())
    rng = np.random.default_rng(11)
    pick = rng.choice(len(xt), size=300, replace=False)

    def representative():
        for i in pick:
            yield [xt[i:i + 1]]

    conv = tf.lite.TFLiteConverter.from_keras_model(model)
    conv.optimizations = [tf.lite.Optimize.DEFAULT]
    conv.representative_dataset = representative
    conv.target_spec.supported_ops = [tf.lite.OpsSet.TFLITE_BUILTINS_INT8]
    conv.inference_input_type = tf.int8
    conv.inference_output_type = tf.int8
    (out / f"{name}.int8.tflite").write_bytes(conv.convert())

    note = "scenemon demo model card (written by python -m monitor.demo.build)"
    per = "per mel band" if base.kind == "logmel" else "per coefficient"
    text = card_toml(card, mean, std, note, per)
    (out / f"{name}.toml").write_text(text)
    (out / f"{name}.int8.toml").write_text(text)
    print(f"wrote {out}/{name}.keras, {name}.tflite, {name}.int8.tflite, {name}.toml, "
          f"{name}.int8.toml in {time.time() - t_start:.1f} s", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
