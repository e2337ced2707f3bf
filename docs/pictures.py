"""Make the README's pictures from a real run of the demo.

The demo model on the demo tour with its truth file, through the very chain `scenemon demo`
runs (`assemble.run_session` under the terminal UI), replayed as fast as the machine allows
and held at one moment of the tour for the live and stage views; then, at the end of the
tour, the relabel view of the session's snippets and its HTML report, photographed by
headless Chromium. A second run puts the int8 model beside the float one (A/B).

Run: .venv/bin/python docs/pictures.py   (writes docs/*.svg and docs/report.png; about a minute)
"""

from __future__ import annotations

import asyncio
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from monitor.assembly.plan import ModelPlan, OutputPlan, SessionPlan  # noqa: E402
from monitor.demo.tour import ensure_tour  # noqa: E402
from monitor.sound.sources import FileSource, read_resampled  # noqa: E402
from monitor.ui.app import MonitorApp, RelabelApp, session_starter  # noqa: E402

DOCS = ROOT / "docs"
HOLD_S = 176.0  # just after the tour walks from voices into traffic (at 173 s)
PACED_S = 12.0  # the last seconds before the hold at real-time pace: the health panel's
                # compute, latency and CPU figures are those of live monitoring


class HeldSource(FileSource):
    """The file source: fast up to `hold_s` - `paced_s`, then at real-time pace, holding
    still once `hold_s` of audio has gone in until `go` is set, then fast again (only its
    pacing differs from a replay; the engine treats it as a real-time source)."""

    def __init__(self, *a, hold_s: float, paced_s: float = PACED_S, **kw):
        super().__init__(*a, realtime=True, block_s=0.5, **kw)
        self.hold_samples = int(hold_s * 16000)
        self.pace_from = int((hold_s - paced_s) * 16000)
        self.fed = 0
        self.go = threading.Event()

    def _run(self):
        try:
            t_paced = None
            for _, y in read_resampled(
                    self.paths, self.model_rate, block=self.block, native_rate=self.native_rate):
                if self._stop.is_set():
                    return
                paced = self.pace_from <= self.fed < self.hold_samples
                if paced:  # due when its first sample would have arrived live
                    if t_paced is None:
                        t_paced = time.monotonic() - (self.fed - self.pace_from) / 16000
                    delay = t_paced + (self.fed - self.pace_from) / 16000 - time.monotonic()
                    if delay > 0:
                        time.sleep(delay)
                elif self.fed >= self.hold_samples:
                    while not self.go.wait(0.05):
                        if self._stop.is_set():
                            return
                if not paced:  # fast: wait for room, nothing is dropped
                    while self.ring.free() < y.shape[0] and not self._stop.is_set():
                        time.sleep(0.002)
                self.fed += len(y)
                self.ring.write(y)
        except BaseException as exc:
            self.error = exc
        finally:
            self.finished.set()


async def wait_until(pilot, cond, timeout=60.0):
    t = time.monotonic()
    while not cond():
        if time.monotonic() - t > timeout:
            raise RuntimeError("the demo did not get there in time")
        await pilot.pause(0.05)


def run(models, out: Path, shots: dict, size=(100, 30), stage=True) -> None:
    # paths relative to the checkout, as a user types them: no machine's folders in a picture
    wav, tsv = ensure_tour(Path("recordings") / "demo")
    src = HeldSource(wav, model_rate=16000, window_samples=16000, hold_s=HOLD_S)
    plan = SessionPlan(source=src, models=tuple(ModelPlan(Path(m)) for m in models),
                       output=OutputPlan(out, "demo"), truth=tsv)
    names = " vs ".join(Path(m).name for m in models)
    app = MonitorApp(session_starter(plan), heading=f"demo tour, {names}")

    async def main():
        async with app.run_test(size=size) as pilot:
            windows = int((HOLD_S - 1.0) / 0.5) + 1
            await wait_until(pilot, lambda: app.state.tally is not None
                             and app.state.tally.windows >= windows)
            await pilot.pause(1.2)  # a health refresh with real figures
            app.redraw(force=True)
            await pilot.pause(0.2)
            app.save_screenshot(str(shots["live"]))
            if stage:
                await pilot.press("s")
                await pilot.pause(0.3)
                app.save_screenshot(str(shots["stage"]))
                await pilot.press("s")
            src.go.set()
            await wait_until(pilot, lambda: app.finished)
            await pilot.press("q")

    asyncio.run(main())


def relabel(session: Path, path: Path) -> None:
    import json

    classes = json.loads((session / "session.json").read_text())["classes"]
    app = RelabelApp(session, classes)

    async def main():
        async with app.run_test(size=(80, 24)) as pilot:
            await pilot.pause(0.4)
            await pilot.press("k")  # keep the first snippet, drop the second: states show
            await pilot.press("down", "d", "down")
            await pilot.pause(0.3)
            app.save_screenshot(str(path))

    asyncio.run(main())


def report_png(session: Path, png: Path, work: Path) -> None:
    html = work / "report.html"
    subprocess.run([sys.executable, "-m", "monitor", "report", str(session), "--html", str(html)],
                   check=True, capture_output=True, cwd=ROOT)
    exe = next((shutil.which(n) for n in ("chromium", "chromium-browser", "google-chrome")
                if shutil.which(n)), None)
    if exe is None:
        print("no chromium: docs/report.png left as it was")
        return
    subprocess.run([exe, "--headless", "--no-sandbox", "--disable-gpu",
                    "--disable-background-networking", "--disable-component-update",
                    "--disable-sync", "--no-first-run", f"--user-data-dir={work / 'profile'}",
                    "--hide-scrollbars", "--window-size=1200,1500", f"--screenshot={png}",
                    html.as_uri()], check=True, capture_output=True, timeout=120)


def main() -> int:
    import os

    os.chdir(ROOT)
    with tempfile.TemporaryDirectory() as td:
        work = Path(td)
        one = work / "demo-tour"
        run(["models/demo.tflite"], one, {"live": DOCS / "live-view.svg",
                                          "stage": DOCS / "stage-view.svg"})
        run(["models/demo.tflite", "models/demo.int8.tflite"], work / "demo-tour-ab",
            {"live": DOCS / "live-view-ab.svg"}, size=(80, 24), stage=False)
        relabel(one, DOCS / "relabel-view.svg")
        report_png(one, DOCS / "report.png", work)
    print("wrote", *sorted(p.name for p in DOCS.glob("*.svg")), "report.png")
    return 0


if __name__ == "__main__":
    sys.exit(main())
