"""Every speed and memory figure of scenemon against the least work possible, in one run.

The floor: the demo card's features for every window of four demo tours (about 16 minutes),
each frame computed once and shared by the windows that overlap it (one real FFT per frame,
the mel weights once per frame), the log, the scaling, and one LiteRT invoke per window; no
files, no decisions. The minimal script: a bare interpreter script that imports NumPy,
soundfile and the LiteRT interpreter, reads one second of a WAV and invokes the model once.
Against them, in the same run (`--repeat` repetitions each, the minimum of each):

- start-up: command to the first window line of a short file, against the minimal script
  to its one output line;
- fast replay: ``scenemon replay --fast --headless`` of the four tours (windows written,
  decisions made, capture on its default policies, the session's audio kept), and with
  ``--no-audio --capture none``; measured beyond its start-up (the time to its first line);
- peak resident memory of that replay and of one four times longer, against the minimal
  script's;
- ``scenemon score`` with one worker and with two, on an archive of 8 tours, the whole
  command and the scoring alone (``aggregate.json``'s ``wall_s``);
- peak memory of ``score`` (one worker) over 100 and over 1,000 files of 5 s;
- live monitoring, headless and with the terminal UI in an 80x24 tmux pane, CPU share of
  one core at real-time pace from the audio server's default input while the tour plays
  into it (`--live-seconds`, after 10 s; needs PulseAudio, `tests/audio_server.sh start`,
  and tmux; left out with `--no-live`).

Python files are compiled to bytecode first (as an installed package has them).

Run: .venv/bin/python benchmarks/bench_floor.py   (also `make bench`); figures go in the README.
``--repo PATH`` measures another checkout of scenemon (its own ``-m monitor``) with the
same floor and minimal script, for before-and-after figures.
"""

from __future__ import annotations

import argparse
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
ARCHIVE_FILES = 8
MANY_FILES = 1000


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


MINIMAL = """\
import sys
import numpy as np
import soundfile as sf
from ai_edge_litert.interpreter import Interpreter
x, sr = sf.read(sys.argv[2], dtype="float32", frames=16000)
it = Interpreter(model_path=sys.argv[1], num_threads=1)
it.allocate_tensors()
d = it.get_input_details()[0]
it.set_tensor(d["index"], np.zeros(d["shape"], np.float32))
it.invoke()
print(it.get_tensor(it.get_output_details()[0]["index"]).tolist(), flush=True)
"""


# a child forked from this (large) process counts this process's pages in its peak until it
# runs the command; a small launcher in between measures the command alone
LAUNCHER = ("import os, resource, subprocess, sys; code = subprocess.call(sys.argv[2:]); "
            "open(sys.argv[1], 'w').write(str(resource.getrusage(resource.RUSAGE_CHILDREN)"
            ".ru_maxrss)); sys.exit(code)")


def timed_stream(cmd: list[str], cwd: Path = ROOT, *,
                 peak_memory: bool = False) -> tuple[float, float, int]:
    """(seconds to the first stdout line, seconds in all, peak resident kB or 0) of a command
    (the peak with `peak_memory`, which runs it through the launcher: not for start-up)."""
    with tempfile.NamedTemporaryFile("r") as peak:
        launch = [sys.executable, "-S", "-c", LAUNCHER, peak.name] if peak_memory else []
        t = time.perf_counter()
        p = subprocess.Popen([*launch, *cmd],
                             stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True,
                             cwd=cwd)
        p.stdout.readline()
        first = time.perf_counter() - t
        for _ in p.stdout:
            pass
        code = p.wait()
        total = time.perf_counter() - t
        if code:
            raise SystemExit(f"{' '.join(cmd)} exited with {code}")
        return first, total, int(peak.read() or 0)


def cpu_s(pid: int) -> float:
    """User and system CPU seconds of a process so far."""
    parts = Path(f"/proc/{pid}/stat").read_text().split()
    return (int(parts[13]) + int(parts[14])) / os.sysconf("SC_CLK_TCK")


def live_share(repo: Path, seconds: float, *, screen: bool) -> float | None:
    """CPU share of one core of ``scenemon live`` on the default input while the tour plays
    into the audio server, headless or in an 80x24 tmux pane; None without the server."""
    if subprocess.run(["pactl", "info"], capture_output=True).returncode != 0:
        return None
    wav, _ = ensure_tour(ROOT / "recordings" / "demo")
    with tempfile.TemporaryDirectory() as td:
        player = subprocess.Popen(["paplay", str(wav)])
        cmd = [sys.executable, "-m", "monitor", "live", "--model", str(MODEL), "--input",
               "pulse", "--seconds", str(seconds + 20), "--out", str(Path(td) / "s")]
        try:
            if screen:
                sess = f"scenemon-bench-{os.getpid()}"
                subprocess.run(["tmux", "new-session", "-d", "-s", sess, "-x", "80", "-y", "24",
                                f"cd {repo} && {' '.join(cmd)}"], check=True)
                time.sleep(1.0)
                pane = subprocess.run(["tmux", "list-panes", "-t", sess, "-F", "#{pane_pid}"],
                                      capture_output=True, text=True).stdout.split()[0]
                kids = subprocess.run(["pgrep", "-P", pane], capture_output=True,
                                      text=True).stdout.split()
                pid = int(kids[0]) if kids else int(pane)
            else:
                proc = subprocess.Popen(cmd + ["--headless"], cwd=repo,
                                        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
                pid = proc.pid
            time.sleep(10.0)  # start-up and the first windows are not the steady state
            c0, w0 = cpu_s(pid), time.monotonic()
            time.sleep(seconds)
            c1, w1 = cpu_s(pid), time.monotonic()
        finally:
            if screen:
                subprocess.run(["tmux", "kill-session", "-t", sess], capture_output=True)
            else:
                proc.terminate()
                proc.wait()
            player.kill()
    return (c1 - c0) / (w1 - w0)


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--repo", type=Path, default=ROOT, help="the checkout to measure")
    ap.add_argument("--repeat", type=int, default=REPEAT)
    ap.add_argument("--live-seconds", type=float, default=30.0)
    ap.add_argument("--no-live", action="store_true")
    args = ap.parse_args()
    repo = args.repo.resolve()
    subprocess.run([sys.executable, "-m", "compileall", "-q", str(repo / "monitor")], check=True)
    keep_freed_memory()  # the floor gets the heap setting the command line runs with
    card = load_card(ROOT / "models" / "demo.toml")
    wav, tsv = ensure_tour(ROOT / "recordings" / "demo")
    x, sr = sf.read(str(wav), dtype="float32")
    with tempfile.TemporaryDirectory() as td:
        td = Path(td)
        long = np.concatenate([x] * 4)
        audio_s = long.size / sr
        sf.write(str(td / "long.wav"), long, sr, subtype="PCM_16")
        sf.write(str(td / "longer.wav"), np.concatenate([long] * 4), sr, subtype="PCM_16")
        arch = td / "arch"
        arch.mkdir()
        for k in range(ARCHIVE_FILES):
            sf.write(str(arch / f"walk{k}.wav"), x, sr, subtype="PCM_16")
        sf.write(str(td / "short.wav"), x[: 3 * sr], sr, subtype="PCM_16")
        (td / "minimal.py").write_text(MINIMAL)
        exe = [sys.executable, "-m", "monitor"]
        r: dict[str, list[float]] = {k: [] for k in (
            "floor", "replay", "lean", "score1", "score2", "start", "minimal", "rss_min",
            "rss_replay", "rss_longer")}
        work: dict[int, list[float]] = {1: [], 2: []}  # aggregate.json's wall_s
        for rep in range(args.repeat):
            s, n = floor_seconds(long.astype(np.float32), card)
            r["floor"].append(s)
            first, total, rss = timed_stream(exe + ["replay", str(td / "long.wav"), "--model",
                                                    str(MODEL), "--fast", "--headless", "--out",
                                                    str(td / f"r{rep}")], repo, peak_memory=True)
            r["replay"].append(total - first)
            r["rss_replay"].append(rss)
            first, total, _ = timed_stream(exe + ["replay", str(td / "long.wav"), "--model",
                                                  str(MODEL), "--fast", "--headless",
                                                  "--no-audio", "--capture", "none", "--out",
                                                  str(td / f"n{rep}")], repo)
            r["lean"].append(total - first)
            if rep == 0:
                r["rss_longer"].append(timed_stream(
                    exe + ["replay", str(td / "longer.wav"), "--model", str(MODEL), "--fast",
                           "--headless", "--out", str(td / "longer")], repo,
                    peak_memory=True)[2])
            for workers, box in ((1, r["score1"]), (2, r["score2"])):
                t = time.perf_counter()
                subprocess.run(exe + ["score", str(arch), "--model", str(MODEL), "--out",
                                      str(td / f"s{rep}-{workers}"), "--workers", str(workers)],
                               cwd=repo, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                               check=True)
                box.append(time.perf_counter() - t)
                agg = json.loads((td / f"s{rep}-{workers}" / "aggregate.json").read_text())
                work[workers].append(agg["wall_s"])
            for _ in range(3):
                minimal = [sys.executable, str(td / "minimal.py"), str(MODEL), str(td / "short.wav")]
                r["minimal"].append(timed_stream(minimal)[0])
                r["rss_min"].append(timed_stream(minimal, peak_memory=True)[2])
                r["start"].append(timed_stream(exe + ["replay", str(td / "short.wav"), "--model",
                                                      str(MODEL), "--fast", "--headless",
                                                      "--out", str(td / f"f{rep}-{_}")],
                                               repo)[0])
    many = {}  # peak memory of score over 100 and 1,000 short files (flat: the same)
    with tempfile.TemporaryDirectory() as td:
        td = Path(td)
        sf.write(str(td / "piece.wav"), x[: 5 * sr], sr, subtype="PCM_16")
        for count in (100, MANY_FILES):
            arch = td / f"many{count}"
            arch.mkdir()
            for k in range(count):
                os.link(td / "piece.wav", arch / f"p{k:04d}.wav")
            t = time.perf_counter()
            peak = timed_stream(exe + ["score", str(arch), "--model", str(MODEL), "--out",
                                       str(td / f"out{count}"), "--workers", "1"], repo,
                                peak_memory=True)[2]
            many[count] = (peak, time.perf_counter() - t)
    live = shot = None
    if not args.no_live:
        live = live_share(repo, args.live_seconds, screen=False)
        shot = live_share(repo, args.live_seconds, screen=True)
    m = {k: min(v) for k, v in r.items()}
    fl = m["floor"]
    arch_s = ARCHIVE_FILES * x.size / sr
    fl_arch = fl * arch_s / audio_s  # the floor of the archive's audio
    print(f"bench_floor: {repo.name}, {audio_s:.0f} s of tour audio ({n} windows), "
          f"{args.repeat} repetitions, minimum of each; {time.strftime('%Y-%m-%d')}, "
          f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}")
    rows = [
        ("floor (features, shared frames, one invoke per window)", fl, audio_s, None),
        ("fast replay, windows + audio + capture (beyond start-up)", m["replay"], audio_s,
         m["replay"] / fl),
        ("fast replay, --no-audio --capture none (beyond start-up)", m["lean"], audio_s,
         m["lean"] / fl),
        (f"score, 1 worker, {ARCHIVE_FILES} files (start-up included)", m["score1"], arch_s,
         m["score1"] / fl_arch),
        (f"score, 2 workers, {ARCHIVE_FILES} files (start-up included)", m["score2"], arch_s,
         m["score2"] / fl_arch),
    ]
    for name, s, secs, ratio in rows:
        print(f"  {name:<60} {s:6.3f} s  {secs / s:6.0f}x real time"
              + ("" if ratio is None else f"  {ratio:4.2f}x the floor"))
    print(f"  {'score: 2 workers against 1, the whole command':<60} "
          f"{m['score1'] / m['score2']:6.2f}x")
    print(f"  {'score: 2 workers against 1, the scoring (wall_s)':<60} "
          f"{min(work[1]) / min(work[2]):6.2f}x  ({min(work[1]):.3f} s, {min(work[2]):.3f} s)")
    print(f"  {'start-up: minimal script to its output':<60} {m['minimal']:6.3f} s")
    print(f"  {'start-up: command to the first window line (.tflite)':<60} {m['start']:6.3f} s"
          f"  {m['start'] / m['minimal']:4.2f}x the minimal script")
    mb = 1 / 1024
    print(f"  {'peak memory: minimal script':<60} {m['rss_min'] * mb:6.1f} MB")
    for key, what in (("rss_replay", f"fast replay of {audio_s:.0f} s"),
                      ("rss_longer", f"fast replay of {4 * audio_s:.0f} s")):
        print(f"  {'peak memory: ' + what:<60} {m[key] * mb:6.1f} MB"
              f"  {m[key] / m['rss_min']:4.2f}x the minimal script")
    for count, (peak, secs) in many.items():
        print(f"  {f'peak memory: score of {count} files of 5 s, 1 worker':<60} "
              f"{peak * mb:6.1f} MB  ({secs:.1f} s)")
    for name, share in (("live --headless", live), ("live, terminal UI at 80x24", shot)):
        if share is not None:
            print(f"  {name + ', CPU of one core at real-time pace':<60} {100 * share:6.2f} %")
        elif not args.no_live:
            print(f"  {name:<60} not measured (no audio server)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
