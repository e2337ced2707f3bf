"""The terminal UI: Pilot-driven sessions, snapshots, the real program under tmux, and the
relabel view."""

import asyncio
import hashlib
import json
import shutil
import subprocess
import time
from argparse import Namespace
from pathlib import Path

import pytest
import soundfile as sf

from conftest import MODELS, ROOT, run_cli
from monitor.cli import file_source, run_session
from monitor.ui.app import MonitorApp, RelabelApp, SessionContext
from monitor.ui.screens import StageScreen

DEFAULT_ARGS = Namespace(capture="disagreement,uncertain", capture_on="decision", pre_roll=0.5,
                         post_roll=0.5, max_snippet=10.0, capture_every=5.0,
                         uncertain_below=0.5, uncertain_margin=0.1)


def clip_of(tour, tmp_path, start_s, seconds, name="clip.wav"):
    x, sr = sf.read(str(tour[0]), dtype="float32")
    path = tmp_path / name
    sf.write(str(path), x[int(start_s * sr):int((start_s + seconds) * sr)], sr, subtype="PCM_16")
    return path


def make_app(audio, out, *, fast, truth=None, **kw):
    def start(hooks):
        def ready(engine, capture, writer, live, card):
            hooks.ready(SessionContext(engine, capture, writer, live, card))

        return run_session(make_source=file_source(audio, fast=fast), name="t",
                           model=str(MODELS / "demo.tflite"), spec=None, truth_path=truth,
                           out=str(out), no_audio=False, observers_extra=[hooks.bridge],
                           args=DEFAULT_ARGS, on_ready=ready, stop=hooks.stop, live_truth=True,
                           keep_features=True)

    return MonitorApp(start, heading="test clip", **kw)


async def wait_for(pilot, cond, timeout=30.0):
    t = time.monotonic()
    while not cond():
        if time.monotonic() - t > timeout:
            raise AssertionError("timed out waiting in the UI")
        await pilot.pause(0.05)


def panel_text(app, wid):
    return str(app.query_one(f"#{wid}").render())


def test_pilot_drives_a_real_time_session(tour, tmp_path):
    # 12 s of the tour's quiet room at real-time pace; keys pressed at known sample times
    audio = clip_of(tour, tmp_path, 2.0, 12.0)
    out = tmp_path / "s"
    app = make_app(audio, out, fast=False, show_timings=False)
    presses = {}

    async def drive():
        async with app.run_test(size=(80, 24)) as pilot:
            await wait_for(pilot, lambda: app.state.windows >= 2)
            before = app._now()
            await pilot.press("1")
            presses["quiet_room"] = (before, app._now())
            await wait_for(pilot, lambda: app.state.windows >= 8)
            app.redraw(force=True)
            assert "agrees" in panel_text(app, "decision")
            before = app._now()
            await pilot.press("3")  # wrong on purpose: the sound is a quiet room
            presses["traffic"] = (before, app._now())
            await wait_for(pilot, lambda: app.state.truth == "traffic")
            app.redraw(force=True)
            assert "DIFFERS" in panel_text(app, "decision")
            acc = app.state.correct / app.state.with_truth
            assert f"{acc:6.1%}" in panel_text(app, "session")
            await pilot.press("c")  # manual capture with the current truth
            await pilot.press("p")
            assert app.paused
            n, w = app.redraws, app.state.windows
            await wait_for(pilot, lambda: app.state.windows >= w + 2)
            assert app.redraws == n  # the display is frozen, the session is not
            await pilot.press("p")
            await pilot.press("s")
            assert isinstance(app.screen, StageScreen)
            await pilot.press("s")
            assert not isinstance(app.screen, StageScreen)
            await pilot.press("q")
            await wait_for(pilot, lambda: app.finished)
        return app.return_code

    code = asyncio.run(drive())
    assert code == 0
    summary = json.loads((out / "summary.json").read_text())
    assert summary["stopped_by_user"] and summary["snippets"]["manual"] == 1
    spans = [line.split("\t") for line in (out / "truth.tsv").read_text().splitlines()]
    assert [s[2] for s in spans] == ["quiet_room", "traffic"]
    # each span starts at the sample-clock time of its key press (the clock runs on in real
    # time, so the press lies between the two readings around it)
    def between(v, lo_hi):
        return lo_hi[0] - 1e-3 <= float(v) <= lo_hi[1] + 1e-3

    assert between(spans[0][0], presses["quiet_room"])
    assert between(spans[1][0], presses["traffic"]) and between(spans[0][1], presses["traffic"])
    manual = list((out / "snippets" / "traffic").glob("*-manual.json"))
    assert len(manual) == 1
    side = json.loads(manual[0].read_text())
    assert side["reason"] == "manual" and side["label"] == "traffic"
    wins = [json.loads(x) for x in (out / "windows.jsonl").read_text().splitlines()]
    assert any(w["truth"] == "traffic" and w["decision"] == "quiet_room" for w in wins)


def test_capture_asks_for_a_label_when_no_truth(tour, tmp_path):
    audio = clip_of(tour, tmp_path, 2.0, 8.0)
    out = tmp_path / "s"
    app = make_app(audio, out, fast=False, show_timings=False)

    async def drive():
        async with app.run_test(size=(80, 24)) as pilot:
            await wait_for(pilot, lambda: app.state.windows >= 4)
            await pilot.press("c")
            await pilot.pause(0.2)
            await pilot.press("2")  # "voices", picked in the question
            await pilot.pause(0.2)
            await pilot.press("q")
            await wait_for(pilot, lambda: app.finished)

    asyncio.run(drive())
    assert len(list((out / "snippets" / "voices").glob("*-manual.json"))) == 1


@pytest.fixture
def finished_app(tour, tmp_path):
    audio = clip_of(tour, tmp_path, 25.0, 16.0)  # quiet room into voices
    return make_app(audio, tmp_path / "s", fast=True, show_timings=False,
                    cpu_meter=lambda: 0.0)


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


def test_relabel_view_changes_a_sidecar_and_nothing_else(tour, tmp_path):
    out = tmp_path / "s"
    r = run_cli("replay", tour[0], "--model", MODELS / "demo.int8.tflite", "--truth", tour[1],
                "--fast", "--out", out)
    assert r.returncode == 0, r.stderr
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
    rows = (tmp_path / "set" / "manifest.csv").read_text()
    assert f"{new_label}/" in rows and second["audio_sha256"] not in rows
