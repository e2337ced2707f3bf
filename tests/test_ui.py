"""The terminal UI: Pilot-driven sessions (one behaviour each), snapshots, the real program
under tmux, and the relabel view.

The Pilot tests run the real chain (assemble.run_session: file source, LiteRT model,
session writer, capture) with a file source whose blocks the test releases one at a time:
the session clock stands still between releases (a frozen clock), so a key press lands at a
known sample time and no test waits for real time to pass.
"""

import asyncio
import hashlib
import json
import shutil
import subprocess
import threading
import time
from pathlib import Path

import pytest
import soundfile as sf

from conftest import MODELS, ROOT, run_cli
from monitor.plan import ModelPlan, OutputPlan, SessionPlan
from monitor.sources import FileSource
from monitor.ui.app import MonitorApp, RelabelApp, session_starter
from monitor.ui.screens import StageScreen


class SteppedSource(FileSource):
    """The real file source, held at each 0.5 s block until the test releases it (the
    fault-free way to freeze the session clock; a fake only in its pacing)."""

    def __init__(self, *a, **kw):
        super().__init__(*a, realtime=False, block_s=0.5, **kw)
        self.permits = threading.Semaphore(0)

    def release(self, blocks: int) -> None:
        for _ in range(blocks):
            self.permits.release()

    def _put(self, y):
        while not self.permits.acquire(timeout=0.05):
            if self._stop.is_set():
                return
        super()._put(y)

    def stop(self) -> None:
        self._stop.set()
        self.release(1000)
        super().stop()


def clip_of(tour, tmp_path, start_s, seconds, name="clip.wav"):
    x, sr = sf.read(str(tour[0]), dtype="float32")
    path = tmp_path / name
    sf.write(str(path), x[int(start_s * sr):int((start_s + seconds) * sr)], sr, subtype="PCM_16")
    return path


def make_app(source, out, *, truth=None, **kw):
    plan = SessionPlan(source=source, models=(ModelPlan(MODELS / "demo.tflite"),),
                       output=OutputPlan(out, "t"), truth=truth)
    kw.setdefault("show_timings", False)
    return MonitorApp(session_starter(plan), heading="test", **kw)


async def wait_for(pilot, cond, timeout=30.0):
    t = time.monotonic()
    while not cond():
        if time.monotonic() - t > timeout:
            raise AssertionError("timed out waiting in the UI")
        await pilot.pause(0.02)


def panel_text(app, wid):
    return str(app.query_one(f"#{wid}").render())


async def step(pilot, src, blocks, windows):
    """Release `blocks` of audio and wait until the UI has shown `windows` windows."""
    src.release(blocks)
    await wait_for(pilot, lambda: pilot.app.state.tally is not None
                   and pilot.app.state.tally.windows >= windows)
    pilot.app.redraw(force=True)


@pytest.fixture
def quiet_clip(tour, tmp_path):
    return clip_of(tour, tmp_path, 2.0, 12.0)  # 12 s of the tour's quiet room


def stepped(path):
    return SteppedSource(path, model_rate=16000, window_samples=16000)


def run_app(app, drive, size=(80, 24)):
    async def main():
        async with app.run_test(size=size) as pilot:
            await drive(pilot)
            await pilot.press("q")
            await wait_for(pilot, lambda: app.finished)
        return app.return_code_for()

    return asyncio.run(main())


def test_truth_keys_open_spans_at_the_press_time(quiet_clip, tmp_path):
    src, out = stepped(quiet_clip), tmp_path / "s"
    app = make_app(src, out)
    presses = {}

    async def drive(pilot):
        await step(pilot, src, 4, 3)  # 2 s of audio: windows ending at 1.0, 1.5, 2.0 s
        presses["quiet_room"] = app._now()
        await pilot.press("1")
        await step(pilot, src, 6, 9)
        presses["traffic"] = app._now()
        await pilot.press("3")
        await step(pilot, src, 2, 11)

    assert run_app(app, drive) == 0
    spans = [line.split("\t") for line in (out / "truth.tsv").read_text().splitlines()]
    assert [s[2] for s in spans] == ["quiet_room", "traffic"]
    assert float(spans[0][0]) == pytest.approx(presses["quiet_room"], abs=1e-3) == 2.0
    assert float(spans[1][0]) == pytest.approx(presses["traffic"], abs=1e-3) == 5.0
    assert float(spans[0][1]) == pytest.approx(presses["traffic"], abs=1e-3)


def test_a_wrong_truth_is_marked_and_scored(quiet_clip, tmp_path):
    src, out = stepped(quiet_clip), tmp_path / "s"
    app = make_app(src, out)
    seen = {}

    async def drive(pilot):
        await step(pilot, src, 4, 3)
        await pilot.press("1")
        await step(pilot, src, 4, 7)
        seen["agrees"] = panel_text(app, "decision")
        await pilot.press("3")  # wrong on purpose: the sound is a quiet room
        await step(pilot, src, 4, 11)
        seen["differs"] = panel_text(app, "decision")
        seen["session"] = panel_text(app, "session")
        seen["accuracy"] = app.state.tally.accuracy

    run_app(app, drive)
    assert "agrees" in seen["agrees"] and "DIFFERS" in seen["differs"]
    assert f"{seen['accuracy']:6.1%}" in seen["session"]
    wins = [json.loads(x) for x in (out / "windows.jsonl").read_text().splitlines()]
    assert any(w["truth"] == "traffic" and w["decision"] == "quiet_room" for w in wins)


def test_capture_key_saves_a_manual_snippet_with_the_truth(quiet_clip, tmp_path):
    src, out = stepped(quiet_clip), tmp_path / "s"
    app = make_app(src, out)

    async def drive(pilot):
        await step(pilot, src, 8, 7)
        await pilot.press("3")
        await step(pilot, src, 1, 8)
        await pilot.press("c")
        await step(pilot, src, 1, 9)

    run_app(app, drive)
    manual = list((out / "snippets" / "traffic").glob("*-manual.json"))
    assert len(manual) == 1
    side = json.loads(manual[0].read_text())
    assert side["reason"] == "manual" and side["label"] == "traffic"
    assert json.loads((out / "summary.json").read_text())["snippets"]["manual"] == 1


def test_pause_freezes_the_display_not_the_session(quiet_clip, tmp_path):
    src, out = stepped(quiet_clip), tmp_path / "s"
    app = make_app(src, out)
    seen = {}

    async def drive(pilot):
        await step(pilot, src, 4, 3)
        await pilot.press("p")
        seen["paused"] = app.paused
        n = app.redraws
        src.release(4)
        await wait_for(pilot, lambda: app.state.tally.windows >= 7)
        await pilot.pause(0.3)
        seen["redraws"] = app.redraws - n
        await pilot.press("p")

    run_app(app, drive)
    assert seen["paused"] and seen["redraws"] == 0
    wins = (out / "windows.jsonl").read_text().splitlines()
    assert len(wins) >= 7


def test_stage_view_toggles(quiet_clip, tmp_path):
    src = stepped(quiet_clip)
    app = make_app(src, tmp_path / "s")
    seen = []

    async def drive(pilot):
        await step(pilot, src, 4, 3)
        await pilot.press("s")
        seen.append(isinstance(app.screen, StageScreen))
        await pilot.press("s")
        seen.append(isinstance(app.screen, StageScreen))

    run_app(app, drive)
    assert seen == [True, False]


def test_q_closes_the_session(quiet_clip, tmp_path):
    src, out = stepped(quiet_clip), tmp_path / "s"
    app = make_app(src, out)

    async def drive(pilot):
        await step(pilot, src, 4, 3)

    assert run_app(app, drive) == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["stopped_by_user"] and summary["windows"] >= 3
    assert (out / "truth.tsv").is_file() and (out / "audio.wav").is_file()


def test_capture_asks_for_a_label_when_no_truth(quiet_clip, tmp_path):
    src, out = stepped(quiet_clip), tmp_path / "s"
    app = make_app(src, out)

    async def drive(pilot):
        await step(pilot, src, 6, 5)
        await pilot.press("c")
        await pilot.pause(0.2)
        await pilot.press("2")  # "voices", picked in the question
        await pilot.pause(0.2)

    run_app(app, drive)
    assert len(list((out / "snippets" / "voices").glob("*-manual.json"))) == 1


@pytest.fixture
def finished_app(tour, tmp_path):
    audio = clip_of(tour, tmp_path, 25.0, 16.0)  # quiet room into voices
    src = FileSource(audio, model_rate=16000, window_samples=16000, realtime=False)
    return make_app(src, tmp_path / "s", cpu_meter=lambda: 0.0)


async def _until_finished(pilot):
    await wait_for(pilot, lambda: pilot.app.finished)
    pilot.app.redraw(force=True)
    await pilot.pause(0.2)


def test_snapshot_live_view(finished_app, snap_compare):
    assert snap_compare(finished_app, terminal_size=(80, 24), run_before=_until_finished)


def test_snapshot_stage_view(finished_app, snap_compare):
    async def stage(pilot):
        await _until_finished(pilot)
        await pilot.press("s")
        await pilot.pause(0.3)

    assert snap_compare(finished_app, terminal_size=(80, 24), run_before=stage)


@pytest.mark.system
@pytest.mark.slow
def test_the_real_demo_under_tmux(tmp_path):
    if not shutil.which("tmux"):
        pytest.skip("tmux not installed")
    out = tmp_path / "d"
    name = f"scenemon-test-{time.monotonic_ns()}"
    exe = Path(__import__("sys").executable).parent / "scenemon"
    subprocess.run(["tmux", "new-session", "-d", "-s", name, "-x", "80", "-y", "24",
                    f"cd {ROOT} && {exe} demo --out {out}; echo EXIT=$? > {tmp_path}/code; "
                    f"sleep 30"], check=True)
    try:
        screen, t = "", time.monotonic()
        while time.monotonic() - t < 60 and "held" not in screen:
            time.sleep(0.2)
            screen = subprocess.run(["tmux", "capture-pane", "-p", "-t", name],
                                    capture_output=True, text=True).stdout
        assert "held" in screen and "decision" in screen, screen
        assert "quiet_room" in screen.lower() or "QUIET_ROOM" in screen
        subprocess.run(["tmux", "send-keys", "-t", name, "q"], check=True)
        t = time.monotonic()
        while time.monotonic() - t < 30 and not (tmp_path / "code").exists():
            time.sleep(0.2)
    finally:
        subprocess.run(["tmux", "kill-session", "-t", name], capture_output=True)
    assert (tmp_path / "code").read_text().strip() == "EXIT=0"
    summary = json.loads((out / "summary.json").read_text())
    assert summary["stopped_by_user"] and summary["windows"] >= 1
    assert (out / "truth.tsv").is_file() and (out / "audio.wav").is_file()


def _digest_tree(d):
    return {p.relative_to(d): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(d.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def snippet_session(tour, tmp_path_factory):
    out = tmp_path_factory.mktemp("rl") / "s"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.int8.tflite", "--truth", tour[1],
                "--fast", "--out", out)
    assert r.returncode == 0, r.stderr
    return out


def test_relabel_view_changes_a_sidecar_and_nothing_else(snippet_session, tmp_path):
    out = tmp_path / "s"
    shutil.copytree(snippet_session, out)
    before = _digest_tree(out)
    classes = json.loads((out / "session.json").read_text())["classes"]
    first_label = min((json.loads(p.read_text()) for p in (out / "snippets").glob("*/*.json")),
                      key=lambda m: m["t0"])["label"]
    new_label = next(c for c in classes if c != first_label)
    app = RelabelApp(out, classes)

    async def drive():
        async with app.run_test(size=(100, 30)) as pilot:
            await pilot.pause(0.3)
            await pilot.press("l")
            await pilot.pause(0.2)
            await pilot.press(str(classes.index(new_label) + 1))
            await pilot.pause(0.3)
            await pilot.press("down")
            await pilot.press("d")
            await pilot.pause(0.3)
            await pilot.press("escape")
            await pilot.pause(0.2)

    asyncio.run(drive())
    after = _digest_tree(out)
    changed = sorted(str(p) for p in after if after[p] != before.get(p))
    assert set(after) == set(before)  # nothing added, nothing removed
    assert len(changed) == 2 and all(c.endswith(".json") and c.startswith("snippets/")
                                     for c in changed)
    sides = sorted((out / "snippets").glob("*/*.json"),
                   key=lambda p: json.loads(p.read_text())["t0"])
    first, second = (json.loads(p.read_text()) for p in sides[:2])
    assert first["label"] == new_label and first["relabeled_from"] == first_label
    assert second["dropped"] is True
    # harvest honours both: the relabel wins, the dropped snippet stays out
    r = run_cli("harvest", out, "--out", tmp_path / "set")
    assert r.returncode == 0, r.stderr
    rows = (tmp_path / "set" / "manifest.csv").read_text()
    assert f"{new_label}/" in rows and second["audio_sha256"] not in rows


@pytest.mark.parametrize("key", ["enter", "space"])
def test_relabel_view_plays_on_enter_and_space(snippet_session, key):
    # the README, --help and the view say enter plays: the table's own enter must not eat it
    classes = json.loads((snippet_session / "session.json").read_text())["classes"]
    app = RelabelApp(snippet_session, classes)
    screens = []

    async def drive():
        async with app.run_test(size=(100, 30)) as pilot:
            await pilot.pause(0.3)
            screens.append(app.screen)
            await pilot.press(key)
            # playback ends by itself: played (an output device) or said why not (none)
            await wait_for(pilot, lambda: screens[0].last_status.startswith(("played", "cannot")))

    asyncio.run(drive())
    assert len(screens[0].played) == 1 and screens[0].played[0].suffix == ".wav"
