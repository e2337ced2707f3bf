"""File replay through the whole chain: session files, pacing, resampling, demo accuracy."""

import functools
import json
import signal
import subprocess
import sys
import time
import wave

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, run_cli, sine, write_wav
from monitor.demo import CLASSES
from monitor.session.reader import load_session


def read_windows(d):
    return [json.loads(line) for line in (d / "windows.jsonl").read_text().splitlines()]


@pytest.fixture(scope="module")
def tour_session(tour, tmp_path_factory):
    out = tmp_path_factory.mktemp("s") / "tour"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--truth", tour[1],
                "--fast", "--headless", "--out", out)
    assert r.returncode == 0, r.stderr
    return out, r


def test_session_directory_contract(tour_session, tour):
    out, r = tour_session
    for name in ("session.json", "windows.jsonl", "truth.tsv", "audio.wav", "summary.json"):
        assert (out / name).is_file(), name
    meta = json.loads((out / "session.json").read_text())
    assert meta["classes"] == list(CLASSES)
    assert meta["model"]["kind"] == "tflite-float" and len(meta["model"]["sha256"]) == 64
    assert meta["source"]["origin"] == "file" and meta["source"]["native_rate"] == 16000
    assert {"card", "decision", "started_at", "version"} <= set(meta)
    wins = read_windows(out)
    fields = {"i", "t0", "t1", "probs", "smoothed", "top", "decision", "truth", "level_dbfs",
              "clipped", "gap", "ms"}
    assert all(fields <= set(w) for w in wins)
    # headless stdout carries the same records as windows.jsonl
    printed = [json.loads(line) for line in r.stdout.splitlines()]
    assert [p["probs"] for p in printed] == [w["probs"] for w in wins]
    # sample-clock times: window i starts at i * hop
    assert all(w["t0"] == pytest.approx(0.5 * w["i"]) and w["t1"] - w["t0"] == pytest.approx(1.0)
               for w in wins)
    # audio: the whole session at the model rate, equal to the file it replayed
    a, sr = sf.read(str(out / "audio.wav"), dtype="int16")
    b, _ = sf.read(str(tour[0]), dtype="int16")
    assert sr == 16000 and np.array_equal(a, b)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["windows"] == len(wins) and summary["clean"]
    s = load_session(out)
    assert s.complete and len(s.windows) == len(wins) and s.truth is not None


def test_tour_decisions_match_truth(tour_session):
    # issue 2: smoothed decisions match the tour's truth on >= 85% of its windows
    out, _ = tour_session
    wins = read_windows(out)
    acc = np.mean([w["decision"] == w["truth"] for w in wins if w["truth"] is not None])
    assert acc >= 0.85
    summary = json.loads((out / "summary.json").read_text())
    assert summary["accuracy"] == pytest.approx(acc, abs=1e-6)


HELD_OUT_TARGET = 0.90  # the project's target: held-out window accuracy >= 90% (issue 2)
# every committed artifact of both demo models (the .keras ones load TensorFlow: slow)
ARTIFACTS = [pytest.param(f"{m}{ext}", marks=[pytest.mark.slow] if ext == ".keras" else [])
             for m in ("demo", "demo-mfcc") for ext in (".keras", ".tflite", ".int8.tflite")]


@functools.cache
def held_out_windows(model):
    """The scaled held-out windows of a model's card and their labels."""
    from monitor.demo.build import HELD_OUT_SEEDS, TRAIN_SEEDS, dataset
    from monitor.features.card import load_card
    from monitor.features.frontend import FrontEnd

    seeds = range(20000, 20012)
    assert not set(seeds) & (set(TRAIN_SEEDS) | set(HELD_OUT_SEEDS))
    fe = FrontEnd(load_card(MODELS / f"{model}.toml"))
    x, y = dataset(seeds, fe)
    return fe.scale(x), y


@pytest.mark.parametrize("artifact", ARTIFACTS)
def test_held_out_synthetic_accuracy(artifact):
    # issue 2: held-out clips (seeds never used in training) score >= 90% window accuracy;
    # issue 12: the MFCC model reaches the same target. One target for every committed
    # artifact; the measured figure is printed
    from monitor.features.card import load_card
    from monitor.inference.registry import load_runner

    path = MODELS / artifact
    x, y = held_out_windows(artifact.split(".")[0])
    runner = load_runner(path, load_card(path.with_suffix(".toml")))
    acc = float(np.mean(np.argmax(runner.predict(x), axis=1) == y))
    print(f"{artifact}: held-out window accuracy {acc:.4f} (the project's target "
          f">= {HELD_OUT_TARGET:.2f})")
    assert acc >= HELD_OUT_TARGET, f"{artifact}: held-out window accuracy {acc:.4f}"


def test_mfcc_demo_model_on_the_tour(tmp_path, tour):
    # issue 12: `scenemon demo --model models/demo-mfcc.tflite` shows the tool on an MFCC front
    # end; its decisions match the tour's truth as the log-mel model's do (>= 85%)
    out = tmp_path / "m"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo-mfcc.tflite", "--truth", tour[1],
                "--fast", "--headless", "--out", out)
    assert r.returncode == 0, r.stderr
    wins = read_windows(out)
    acc = np.mean([w["decision"] == w["truth"] for w in wins if w["truth"] is not None])
    assert acc >= 0.85
    meta = json.loads((out / "session.json").read_text())
    assert meta["card"]["frontend"]["kind"] == "mfcc" and meta["card"]["frontend"]["mfcc"] == 13


@pytest.mark.slow
def test_fast_and_realtime_replay_identical(tmp_path, tour):
    x, _ = sf.read(str(tour[0]), dtype="float32")
    clip = write_wav(tmp_path / "clip.wav", x[16000 * 28:16000 * 36])  # across a transition
    outs = []
    for pace in ("--fast", None):
        out = tmp_path / f"s{len(outs)}"
        args = ["replay", clip, "--model", MODELS / "demo.tflite", "--out", out, "--headless"]
        r = run_cli(*args, *([pace] if pace else []))
        assert r.returncode == 0, r.stderr
        outs.append(read_windows(out))
    fast, slow = outs
    assert len(fast) == len(slow) == 15
    assert [w["probs"] for w in fast] == [w["probs"] for w in slow]
    assert [w["decision"] for w in fast] == [w["decision"] for w in slow]
    assert all("latency_ms" in w for w in slow)


def test_thirty_seconds_hop_one_gives_thirty_windows(tmp_path):
    # 30 s at window 1 s / hop 1 s -> 30 windows (common practice)
    card = (MODELS / "demo.toml").read_text().replace("hop_s = 0.5", "hop_s = 1.0")
    (tmp_path / "m.toml").write_text(card)
    wav = write_wav(tmp_path / "n.wav", np.random.default_rng(0).standard_normal(16000 * 30) * 0.05)
    r = run_cli("replay", wav, "--model", MODELS / "demo.tflite", "--card", tmp_path / "m.toml",
                "--fast", "--out", tmp_path / "s")
    assert r.returncode == 0, r.stderr
    assert len(read_windows(tmp_path / "s")) == 30


def test_foreign_rate_and_channels_are_resampled(tmp_path, demo_card):
    # a 44.1 kHz stereo file: down-mixed, resampled (soxr HQ); a 1 kHz tone stays in the band
    # nearest 1 kHz and the features match the same tone made at 16 kHz directly
    from monitor.assembly.engine import Engine, ObserverBase
    from monitor.features.frontend import FrontEnd, mel_band_edges
    from monitor.inference.registry import load_runner
    from monitor.sound.sources import FileSource

    t = np.arange(44100 * 4) / 44100
    tone = 0.3 * np.sin(2 * np.pi * 1000 * t)
    sf.write(str(tmp_path / "st.wav"), np.stack([tone, tone], 1), 44100, subtype="FLOAT")
    feats = []

    class Keep(ObserverBase):
        def on_window(self, r):
            feats.append(r.features)

    src = FileSource(tmp_path / "st.wav", model_rate=16000, window_samples=16000)
    eng = Engine([(demo_card, load_runner(MODELS / "demo.tflite", demo_card))], src,
                 observers=[Keep()], keep_features=True)
    eng.run()
    assert len(feats) == 7
    fe = FrontEnd(demo_card)
    direct = fe.single(sine(1000, 1.0, amp=0.3))
    centres = mel_band_edges(mel_bands=40, fmin=0, fmax=8000)[1:-1]
    logmel = feats[3] * demo_card.std + demo_card.mean
    assert int(np.argmax(logmel.mean(0))) == int(np.argmin(np.abs(centres - 1000)))
    band = int(np.argmax(logmel.mean(0)))
    assert abs(float(feats[3][:, band].mean() - direct[:, band].mean())) < 0.05


@pytest.mark.slow
def test_wav_stays_readable_when_killed(tmp_path, tour):
    # the README's session directory: the header is rewritten about once a second, so a killed process leaves a WAV
    # that Python's own `wave` module (not only libsndfile) opens
    out = tmp_path / "k"
    p = subprocess.Popen([sys.executable, "-m", "monitor", "replay", str(tour[0]), "--model",
                          str(MODELS / "demo.tflite"), "--out", str(out), "--headless"],
                         cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        deadline = time.time() + 60
        while time.time() < deadline and not (out / "windows.jsonl").exists():
            time.sleep(0.2)
        time.sleep(4.0)
    finally:
        p.send_signal(signal.SIGKILL)
        p.wait()
    with wave.open(str(out / "audio.wav")) as w:
        frames = w.getnframes()
        assert w.getframerate() == 16000 and w.getsampwidth() == 2
    n_windows = len((out / "windows.jsonl").read_text().splitlines())
    assert n_windows >= 4
    # audio reaches to within ~1.5 s of the last window logged
    assert frames / 16000 >= (n_windows - 1) * 0.5 + 1.0 - 1.5
    assert not (out / "summary.json").exists()
    s = load_session(out)
    assert not s.complete and s.notes


def test_demo_command_runs_headless(tmp_path):
    r = run_cli("demo", "--fast", "--headless", "--out", tmp_path / "d", timeout=300)
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "d" / "summary.json").is_file()
    assert len(r.stdout.splitlines()) == len(read_windows(tmp_path / "d"))
