"""A long unattended run, simulated: hours of audio through `scenemon field`'s own code path
(`assembly.field.run_field` -> `run_session` -> a paced source -> the engine's live wait ->
the session writer, status thread and budget) with a file source clocked faster than real
time. Reports the process's resident memory at the start of the steady state and at the
end, and the CPU time per hour of audio.

The source is the demo tour looped to an hour (written once under a temporary folder), given
`--hours` times as the files of one recording, so the run is one session of that many hours,
as a week's session would be (sessions roll every 24 h by default).

Run: .venv/bin/python benchmarks/bench_field.py [--hours 24] [--speed 60] [--model M]
"""

import argparse
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def rss_kb() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return 0


def hour_file(folder: Path) -> Path:
    """The demo tour looped to one hour, PCM_16 at 16 kHz."""
    import soundfile as sf

    from monitor.demo.tour import ensure_tour

    wav, _ = ensure_tour(ROOT / "recordings" / "demo")
    x, sr = sf.read(str(wav), dtype="float32")
    reps = int(np.ceil(3600 * sr / x.shape[0]))
    out = folder / "hour.wav"
    sf.write(str(out), np.tile(x, reps)[:3600 * sr], sr, subtype="PCM_16")
    return out


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--hours", type=float, default=24.0, help="hours of audio (whole hours)")
    ap.add_argument("--speed", type=float, default=60.0,
                    help="times faster than real time the source's clock runs")
    ap.add_argument("--model", default=str(ROOT / "models" / "demo.tflite"))
    ap.add_argument("--keep", default="2GB", help="the run's disk budget")
    ap.add_argument("--every", type=float, default=600.0,
                    help="seconds of audio between memory samples")
    args = ap.parse_args()
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    from monitor.assembly.field import run_field
    from monitor.assembly.plan import FieldPlan, FileInput, ModelPlan, OutputPlan, SessionPlan
    from monitor.base.native import keep_freed_memory
    from monitor.session.runfolder import parse_keep

    keep_freed_memory()  # as `scenemon` itself does at start
    hours = max(1, int(round(args.hours)))
    with tempfile.TemporaryDirectory(dir=ROOT / "recordings") as td:
        # in a child process: its hour of float32 samples must not weigh on this one's memory
        import subprocess

        subprocess.run([sys.executable, "-c", f"import sys; sys.path.insert(0, {str(ROOT)!r}); "
                        f"from benchmarks.bench_field import hour_file; "
                        f"from pathlib import Path; hour_file(Path({td!r}))"], check=True)
        src = Path(td) / "hour.wav"
        run = Path(td) / "run"
        plan = FieldPlan(run, SessionPlan(FileInput([src] * hours, realtime=True,
                                                    speed=args.speed),
                                          (ModelPlan(Path(args.model)),),
                                          output=OutputPlan(None, "field", True, 3600.0)),
                         parse_keep([args.keep]), status_every_s=5.0, reserve_bytes=10**8,
                         sessions=1)
        samples: list[tuple[float, float, int]] = []  # (audio s, cpu s, rss kB)
        done = threading.Event()

        def sample():
            from monitor.session.runfolder import read_status

            while not done.wait(args.every / args.speed):
                try:
                    st = read_status(run)
                except Exception:  # noqa: BLE001 - not written yet
                    continue
                t1 = (st.get("last_window") or {}).get("t1")
                if t1:
                    samples.append((float(t1), time.process_time(), rss_kb()))

        t = threading.Thread(target=sample, daemon=True)
        t.start()
        wall0 = time.monotonic()
        run_field(plan)
        wall = time.monotonic() - wall0
        done.set()
        t.join()
        import json

        from monitor.session.runfolder import run_sessions

        summary = json.loads((run_sessions(run)[0] / "summary.json").read_text())
    if len(samples) < 3:
        print("too few samples: give more --hours or a smaller --every")
        return 1
    # steady state from the first sample after the first hour (start-up and the first
    # arrays are not what grows)
    first = next((s for s in samples if s[0] >= 3600.0), samples[1])
    last = samples[-1]
    audio_h = (last[0] - first[0]) / 3600.0
    cpu_per_h = (last[1] - first[1]) / audio_h
    print(f"audio {last[0] / 3600:.2f} h in {wall / 60:.1f} min ({last[0] / wall:.0f}x real "
          f"time) with {args.model}")
    print(f"resident memory {first[2] / 1024:.1f} MB at {first[0] / 3600:.2f} h, "
          f"{last[2] / 1024:.1f} MB at {last[0] / 3600:.2f} h "
          f"(growth {(last[2] - first[2]) / 1024:+.1f} MB); peak sample "
          f"{max(s[2] for s in samples) / 1024:.1f} MB")
    print(f"windows {summary['windows']}, overruns {summary['overruns']}, samples dropped "
          f"{summary['dropped_samples']}, audio frames written {summary['audio_frames']}")
    print(f"CPU {cpu_per_h:.1f} s per hour of audio ({cpu_per_h / 36:.2f}% of one core at "
          f"real time), all threads of the process")
    for a, c, r in samples[:: max(1, len(samples) // 12)]:
        print(f"  {a / 3600:6.2f} h  cpu {c:8.1f} s  rss {r / 1024:6.1f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
