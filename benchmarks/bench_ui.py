"""Cost of the terminal UI: CPU share of one core while `scenemon demo` runs at real-time
pace in a tmux pane (80x24 unless --size), and the time from the command to the first drawn
screen.

Run: .venv/bin/python benchmarks/bench_ui.py [--seconds 60] [--size 120x40]
"""

import argparse
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def cpu_s(pid: int) -> float:
    parts = Path(f"/proc/{pid}/stat").read_text().split()
    return (int(parts[13]) + int(parts[14])) / os.sysconf("SC_CLK_TCK")


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--model", default="models/demo.tflite")
    ap.add_argument("--size", default="80x24", help="terminal size, e.g. 120x40")
    args = ap.parse_args()
    if not shutil.which("tmux"):
        print("needs tmux")
        return 2
    exe = Path(sys.executable).parent / "scenemon"
    width, height = args.size.split("x")
    with tempfile.TemporaryDirectory() as td:
        sess = f"scenemon-bench-{os.getpid()}"
        t0 = time.monotonic()
        subprocess.run(["tmux", "new-session", "-d", "-s", sess, "-x", width, "-y", height,
                        f"cd {ROOT} && {exe} demo --model {args.model} --out {td}/s"], check=True)
        first = None
        while time.monotonic() - t0 < 30:
            screen = subprocess.run(["tmux", "capture-pane", "-p", "-t", sess],
                                    capture_output=True, text=True).stdout
            if "scenemon" in screen and first is None:
                first = time.monotonic() - t0
            if "held" in screen or "undecided" in screen:
                break
            time.sleep(0.05)
        t_decision = time.monotonic() - t0
        pid = int(subprocess.run(["tmux", "list-panes", "-t", sess, "-F", "#{pane_pid}"],
                                 capture_output=True, text=True).stdout.split()[0])
        kids = subprocess.run(["pgrep", "-P", str(pid)], capture_output=True, text=True).stdout.split()
        target = int(kids[0]) if kids else pid
        time.sleep(5.0)
        c0, w0 = cpu_s(target), time.monotonic()
        time.sleep(args.seconds)
        c1, w1 = cpu_s(target), time.monotonic()
        subprocess.run(["tmux", "send-keys", "-t", sess, "q"])
        time.sleep(3.0)
        subprocess.run(["tmux", "kill-session", "-t", sess], capture_output=True)
    print(f"terminal UI on the demo tour at real-time pace, {args.model}, {args.size} tmux:")
    print(f"  first screen drawn {first:.2f} s after the command; first decision shown "
          f"{t_decision:.2f} s")
    print(f"  CPU over {args.seconds:.0f} s (after 5 s): {100 * (c1 - c0) / (w1 - w0):.1f}% of one core")
    return 0


if __name__ == "__main__":
    sys.exit(main())
