"""The chain against the way this is often written by hand, in one process on the same
windows: librosa features and `model.predict` per window, against scenemon's front end and
runners. Prints per-window medians and the ratio.

Run: .venv/bin/python benchmarks/bench_handwritten.py [--windows 60]
"""

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")


def median_ms(fn, items):
    ts = []
    for x in items:
        t = time.perf_counter()
        fn(x)
        ts.append(time.perf_counter() - t)
    return 1000 * float(np.median(ts)), 1000 * float(np.percentile(ts, 99))


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--windows", type=int, default=60)
    args = ap.parse_args()
    import librosa
    import soundfile as sf

    from monitor.demo.tour import ensure_tour
    from monitor.features.card import load_card
    from monitor.features.frontend import FrontEnd
    from monitor.inference.registry import load_runner

    wav, _ = ensure_tour(ROOT / "recordings" / "demo")
    x, sr = sf.read(str(wav), dtype="float32")
    card = load_card(ROOT / "models" / "demo.toml")
    wins = [x[i * 8000:i * 8000 + 16000] for i in range(args.windows)]
    fe = FrontEnd(card)
    lite = load_runner(ROOT / "models" / "demo.tflite", card)
    keras_runner = load_runner(ROOT / "models" / "demo.keras", card)
    model = keras_runner.model

    def by_hand(w):
        m = librosa.feature.melspectrogram(y=np.pad(w, (56, 56)), sr=sr, n_fft=512, hop_length=160,
                                           win_length=400, n_mels=40, center=False, htk=True,
                                           norm=None, power=2.0)
        f = (np.log(m + 1e-6).T - card.mean) / card.std
        return model.predict(f[None, :, :, None], verbose=0)

    def ours_lite(w):
        return lite.predict(fe.single(w)[None])

    def ours_keras(w):
        return keras_runner.predict(fe.single(w)[None])

    for fn in (by_hand, ours_lite, ours_keras):  # warm up
        fn(wins[0])
    hand = median_ms(by_hand, wins)
    lt = median_ms(ours_lite, wins)
    ks = median_ms(ours_keras, wins)
    print(f"per window, {args.windows} tour windows, one process ({os.cpu_count()} cores):")
    print(f"  by hand: librosa + model.predict     median {hand[0]:8.3f} ms, p99 {hand[1]:8.3f} ms")
    print(f"  scenemon, .keras (tf.function)       median {ks[0]:8.3f} ms, p99 {ks[1]:8.3f} ms "
          f"({hand[0] / ks[0]:.0f}x faster)")
    print(f"  scenemon, .tflite (LiteRT)           median {lt[0]:8.3f} ms, p99 {lt[1]:8.3f} ms "
          f"({hand[0] / lt[0]:.0f}x faster)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
