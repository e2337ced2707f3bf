"""The least work any tool must do, against scenemon, on the same audio in one run.

The floor: the demo card's features for every window of four demo tours (about 16 minutes),
each frame computed once and shared by the windows that overlap it (one real FFT per frame),
the mel matrix, the log, the scaling, and one LiteRT invoke per window; no files, no
decisions. Against it, in the same run (three repetitions each, the minimum of each):

- fast replay: ``scenemon replay --fast --headless`` (windows written, decisions made,
  capture on its default policies, the session's audio kept), and with ``--no-audio
  --capture none``; measured beyond its start-up (the time to its first JSON line);
- ``scenemon score`` with one worker and with two, on an archive of 16 tours (about an
  hour: per-file start-up included, and long enough that the command's own start-up does
  not hide how the workers scale), against the floor of that much audio;
- start-up: command to first result of a short file.

Run: .venv/bin/python benchmarks/bench_floor.py   (also `make bench`); figures go in the README.
"""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import soundfile as sf

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from monitor.base.native import keep_freed_memory  # noqa: E402
from monitor.demo.tour import ensure_tour  # noqa: E402
from monitor.features.card import load_card  # noqa: E402
from monitor.features.frontend import mel_filterbank, window_coefficients  # noqa: E402
from monitor.sound.samples import quantise_pcm16  # noqa: E402

MODEL = ROOT / "models" / "demo.tflite"
REPEAT = 3
ARCHIVE_FILES = 16


def floor_seconds(x: np.ndarray, card) -> tuple[float, int]:
    """The floor on signal `x` (see module docstring); seconds and windows."""
    import scipy.fft
    from ai_edge_litert.interpreter import Interpreter

    interp = Interpreter(model_path=str(MODEL), num_threads=1)
    inp, out = interp.get_input_details()[0], interp.get_output_details()[0]
    interp.allocate_tensors()
    fe = card.frontend
    fr, m = fe.framing, fe.mel
    win = window_coefficients(fr.frame_length)
    mel = mel_filterbank(sample_rate=card.sample_rate, fft_length=fr.fft_length,
                         mel_bands=m.mel_bands, fmin=m.fmin, fmax=m.fmax,
                         scale=m.mel_scale, norm=m.mel_norm,
                         triangles=m.mel_triangles).T.copy()
    mean, inv_std = card.mean.astype(np.float32), (1.0 / card.std).astype(np.float32)
    step = card.hop_samples // fr.frame_step
    f = card.frames_per_window
    n = 1 + (len(x) - card.window_samples) // card.hop_samples
    block = 64  # windows per block: frames shared inside it, memory stays small
    shape = tuple(inp["shape"])
    set_tensor, invoke, get = interp.set_tensor, interp.invoke, interp.get_tensor
    t = time.perf_counter()
    for b0 in range(0, n, block):
        nb = min(block, n - b0)
        a = b0 * card.hop_samples
        span = x[a:a + (nb - 1) * card.hop_samples + card.window_samples]
        q = quantise_pcm16(span) if card.pcm_bits == 16 else span
        frames = np.lib.stride_tricks.sliding_window_view(q, fr.frame_length)[::fr.frame_step]
        spec = scipy.fft.rfft(frames * win, n=fr.fft_length, axis=-1)
        logmel = np.log((spec.real ** 2 + spec.imag ** 2) @ mel + np.float32(fe.log.log_offset))
        for i in range(nb):
            feats = (logmel[i * step:i * step + f] - mean) * inv_std
            set_tensor(inp["index"], feats.reshape(shape))
            invoke()
            get(out["index"])
    return time.perf_counter() - t, n


def timed_stream(cmd: list[str]) -> tuple[float, float]:
    """(seconds to the first stdout line, seconds in all) of a command."""
    t = time.perf_counter()
    with subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL,
                          text=True, cwd=ROOT) as p:
        p.stdout.readline()
        first = time.perf_counter() - t
        for _ in p.stdout:
            pass
    return first, time.perf_counter() - t


def main() -> int:
    keep_freed_memory()  # the floor gets the heap setting the command line runs with
    card = load_card(ROOT / "models" / "demo.toml")
    wav, tsv = ensure_tour(ROOT / "recordings" / "demo")
    x, sr = sf.read(str(wav), dtype="float32")
    with tempfile.TemporaryDirectory() as td:
        td = Path(td)
        long = np.concatenate([x] * 4)
        audio_s = long.size / sr
        sf.write(str(td / "long.wav"), long, sr, subtype="PCM_16")
        arch = td / "arch"
        arch.mkdir()
        for k in range(ARCHIVE_FILES):
            sf.write(str(arch / f"walk{k}.wav"), x, sr, subtype="PCM_16")
        sf.write(str(td / "short.wav"), x[: 3 * sr], sr, subtype="PCM_16")
        exe = [sys.executable, "-m", "monitor"]
        floor, replay, lean, score1, score2, start = [], [], [], [], [], []
        work: dict[int, list[float]] = {1: [], 2: []}  # aggregate.json's wall_s
        for rep in range(REPEAT):
            s, n = floor_seconds(long.astype(np.float32), card)
            floor.append(s)
            first, total = timed_stream(exe + ["replay", str(td / "long.wav"), "--model",
                                               str(MODEL), "--fast", "--headless", "--out",
                                               str(td / f"r{rep}")])
            replay.append(total - first)
            first, total = timed_stream(exe + ["replay", str(td / "long.wav"), "--model",
                                               str(MODEL), "--fast", "--headless", "--no-audio",
                                               "--capture", "none", "--out", str(td / f"n{rep}")])
            lean.append(total - first)
            for workers, box in ((1, score1), (2, score2)):
                t = time.perf_counter()
                subprocess.run(exe + ["score", str(arch), "--model", str(MODEL), "--out",
                                      str(td / f"s{rep}-{workers}"), "--workers", str(workers)],
                               cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                               check=True)
                box.append(time.perf_counter() - t)
                agg = json.loads((td / f"s{rep}-{workers}" / "aggregate.json").read_text())
                work[workers].append(agg["wall_s"])
            start.append(timed_stream(exe + ["replay", str(td / "short.wav"), "--model", str(MODEL),
                                             "--fast", "--headless", "--out",
                                             str(td / f"f{rep}")])[0])
    fl = min(floor)
    arch_s = ARCHIVE_FILES * x.size / sr
    fl_arch = fl * arch_s / audio_s  # the floor of the archive's audio
    rows = [
        ("floor (features, shared frames, one invoke per window)", fl, None, audio_s),
        ("fast replay, windows + audio + capture (beyond start-up)", min(replay),
         min(replay) / fl, audio_s),
        ("fast replay, --no-audio --capture none (beyond start-up)", min(lean),
         min(lean) / fl, audio_s),
        (f"score, 1 worker, {ARCHIVE_FILES} files (start-up included)", min(score1),
         min(score1) / fl_arch, arch_s),
        (f"score, 2 workers, {ARCHIVE_FILES} files (start-up included)", min(score2),
         min(score2) / fl_arch, arch_s),
    ]
    print(f"bench_floor: {audio_s:.0f} s of tour audio ({n} windows), {REPEAT} repetitions, "
          f"minimum of each; {time.strftime('%Y-%m-%d')}, {platform.machine()}, "
          f"{os.cpu_count()} cores, Python {platform.python_version()}")
    for name, s, ratio, secs in rows:
        rtf = secs / s
        print(f"  {name:<58} {s:6.3f} s  {rtf:6.0f}x real time"
              + ("" if ratio is None else f"  {ratio:4.2f}x the floor"))
    print(f"  {'score: 2 workers against 1, the whole command':<58} "
          f"{min(score1) / min(score2):6.2f}x")
    print(f"  {'score: 2 workers against 1, the scoring (wall_s)':<58} "
          f"{min(work[1]) / min(work[2]):6.2f}x  ({min(work[1]):.3f} s, {min(work[2]):.3f} s)")
    print(f"  {'command to first result of a .tflite model':<58} {min(start):6.3f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
