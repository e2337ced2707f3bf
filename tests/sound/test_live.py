"""Live capture against a real PulseAudio server (null sink monitor, PortAudio's ALSA
`pulse` device): tones, overruns, Ctrl-C and the server dying mid-session.

Skipped with a reason where no audio server runs; failing instead when
SCENEMON_REQUIRE_AUDIO=1 (set by .ci/run)."""

import json
import os
import shutil
import signal
import subprocess
import sys
import threading
import time
import wave
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from conftest import AUDIO_SERVER, MODELS, ROOT, need_audio_server, run_cli
from monitor.assembly.engine import Engine, ObserverBase
from monitor.features.frontend import mel_band_edges
from monitor.inference.registry import load_runner
from monitor.sound.sources import FileSource

pytestmark = [pytest.mark.system, pytest.mark.slow]
SERVER = AUDIO_SERVER


@pytest.fixture(scope="module")
def pulse():
    need_audio_server()
    yield
    subprocess.run(["bash", str(SERVER), "start"], capture_output=True)


def tones(path, rate=48000, seq=((300, 5), (1000, 5), (3000, 5)), lead=1.0, amp=0.3):
    parts = [np.zeros(int(lead * rate))]
    for f, secs in seq:
        t = np.arange(int(secs * rate)) / rate
        parts.append(amp * np.sin(2 * np.pi * f * t))
    parts.append(np.zeros(int(lead * rate)))
    sf.write(str(path), np.concatenate(parts).astype(np.float32), rate, subtype="PCM_16")
    return path


class Keep(ObserverBase):
    def __init__(self):
        self.results = []

    def on_window(self, r):
        self.results.append(r)


def band_of(freq, card):
    mel = card.frontend.mel
    centres = mel_band_edges(mel_bands=mel.mel_bands, fmin=mel.fmin, fmax=mel.fmax,
                             scale=mel.mel_scale)[1:-1]
    return int(np.argmin(np.abs(centres - freq)))


def dominant_bands(results, card):
    return [int(np.argmax((r.features * card.std + card.mean).mean(0))) for r in results]


def first_index(bands, band):
    return next(i for i, b in enumerate(bands) if b == band)


def test_devices_lists_the_server(pulse):
    r = run_cli("devices")
    assert r.returncode == 0 and "pulse" in r.stdout and "44100" in r.stdout


def test_unknown_and_ambiguous_devices(pulse):
    r = run_cli("live", "--model", MODELS / "demo.tflite", "--input", "nosuchcard")
    assert r.returncode == 2 and "no input device matches 'nosuchcard'" in r.stderr
    assert "] pulse" in r.stderr and "Traceback" not in r.stderr
    r = run_cli("live", "--model", MODELS / "demo.tflite", "--input", "u")  # pUlse, defaUlt
    assert r.returncode == 2 and "ambiguous" in r.stderr and "] default" in r.stderr


def test_tone_sequence_reaches_the_right_bands_in_order(pulse, tmp_path, demo_card):
    # a played 300 Hz / 1 kHz / 3 kHz sequence (5 s each) shows in the captured windows'
    # features in the band nearest each frequency, in that order, 5 s apart within one hop
    from monitor.sound.sources import MicSource

    wav = tones(tmp_path / "tones.wav")
    src = MicSource("pulse", model_rate=16000, window_samples=16000, max_seconds=20)
    keep = Keep()
    eng = Engine([(demo_card, load_runner(MODELS / "demo.tflite", demo_card))], src,
                 observers=[keep], keep_features=True)
    player = threading.Timer(1.0, lambda: subprocess.run(["paplay", str(wav)]))
    player.start()
    summary = eng.run()
    player.join()
    assert src.native_rate == 44100 and summary["windows"] >= 35
    bands = dominant_bands(keep.results, demo_card)
    b300, b1k, b3k = (band_of(f, demo_card) for f in (300, 1000, 3000))
    i300, i1k, i3k = first_index(bands, b300), first_index(bands, b1k), first_index(bands, b3k)
    assert i300 < i1k < i3k
    t = [keep.results[i].t0 for i in (i300, i1k, i3k)]
    assert abs((t[1] - t[0]) - 5.0) <= demo_card.hop_s
    assert abs((t[2] - t[1]) - 5.0) <= demo_card.hop_s

    # and it matches a replay of the same file through the file source (same resampler)
    replay = Keep()
    Engine([(demo_card, load_runner(MODELS / "demo.tflite", demo_card))],
           FileSource(wav, model_rate=16000, window_samples=16000), observers=[replay],
           keep_features=True).run()
    rb = dominant_bands(replay.results, demo_card)
    j300 = first_index(rb, b300)
    fe_scale = demo_card.std
    for band, i_live, i_rep in ((b300, i300, j300), (b1k, i1k, first_index(rb, b1k)),
                                (b3k, i3k, first_index(rb, b3k))):
        live = np.mean([keep.results[i_live + k].features[:, band].mean() for k in range(2, 7)])
        rep = np.mean([replay.results[i_rep + k].features[:, band].mean() for k in range(2, 7)])
        # within 0.25 dB-equivalent of log power (ln units / std): a real server in between
        assert abs(live - rep) * fe_scale[band] <= 0.06, (band, live, rep)


class SlowRunner:
    """Fault injection: a runner that sleeps longer than a hop (a slow model on demand)."""

    def __init__(self, inner, sleep_s):
        self.inner, self.sleep_s = inner, sleep_s
        self.path, self.sha256 = inner.path, inner.sha256
        self.model_kind, self.runtime = inner.model_kind, inner.runtime

    def predict(self, feats):
        time.sleep(self.sleep_s * len(feats))
        return self.inner.predict(feats)


def _check_overrun_run(results, summary, card, ring_capacity, duration_s):
    assert summary["overruns"] > 0 and summary["dropped_samples"] > 0
    assert any(r.gap > 0 for r in results)
    starts = [r.start for r in results]
    assert all(s % card.hop_samples == 0 for s in starts)  # on the sample-clock hop grid
    assert all(b > a for a, b in zip(starts, starts[1:]))
    # a gap moves later windows forward by the lost time: the clock never lags the audio
    assert sum(r.gap for r in results) == summary["dropped_samples"] or summary["gap_samples"] > 0
    # it catches up: the last window is near the end of the audio, not far behind
    assert duration_s - results[-1].t1 <= ring_capacity / 16000 + 2 * card.window_s


def test_slow_model_file_source_counts_overruns(tmp_path, demo_card):
    x = (np.random.default_rng(0).standard_normal(16000 * 16) * 0.05).astype(np.float32)
    sf.write(str(tmp_path / "n.wav"), x, 16000)
    src = FileSource(tmp_path / "n.wav", model_rate=16000, window_samples=16000,
                     realtime=True, ring_seconds=2.0)
    keep = Keep()
    runner = SlowRunner(load_runner(MODELS / "demo.tflite", demo_card), 1.2)
    summary = Engine([(demo_card, runner)], src, observers=[keep], max_batch=1).run()
    _check_overrun_run(keep.results, summary, demo_card, src.ring.capacity, 16.0)


def test_slow_model_live_counts_overruns(pulse, demo_card):
    from monitor.sound.sources import MicSource

    src = MicSource("pulse", model_rate=16000, window_samples=16000, ring_seconds=2.0,
                    max_seconds=12)
    keep = Keep()
    runner = SlowRunner(load_runner(MODELS / "demo.tflite", demo_card), 1.2)
    summary = Engine([(demo_card, runner)], src, observers=[keep], max_batch=1).run()
    _check_overrun_run(keep.results, summary, demo_card, src.ring.capacity, 12.0)
    assert summary["clean"]


def _start_live(out, *extra):
    return subprocess.Popen(
        [sys.executable, "-m", "monitor", "live", "--model", str(MODELS / "demo.tflite"),
         "--input", "pulse", "--headless", "--out", str(out), *extra],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _wait_lines(p, n, timeout=30):
    lines, deadline = [], time.time() + timeout
    while len(lines) < n and time.time() < deadline:
        line = p.stdout.readline()
        if not line:
            break
        lines.append(json.loads(line))
    return lines


def test_ctrl_c_closes_the_session(pulse, tmp_path):
    p = _start_live(tmp_path / "s")
    lines = _wait_lines(p, 4)
    assert len(lines) == 4
    p.send_signal(signal.SIGINT)
    out, err = p.communicate(timeout=30)
    assert p.returncode == 0, err
    summary = json.loads((tmp_path / "s" / "summary.json").read_text())
    assert summary["stopped_by_user"] and summary["clean"] and summary["windows"] >= 4
    assert summary["latency_ms_median"] is not None and summary["latency_ms_p99"] is not None
    assert "windows" in err  # the summary is printed


def test_server_killed_mid_session(pulse, tmp_path):
    out = tmp_path / "s"
    p = _start_live(out)
    try:
        assert len(_wait_lines(p, 4)) == 4
        subprocess.run(["bash", str(SERVER), "stop"], capture_output=True)
        _, err = p.communicate(timeout=60)
    finally:
        if p.poll() is None:
            p.kill()
        subprocess.run(["bash", str(SERVER), "start"], capture_output=True)
    assert p.returncode == 1, err
    assert "was lost" in err and "Traceback" not in err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["clean"] is False and "lost" in summary["source_failure"]
    lines = (out / "windows.jsonl").read_text().splitlines()
    assert len(lines) >= 4 and all(json.loads(x) for x in lines)
    with wave.open(str(out / "audio.wav")) as w:
        assert w.getnframes() >= 16000 * 2


def test_portaudio_missing_is_one_sentence_and_replay_still_works(tmp_path):
    # Fault injection (the real library cannot be made to vanish on demand): a stand-in
    # `sounddevice` that fails to import the way the real one does without libportaudio2.
    fake = tmp_path / "fake"
    fake.mkdir()
    (fake / "sounddevice.py").write_text("raise OSError('PortAudio library not found')\n")
    env = {"PYTHONPATH": f"{fake}{os.pathsep}{ROOT}"}
    r = run_cli("live", "--model", MODELS / "demo.tflite", env=env)
    assert r.returncode == 2 and "libportaudio2" in r.stderr and "Traceback" not in r.stderr
    r = run_cli("devices", env=env)
    assert r.returncode == 2 and "libportaudio2" in r.stderr
    x = (np.random.default_rng(0).standard_normal(32000) * 0.05).astype(np.float32)
    sf.write(str(tmp_path / "n.wav"), x, 16000)
    r = run_cli("replay", tmp_path / "n.wav", "--model", MODELS / "demo.tflite", "--fast",
                "--out", tmp_path / "s", env=env)
    assert r.returncode == 0, r.stderr


def test_live_seconds_with_the_ui_ends_by_itself_with_that_much_audio(pulse, tmp_path):
    # `live --seconds S` in the terminal UI: the session ends after S seconds of audio on its
    # own (no key), and holds S seconds: windows ending at 1.0, 1.5, ..., S
    if not shutil.which("tmux"):
        pytest.skip("tmux not installed")
    out, code = tmp_path / "s", tmp_path / "code"
    exe = Path(sys.executable).parent / "scenemon"
    name = f"scenemon-live-{time.monotonic_ns()}"
    subprocess.run(["tmux", "new-session", "-d", "-s", name, "-x", "100", "-y", "30",
                    f"cd {ROOT} && {exe} live --model {MODELS / 'demo.tflite'} --input pulse "
                    f"--seconds 3 --out {out}; echo EXIT=$? > {code}; sleep 20"], check=True)
    try:
        t = time.monotonic()
        while time.monotonic() - t < 30 and not code.exists():
            time.sleep(0.2)
    finally:
        subprocess.run(["tmux", "kill-session", "-t", name], capture_output=True)
    assert code.read_text().strip() == "EXIT=0"
    summary = json.loads((out / "summary.json").read_text())
    assert summary["duration_s"] == pytest.approx(3.0) and summary["windows"] == 5
    assert not summary["stopped_by_user"]
