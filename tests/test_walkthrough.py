"""The README's walk-through, end to end: a model trained three ways (librosa log-mel,
StandardScaler and Keras saved as .h5; librosa MFCCs and Keras made int8 .tflite by
`scenemon quantize`; librosa log-mel and PyTorch exported to .onnx), each card written by
`scenemon card write` from the training code's calls and checked at once, a replay, and
scenemon's probabilities against the training code's own prediction on every window.
"""

import json
import subprocess
import sys

import numpy as np
import pytest

from conftest import ROOT, run_cli

pytest.importorskip("librosa")
pytestmark = pytest.mark.slow
CLASSES = "quiet_room,voices,traffic,machinery"


def train(tour, out, way):
    r = subprocess.run([sys.executable, str(ROOT / "docs" / "walkthrough" / "train.py"),
                        str(tour[0]), str(tour[1]), str(out), "--way", way],
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]


def card_write(out, *extra):
    args = ["card", "write", out / "model.toml"]
    for call in (out / "calls.txt").read_text().splitlines():
        args += ["--call", call]
    return run_cli(*args, "--classes", CLASSES, "--window-seconds", "1", "--hop-seconds", "0.5",
                   "--scaler", out / "scaler.npz", *extra)


def replay_probs(tour, model, session):
    r = run_cli("replay", tour[0], "--model", model, "--fast", "--headless", "--out", session)
    assert r.returncode == 0, r.stderr
    return np.array([json.loads(x)["probs"] for x in
                     (session / "windows.jsonl").read_text().splitlines()])


@pytest.mark.parametrize("way, model, output", [("keras-h5", "model.h5", "probabilities"),
                                                ("torch-onnx", "model.onnx", "logits")])
def test_a_float_model_gives_the_training_codes_prediction(tour, tmp_path, way, model, output):
    pytest.importorskip("torch" if way == "torch-onnx" else "tensorflow")
    out = tmp_path / way
    train(tour, out, way)
    r = card_write(out, "--output", output, "--check", tour[0], out / "first_window.npy")
    assert r.returncode == 0 and ": match" in r.stdout, r.stdout + r.stderr
    probs = replay_probs(tour, out / model, tmp_path / "s")
    own = np.load(out / "own_probs.npy")
    assert probs.shape == own.shape
    print(f"{way}: {len(own)} windows, largest difference {np.max(np.abs(probs - own)):.2g}")
    assert np.max(np.abs(probs - own)) <= 1e-4, np.max(np.abs(probs - own))


def test_an_int8_model_picks_the_training_codes_class(tour, tmp_path):
    pytest.importorskip("tensorflow")
    out = tmp_path / "mfcc"
    train(tour, out, "keras-mfcc")
    r = card_write(out, "--check", tour[0], out / "first_window.npy")
    assert r.returncode == 0 and ": match" in r.stdout, r.stdout + r.stderr
    r = run_cli("quantize", "--model", out / "model.keras", "--calibrate", tour[0], "--out",
                out / "model.int8.tflite")
    assert r.returncode == 0, r.stderr
    probs = replay_probs(tour, out / "model.int8.tflite", tmp_path / "s")
    own = np.load(out / "own_probs.npy")
    same = float(np.mean(probs.argmax(1) == own.argmax(1)))
    print(f"keras-mfcc int8: same top class on {same:.1%} of {len(own)} windows")
    assert same >= 0.99, same
