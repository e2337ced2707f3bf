"""Nothing lost: kill -9 at random moments, a full disk, a slow disk, a long run, no network."""

import json
import os
import random
import resource
import shutil
import signal
import subprocess
import sys
import time
import wave
from pathlib import Path

import numpy as np
import pytest
import soundfile as sf

from conftest import MODELS, ROOT, run_cli
from monitor.session.reader import load_session
from monitor.session.repair import check_whole, repair


@pytest.fixture(scope="module")
def wrong_truth_clip(tour, tmp_path_factory):
    """20 s of the tour with a truth that is wrong on purpose: snippets from the start."""
    d = tmp_path_factory.mktemp("k")
    x, sr = sf.read(str(tour[0]), dtype="float32")
    sf.write(str(d / "clip.wav"), x[:20 * sr], sr, subtype="PCM_16")
    (d / "clip.tsv").write_text("0\t20\tmachinery\n")
    return d / "clip.wav", d / "clip.tsv"


def _start_and_kill(wav, tsv, out, delay):
    p = subprocess.Popen([sys.executable, "-m", "monitor", "replay", str(wav), "--model",
                          str(MODELS / "demo.tflite"), "--truth", str(tsv), "--out", str(out),
                          "--headless", "--capture-every", "1"],
                         cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    t = time.time()
    while not (out / "windows.jsonl").exists() and time.time() - t < 60:
        time.sleep(0.02)
    time.sleep(delay)
    p.send_signal(signal.SIGKILL)
    p.wait()
    return out


@pytest.mark.slow
def test_kill_9_at_random_moments_loses_nothing_written(wrong_truth_clip, tmp_path):
    # 20 seeded kills of a real-time replay with capture, five processes at a time, the kill
    # moments stratified over 0.2-4 s (one in each of 20 equal strata, seeded jitter); after
    # each, every file is readable, every sidecar matches its audio, the audio reaches to
    # within 1.5 s of the last window, and repair makes the session whole
    from concurrent.futures import ThreadPoolExecutor

    rng = random.Random(20261201)
    wav, tsv = wrong_truth_clip
    edges = np.linspace(0.2, 4.0, 21)
    delays = [rng.uniform(a, b) for a, b in zip(edges, edges[1:])]
    with ThreadPoolExecutor(5) as pool:
        outs = list(pool.map(lambda kd: _start_and_kill(wav, tsv, tmp_path / f"k{kd[0]}", kd[1]),
                             enumerate(delays)))
    for k, out in enumerate(outs):
        assert check_whole(out) == [], (k, check_whole(out))
        lines = (out / "windows.jsonl").read_bytes().split(b"\n")
        wins = [json.loads(x) for x in lines[:-1]]
        if wins:
            with wave.open(str(out / "audio.wav")) as w:
                frames = w.getnframes()
            assert frames / 16000 >= wins[-1]["t1"] - 1.5, (k, frames, wins[-1]["t1"])
        res = repair(out)
        assert res["repaired"]
        s = load_session(out)
        assert s.complete and s.summary["recovered"] and s.skipped_lines == 0
        assert check_whole(out) == []
        assert repair(out)["repaired"] is False  # idempotent


def test_torn_last_line_is_dropped_by_repair(tmp_path, wrong_truth_clip):
    out = tmp_path / "s"
    assert run_cli("replay", wrong_truth_clip[0], "--model", MODELS / "demo.tflite",
                   "--fast", "--out", out).returncode == 0
    (out / "summary.json").unlink()
    good = (out / "windows.jsonl").read_text()
    with open(out / "windows.jsonl", "a") as f:
        f.write('{"i": 99, "t0": 4')
    r = run_cli("repair", out)
    assert r.returncode == 0 and "torn last line" in r.stdout
    assert (out / "windows.jsonl").read_text() == good
    assert json.loads((out / "summary.json").read_text())["recovered"] is True


def _tmpfs(path: Path, size: str) -> bool:
    if os.geteuid() != 0 or not shutil.which("mount"):
        return False
    path.mkdir()
    return subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(path)],
                          capture_output=True).returncode == 0


@pytest.mark.system
def test_disk_full_monitoring_goes_on(tmp_path, tour, tour_windows):
    disk = tmp_path / "small"
    if not _tmpfs(disk, "1m"):
        if os.environ.get("SCENEMON_REQUIRE_TMPFS") == "1":
            pytest.fail("SCENEMON_REQUIRE_TMPFS=1 but a tmpfs cannot be mounted here")
        pytest.skip("needs root to mount a small tmpfs")
    try:
        out = disk / "s"
        r = run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--truth", tour[1],
                    "--fast", "--headless", "--out", out)
        assert r.returncode == 1
        # monitoring went on: every window was still decided and printed
        assert len(r.stdout.splitlines()) == tour_windows
        errors = [x for x in r.stderr.splitlines() if "writing stopped" in x]
        assert len(errors) >= 1 and "No space left" in errors[0]
        # what was written is intact
        lines = (out / "windows.jsonl").read_bytes().split(b"\n")
        assert all(json.loads(x) for x in lines[:-1] if x)
        with wave.open(str(out / "audio.wav")) as w:
            assert w.getnframes() > 0
        for side in (out / "snippets").glob("*/*.json"):
            json.loads(side.read_text())
    finally:
        subprocess.run(["umount", str(disk)], capture_output=True)


@pytest.mark.slow
def test_slow_disk_never_slows_decisions(tour, demo_card, tmp_path, monkeypatch, tour_windows):
    # Fault injection (a fake, because a real disk cannot be made slow on demand): the session
    # writer's window lines take 10 ms each, on the writer's own thread
    import monitor.session.writer as sw
    from monitor.assembly.engine import Engine
    from monitor.inference.registry import load_runner
    from monitor.sound.sources import FileSource

    real_line = sw.line_of

    def slow_line(result):
        time.sleep(0.01)
        return real_line(result)

    monkeypatch.setattr(sw, "line_of", slow_line)
    writer = sw.SessionWriter(tmp_path / "s", {"classes": list(demo_card.classes)},
                              sample_rate=16000)
    src = FileSource(tour[0], model_rate=16000, window_samples=16000)
    eng = Engine([(demo_card, load_runner(MODELS / "demo.tflite", demo_card))], src,
                 observers=[writer])
    t = time.perf_counter()
    summary = eng.run()
    t_engine = time.perf_counter() - t
    writer.close(summary)
    assert t_engine < tour_windows * 0.01  # the engine finished before the slow disk could have
    assert len((tmp_path / "s" / "windows.jsonl").read_text().splitlines()) == tour_windows


def test_writer_backlog_is_bounded_and_nothing_is_lost(tmp_path, monkeypatch):
    # Fault injection (a fake, because a real disk cannot be made slow on demand): each audio
    # write takes 5 ms on the writer's thread while the compute side queues 2 MB of audio
    import monitor.session.writer as sw

    real = sw.SessionWriter._write_audio

    def slow_audio(self, wav, chunk, gap):
        time.sleep(0.005)
        return real(self, wav, chunk, gap)

    monkeypatch.setattr(sw.SessionWriter, "_write_audio", slow_audio)
    chunk_bytes = 8000 * 4
    writer = sw.SessionWriter(tmp_path / "s", {"classes": ["a"]}, sample_rate=16000,
                              max_backlog_bytes=4 * chunk_bytes)
    rng = np.random.default_rng(0)
    chunks = [rng.uniform(-0.5, 0.5, 8000).astype(np.float32) for _ in range(64)]
    for c in chunks:
        writer.on_audio(c, 0)
        assert writer.backlog_bytes <= 4 * chunk_bytes
    writer.close({"windows": 0})
    assert writer.peak_backlog_bytes == 4 * chunk_bytes
    written, sr = sf.read(str(tmp_path / "s" / "audio.wav"), dtype="int16")
    # PCM_16 conversion as the writer does it (to_pcm16), every sample kept in order
    from monitor.sound.samples import to_pcm16
    assert np.array_equal(written, np.concatenate([to_pcm16(c) for c in chunks]))


@pytest.mark.slow
def test_soak_memory_stays_flat_and_counts_add_up(tour, demo_card, tmp_path):
    # 10 minutes of tour audio at fast pace through the whole chain with capture
    from monitor.assembly.engine import Engine, ObserverBase
    from monitor.inference.registry import load_runner
    from monitor.session.capture import CapturePolicy, CaptureSettings
    from monitor.session.truth import load_truth
    from monitor.session.writer import SessionWriter
    from monitor.sound.sources import FileSource

    x, sr = sf.read(str(tour[0]), dtype="int16")
    long = np.concatenate([x, x, x])[: 600 * sr]
    sf.write(str(tmp_path / "long.wav"), long, sr, subtype="PCM_16")
    truth = load_truth(tour[1])
    tour_s = x.size / sr
    # the audio waiting for the disk is bounded on purpose (test_writer_backlog_is_bounded);
    # a small bound here keeps that backlog out of the growth measured below
    writer = SessionWriter(tmp_path / "s", {"classes": list(demo_card.classes)}, sample_rate=sr,
                           max_backlog_bytes=1 << 20)
    cap = CapturePolicy(CaptureSettings(every_s=1.0), classes=demo_card.classes, sample_rate=sr,
                        sink=writer.on_snippet)
    rss = []

    class Watch(ObserverBase):
        def on_window(self, r):
            if r.i % 120 == 0:
                rss.append((r.t1, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss))

    src = FileSource(tmp_path / "long.wav", model_rate=sr, window_samples=16000)
    eng = Engine([(demo_card, load_runner(MODELS / "demo.tflite", demo_card))], src,
                 truth=lambda a, b: truth.label_for(a % tour_s, a % tour_s + (b - a)),
                 observers=[writer, cap, Watch()])
    summary = eng.run()
    cap.close()
    writer.close(summary)
    after_first_minute = [m for t, m in rss if t >= 60.0]
    growth_kb = after_first_minute[-1] - after_first_minute[0]
    assert growth_kb < 5 * 1024, rss
    wins = (tmp_path / "s" / "windows.jsonl").read_text().splitlines()
    assert summary["windows"] == len(wins) == 1 + (600 * sr - 16000) // 8000
    sides = list((tmp_path / "s" / "snippets").glob("*/*.json"))
    assert len(sides) == sum(cap.counts.values()) > 0
    with wave.open(str(tmp_path / "s" / "audio.wav")) as w:
        assert w.getnframes() == 600 * sr


@pytest.mark.system
def test_no_network_needed(tmp_path):
    # the tool opens no network connection: the demo runs in a namespace without a network
    if not shutil.which("unshare"):
        pytest.skip("unshare not installed")
    probe = subprocess.run(["unshare", "-n", "true"], capture_output=True)
    if probe.returncode != 0:
        pytest.skip("cannot make a network namespace here (needs root)")
    r = subprocess.run(["unshare", "-n", sys.executable, "-m", "monitor", "demo", "--fast",
                        "--headless", "--out", str(tmp_path / "d")], cwd=ROOT,
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "d" / "summary.json").is_file()


def test_long_sessions_are_cut_into_segments(tmp_path, tour):
    # a new audio file past a chosen length, each a valid WAV, listed in session.json;
    # together they are the whole session
    out = tmp_path / "s"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.tflite", "--fast", "--out", out,
                "--segment-min", "1.0", "--capture", "none")
    assert r.returncode == 0, r.stderr
    meta = json.loads((out / "session.json").read_text())
    segs = meta["audio_segments"]
    x, _ = sf.read(str(tour[0]), dtype="int16")
    assert segs[:2] == ["audio.wav", "audio-0001.wav"] and len(segs) == -(-x.size // (60 * 16000))
    total = []
    for name in segs:
        with wave.open(str(out / name)) as w:
            assert w.getnframes() <= 60 * 16000
        total.append(sf.read(str(out / name), dtype="int16")[0])
    assert np.array_equal(np.concatenate(total), x)
    assert json.loads((out / "summary.json").read_text())["audio_segments"] == segs
    assert check_whole(out) == []


def test_an_unclosed_session_is_reported_at_the_next_start(tmp_path):
    # sessions under recordings/ that lack summary.json are named on the next start
    root = tmp_path / "proj"
    (root / "models").mkdir(parents=True)
    for f in MODELS.glob("demo.*"):
        shutil.copy(f, root / "models" / f.name)
    crashed = root / "recordings" / "20261201-090000-walk"
    crashed.mkdir(parents=True)
    (crashed / "session.json").write_text("{}")
    wav = tmp_path / "n.wav"
    sf.write(str(wav), np.zeros(32000, np.float32), 16000)
    r = run_cli("replay", wav, "--model", root / "models" / "demo.tflite", "--fast", cwd=root)
    assert r.returncode == 0, r.stderr
    assert f"{crashed} did not close cleanly" in r.stderr and f"repair {crashed}" in r.stderr


def test_an_object_without_the_observer_hooks_is_refused(demo_card, tmp_path):
    # the engine calls on_audio, on_window and on_status (engine.Observer); an object with
    # only some of them would be silently half-called: it is refused when the engine is built
    from monitor.assembly.engine import Engine, ObserverBase
    from monitor.inference.registry import load_runner
    from monitor.sound.sources import FileSource

    class OnlyWindows:
        def on_window(self, r):
            pass

    wav = tmp_path / "s.wav"
    sf.write(str(wav), np.zeros(32000, np.float32), 16000)
    lane = (demo_card, load_runner(MODELS / "demo.tflite", demo_card))
    src = FileSource(wav, model_rate=16000, window_samples=16000)
    with pytest.raises(TypeError, match="OnlyWindows .*lacks on_audio, on_status"):
        Engine([lane], src, observers=[OnlyWindows()]).run()
    src = FileSource(wav, model_rate=16000, window_samples=16000)
    assert Engine([lane], src, observers=[ObserverBase()]).run()["windows"] == 3


def test_under_the_ui_native_chatter_misses_the_screen_and_the_screen_misses_nothing():
    # real file descriptors in a child process: inside screen_owns_the_terminal, what a native
    # library writes on fd 2 goes nowhere, and what the UI draws on sys.__stderr__ arrives,
    # also while another thread has fd 2 pointed at /dev/null (quiet_native_stderr, as
    # around a model load); after it, fd 2 is the terminal again
    code = ("import os, sys, threading\n"
            "from monitor.base.native import quiet_native_stderr, screen_owns_the_terminal\n"
            "with screen_owns_the_terminal():\n"
            "    os.write(2, b'native chatter\\n')\n"
            "    with quiet_native_stderr():\n"
            "        sys.__stderr__.write('drawn\\n'); sys.__stderr__.flush()\n"
            "os.write(2, b'after\\n')\n")
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert r.returncode == 0 and r.stderr == "drawn\nafter\n", r.stderr
    # Python's own error output (a UI crash's traceback, printed once the screen is
    # restored) still reaches the terminal
    code = ("import sys\n"
            "from monitor.base.native import screen_owns_the_terminal\n"
            "with screen_owns_the_terminal():\n"
            "    print('traceback here', file=sys.stderr, flush=True)\n")
    r = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True)
    assert r.stderr == "traceback here\n", r.stderr
