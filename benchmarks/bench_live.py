"""Cost of live monitoring: CPU share of one core and resident memory over a live session.

Needs an audio server with an input (tests/audio_server.sh start gives a null sink whose
monitor is the default input; the tour is played into it so the model hears something).
Run: .venv/bin/python benchmarks/bench_live.py [--seconds 60] [--model models/demo.tflite]
"""

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def rss_kb(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return 0


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--model", default=str(ROOT / "models" / "demo.tflite"))
    ap.add_argument("--input", default="pulse")
    ap.add_argument("extra", nargs="*", help="more flags for scenemon live")
    args = ap.parse_args()
    from monitor.demo.tour import ensure_tour

    wav, _ = ensure_tour(ROOT / "recordings" / "demo")
    with tempfile.TemporaryDirectory() as td:
        player = subprocess.Popen(["paplay", str(wav)])
        t0 = time.monotonic()
        p = subprocess.Popen([sys.executable, "-m", "monitor", "live", "--model", args.model,
                              "--input", args.input, "--headless", *args.extra, "--seconds",
                              str(args.seconds + 10), "--out", str(Path(td) / "s")],
                             cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        time.sleep(10.0)  # start-up and the first windows are not the steady state
        with open(f"/proc/{p.pid}/stat") as f:
            parts = f.read().split()
        tick = os.sysconf("SC_CLK_TCK")
        cpu_a = (int(parts[13]) + int(parts[14])) / tick
        rss_a, wall_a = rss_kb(p.pid), time.monotonic()
        rss_series = []
        while time.monotonic() - wall_a < args.seconds:
            time.sleep(5.0)
            rss_series.append(rss_kb(p.pid))
        with open(f"/proc/{p.pid}/stat") as f:
            parts = f.read().split()
        cpu_b = (int(parts[13]) + int(parts[14])) / tick
        wall_b = time.monotonic()
        p.wait()
        player.kill()
        share = (cpu_b - cpu_a) / (wall_b - wall_a)
        print(f"live monitoring, {args.model}, {args.seconds:.0f} s steady state after 10 s "
              f"(started {wall_a - t0:.0f} s in):")
        print(f"  CPU: {share * 100:.2f}% of one core")
        print(f"  resident memory: {rss_a / 1024:.1f} MB at 10 s, {rss_series[-1] / 1024:.1f} MB "
              f"at the end (min {min(rss_series) / 1024:.1f}, max {max(rss_series) / 1024:.1f})")
    return 0


if __name__ == "__main__":
    sys.exit(main())
