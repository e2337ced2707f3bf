"""Train a tiny classifier the way its users train theirs, for the README's walk-through.

Three ways, on a recording of our own invented places and its truth file (the demo tour):

- ``keras-h5``: librosa log-mel features, scikit-learn's StandardScaler, a small Keras
  network saved as ``.h5``;
- ``keras-mfcc``: librosa MFCCs, the same scaler, a small Keras network saved as ``.keras``
  (the walk-through then makes the int8 ``.tflite`` with ``scenemon quantize``);
- ``torch-onnx``: librosa log-mel features, the scaler, a small PyTorch network exported
  with ``torch.onnx.export``.

Each writes into OUT: the model, ``scaler.npz`` (the scaler's ``mean_`` and ``scale_``),
``first_window.npy`` (the unscaled features of the window at 0 s, for ``card check``),
``own_probs.npy`` (the training code's own prediction for every window, one hop apart) and
``calls.txt`` (the feature calls, to paste into ``scenemon card write``).

Run: python docs/walkthrough/train.py RECORDING TRUTH.tsv OUT --way keras-h5
"""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import librosa
import numpy as np
import soundfile as sf
from sklearn.preprocessing import StandardScaler

CLASSES = ["quiet_room", "voices", "traffic", "machinery"]
SR, WIN, HOP = 16000, 16000, 8000

LOGMEL_CALLS = [
    "librosa.feature.melspectrogram(y=y, sr=16000, n_fft=512, hop_length=160, "
    "win_length=400, n_mels=40, fmax=8000)",
    "librosa.power_to_db(S, ref=1.0, top_db=None)",
]
MFCC_CALLS = ["librosa.feature.mfcc(y=y, sr=16000, n_mfcc=13, n_fft=512, hop_length=160, "
              "n_mels=40)"]


def logmel(y: np.ndarray) -> np.ndarray:
    """The log-mel features of one window, (frames, bands): the calls in LOGMEL_CALLS."""
    s = librosa.feature.melspectrogram(y=y, sr=16000, n_fft=512, hop_length=160,
                                       win_length=400, n_mels=40, fmax=8000)
    return librosa.power_to_db(s, ref=1.0, top_db=None).T


def mfcc(y: np.ndarray) -> np.ndarray:
    """The MFCCs of one window, (frames, coefficients): the call in MFCC_CALLS."""
    return librosa.feature.mfcc(y=y, sr=16000, n_mfcc=13, n_fft=512, hop_length=160,
                                n_mels=40).T


def labels_of(truth: Path, n: int) -> np.ndarray:
    """The class of each window: the truth label covering most of it (0 where none)."""
    spans = [line.split("\t") for line in truth.read_text().splitlines()
             if line.strip() and not line.startswith("#")]
    out = np.zeros(n, int)
    for k in range(n):
        a, b = k * HOP / SR, (k * HOP + WIN) / SR
        best = max(spans, key=lambda s: min(b, float(s[1])) - max(a, float(s[0])))
        out[k] = CLASSES.index(best[2].strip()) if best[2].strip() in CLASSES else 0
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("recording")
    ap.add_argument("truth")
    ap.add_argument("out")
    ap.add_argument("--way", choices=["keras-h5", "keras-mfcc", "torch-onnx"], required=True)
    args = ap.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    y, sr = sf.read(args.recording, dtype="float32")
    assert sr == SR, "the walk-through's recording is at 16 kHz"
    n = 1 + (y.size - WIN) // HOP
    feature = mfcc if args.way == "keras-mfcc" else logmel
    feats = np.stack([feature(y[k * HOP:k * HOP + WIN]) for k in range(n)])
    labels = labels_of(Path(args.truth), n)
    bands = feats.shape[-1]
    scaler = StandardScaler().fit(feats.reshape(-1, bands))  # one mean and scale per band
    np.savez(out / "scaler.npz", mean_=scaler.mean_, scale_=scaler.scale_)
    np.save(out / "first_window.npy", feats[0])
    x = ((feats - scaler.mean_) / scaler.scale_).astype(np.float32)
    (out / "calls.txt").write_text("\n".join(MFCC_CALLS if args.way == "keras-mfcc"
                                             else LOGMEL_CALLS) + "\n")
    if args.way == "torch-onnx":
        import torch

        torch.manual_seed(0)
        net = torch.nn.Sequential(torch.nn.Flatten(), torch.nn.Linear(x[0].size, 24),
                                  torch.nn.ReLU(), torch.nn.Linear(24, len(CLASSES)))
        opt = torch.optim.Adam(net.parameters(), lr=1e-3)
        xt, yt = torch.from_numpy(x), torch.from_numpy(labels)
        for _ in range(60):
            opt.zero_grad()
            torch.nn.functional.cross_entropy(net(xt), yt).backward()
            opt.step()
        net.eval()
        with torch.no_grad():
            own = torch.softmax(net(xt), dim=1).numpy()  # ends in logits: softmax here
        torch.onnx.export(net, (xt[:1],), str(out / "model.onnx"), input_names=["features"],
                          output_names=["logits"], dynamo=False,
                          dynamic_axes={"features": {0: "batch"}, "logits": {0: "batch"}})
    else:
        os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")
        import keras

        keras.utils.set_random_seed(0)
        model = keras.Sequential([keras.Input(x.shape[1:]), keras.layers.Flatten(),
                                  keras.layers.Dense(24, activation="relu"),
                                  keras.layers.Dense(len(CLASSES), activation="softmax")])
        model.compile(optimizer=keras.optimizers.Adam(1e-3),
                      loss="sparse_categorical_crossentropy")
        model.fit(x, labels, epochs=15, batch_size=32, verbose=0)
        own = model.predict(x, verbose=0)
        model.save(out / ("model.h5" if args.way == "keras-h5" else "model.keras"))
    np.save(out / "own_probs.npy", own.astype(np.float32))
    print(f"{out}: {args.way}, {n} windows of {feats.shape[1:]} features")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
