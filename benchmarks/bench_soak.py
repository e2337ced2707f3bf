"""Soak: hours of tour audio at fast pace through the whole chain (file source, engine,
session writer with audio, capture), watching resident memory and checking the counts.

Run: .venv/bin/python benchmarks/bench_soak.py [--hours 2]
"""

import argparse
import json
import resource
import sys
import tempfile
import time
import wave
from pathlib import Path

import soundfile as sf

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def rss_mb() -> float:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--hours", type=float, default=2.0)
    args = ap.parse_args()
    from monitor.assembly.engine import Engine, ObserverBase
    from monitor.demo.tour import ensure_tour
    from monitor.features.card import load_card
    from monitor.inference.registry import load_runner
    from monitor.session.capture import CapturePolicy, CaptureSettings
    from monitor.session.truth import load_truth
    from monitor.session.writer import SessionWriter
    from monitor.sound.sources import FileSource

    wav, tsv = ensure_tour(ROOT / "recordings" / "demo")
    card = load_card(ROOT / "models" / "demo.toml")
    runner = load_runner(ROOT / "models" / "demo.tflite", card)
    x, sr = sf.read(str(wav), dtype="int16")
    total = int(args.hours * 3600 * sr)
    truth = load_truth(tsv)
    tour_s = x.size / sr
    with tempfile.TemporaryDirectory() as td:
        long = Path(td) / "long.wav"
        with sf.SoundFile(str(long), "w", samplerate=sr, channels=1, subtype="PCM_16") as f:
            left = total
            while left > 0:
                f.write(x[:left])
                left -= min(left, x.size)
        writer = SessionWriter(Path(td) / "s", {"classes": list(card.classes)}, sample_rate=sr)
        cap = CapturePolicy(CaptureSettings(), classes=card.classes, sample_rate=sr,
                            sink=writer.on_snippet)
        marks = []

        class Watch(ObserverBase):
            def on_window(self, r):
                if r.i % 1200 == 0:  # every 10 minutes of audio
                    marks.append((r.t1, rss_mb()))

        src = FileSource(long, model_rate=sr, window_samples=card.window_samples)
        eng = Engine([(card, runner)], src, observers=[writer, cap, Watch()],
                     truth=lambda a, b: truth.label_for(a % tour_s, a % tour_s + (b - a)))
        t = time.perf_counter()
        summary = eng.run()
        wall = time.perf_counter() - t
        cap.close()
        writer.close(summary)
        lines = sum(1 for _ in open(Path(td) / "s" / "windows.jsonl"))
        sides = len(list((Path(td) / "s" / "snippets").glob("*/*.json")))
        segs = json.loads((Path(td) / "s" / "summary.json").read_text())["audio_segments"]
        frames = 0
        for name in segs:
            with wave.open(str(Path(td) / "s" / name)) as w:
                frames += w.getnframes()
    first = next(m for t_, m in marks if t_ >= 60.0)
    print(f"soak: {args.hours:g} h of tour audio at fast pace in {wall:.0f} s "
          f"({args.hours * 3600 / wall:.0f}x real time)")
    print(f"  resident memory: {first:.1f} MB after the first minute, {marks[-1][1]:.1f} MB at "
          f"the end (growth {marks[-1][1] - first:+.1f} MB; samples every 10 min: "
          + ", ".join(f"{m:.0f}" for _, m in marks) + ")")
    print(f"  windows {summary['windows']} = lines {lines}; snippets {sum(cap.counts.values())} "
          f"= sidecars {sides}; audio {frames / sr / 3600:.3f} h in {len(segs)} segment(s)")
    ok = summary["windows"] == lines and sides == sum(cap.counts.values()) and frames == total
    print("  counts add up" if ok else "  COUNTS DO NOT ADD UP")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
