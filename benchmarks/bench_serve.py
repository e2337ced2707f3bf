"""What browsers cost a session: CPU share of one core of a real-time ``replay --headless
--serve`` with 0, 1 and 20 viewers (event-stream clients on 127.0.0.1), and of the same
session without ``--serve`` for reference.

Each run replays the demo tour at real-time pace with the stage server on, connects the
viewers (raw sockets that ask for the event stream and read everything it sends, in this
process, so their own cost is not the session's), waits 8 s for the steady state, then
measures the session process's CPU time (utime + stime from /proc) over SECONDS of wall
time. Rounds go (none), 0, 1, 20, (none), 0, 1, 20, ... so a drift of the shared machine touches every
count alike; each count's figure is its median over the rounds. Traffic stays on the
loopback address and ends with each run.
Run: .venv/bin/python benchmarks/bench_serve.py [--seconds 30] [--rounds 2]
"""

from __future__ import annotations

import argparse
import os
import re
import selectors
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def cpu_s(pid: int) -> float:
    parts = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(parts[11]) + int(parts[12])) / os.sysconf("SC_CLK_TCK")


class Viewers:
    """`n` event-stream clients, read by one thread; counts the window events each got."""

    def __init__(self, port: int, token: str, n: int):
        self.sel = selectors.DefaultSelector()
        self.windows = [0] * n
        self.socks = []
        for k in range(n):
            s = socket.create_connection(("127.0.0.1", port), timeout=10)
            s.sendall(f"GET /events?k={token} HTTP/1.1\r\nHost: bench\r\n\r\n".encode())
            s.setblocking(False)
            self.sel.register(s, selectors.EVENT_READ, k)
            self.socks.append(s)
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._read, daemon=True)
        self.thread.start()

    def _read(self):
        while not self.stop.is_set() and self.socks:
            for key, _ in self.sel.select(0.2):
                try:
                    data = key.fileobj.recv(65536)
                except BlockingIOError:
                    continue
                except OSError:
                    data = b""
                if not data:
                    self.sel.unregister(key.fileobj)
                    continue
                self.windows[key.data] += data.count(b"event: window")

    def close(self):
        self.stop.set()
        self.thread.join(5)
        for s in self.socks:
            s.close()


def one_run(wav: Path, model: str, n: int | None, seconds: float, folder: Path) -> dict:
    """One session; `n` viewers (None: no --serve at all)."""
    serve = ["--serve", "127.0.0.1:0"] if n is not None else []
    p = subprocess.Popen([sys.executable, "-m", "monitor", "replay", str(wav), "--model", model,
                          "--headless", *serve, "--out",
                          str(folder / f"s{n}-{time.monotonic_ns()}")],
                         cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    link = None
    while link is None and n is not None:
        line = p.stderr.readline()
        if not line:
            raise SystemExit("the session ended before printing its link")
        m = re.search(r"http://127\.0\.0\.1:(\d+)/\?k=(\S+)", line)
        if m:
            link = (int(m.group(1)), m.group(2))
    threading.Thread(target=p.stderr.read, daemon=True).start()  # keep the pipe drained
    viewers = Viewers(*link, n) if n is not None else Viewers(0, "", 0)
    try:
        time.sleep(8.0)  # start-up and the first windows are not the steady state
        got0 = list(viewers.windows)
        a, t_a = cpu_s(p.pid), time.monotonic()
        time.sleep(seconds)
        b, t_b = cpu_s(p.pid), time.monotonic()
        got = [x - y for x, y in zip(viewers.windows, got0)]
    finally:
        viewers.close()
        p.send_signal(signal.SIGINT)  # a clean close of the session
        try:
            p.wait(30)
        except subprocess.TimeoutExpired:
            p.kill()
            p.wait()
    return {"viewers": n, "share": (b - a) / (t_b - t_a),
            "windows_each": (min(got), max(got)) if got else None}


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=30.0)
    ap.add_argument("--rounds", type=int, default=1)
    ap.add_argument("--model", default=str(ROOT / "models" / "demo.tflite"))
    args = ap.parse_args()
    from monitor.demo.tour import ensure_tour

    wav, _ = ensure_tour(ROOT / "recordings" / "demo")
    counts = (None, 0, 1, 20)
    results: dict[int, list[dict]] = {n: [] for n in counts}
    with tempfile.TemporaryDirectory() as td:
        for r in range(args.rounds):
            for n in counts:
                res = one_run(wav, args.model, n, args.seconds, Path(td))
                results[n].append(res)
                each = res["windows_each"]
                got = f", {each[0]}-{each[1]} windows per viewer" if each else ""
                what = "no --serve" if n is None else f"{n:2d} viewers"
                print(f"round {r + 1}: {what}: {100 * res['share']:.2f}% of one core{got}",
                      flush=True)
    base = statistics.median(x["share"] for x in results[0])
    print(f"\n{args.seconds:g} s at real-time pace, median of {args.rounds} round(s):")
    print("| viewers | CPU, % of one core | added by the viewers |")
    print("|---|---|---|")
    for n in counts:
        share = statistics.median(x["share"] for x in results[n])
        added = "" if n is None else f"{100 * (share - base):+.2f} points"
        print(f"| {'no --serve' if n is None else n} | {100 * share:.2f} | {added} |")
    return 0


if __name__ == "__main__":
    sys.exit(main())
