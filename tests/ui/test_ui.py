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
import re
import shutil
import subprocess
import threading
import time
from pathlib import Path

import pytest
import soundfile as sf

from conftest import MODELS, ROOT, cli, jumpy_copy, run_cli
from monitor.assembly.plan import FileInput, ModelPlan, OutputPlan, SessionPlan
from monitor.sound.sources import FileSource
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


def clip_truth(tour, tmp_path, start_s, seconds, name="clip.tsv"):
    """The tour's truth over a clip of it, shifted to the clip's clock (derived from the
    tour's own truth file, never typed in)."""
    from monitor.session.truth import load_truth

    out = []
    for sp in load_truth(tour[1]).spans:
        a, z = max(sp.onset, start_s) - start_s, min(sp.offset, start_s + seconds) - start_s
        if z > a:
            out.append(f"{a:.3f}\t{z:.3f}\t{sp.label}")
    path = tmp_path / name
    path.write_text("\n".join(out) + "\n")
    return path


SIZES = [(80, 24), (100, 30), (120, 40)]
PANELS = ("top", "decision", "classes", "strip", "hears", "health", "session")


@pytest.fixture
def long_app(tour, tmp_path):
    """66 s of the tour from its start (131 windows: quiet room into voices into traffic)
    with its truth file, replayed fast to the end; timings hidden and the CPU meter held
    at zero, so the screen depends on the audio alone."""
    audio = clip_of(tour, tmp_path, 0.0, 66.0)
    truth = clip_truth(tour, tmp_path, 0.0, 66.0)
    src = FileSource(audio, model_rate=16000, window_samples=16000, realtime=False)
    return make_app(src, tmp_path / "s", truth=truth, cpu_meter=lambda: 0.0)


async def _until_finished(pilot):
    await wait_for(pilot, lambda: pilot.app.finished)
    pilot.app.redraw(force=True)
    await pilot.pause(0.2)


def screen_rows(app):
    """The screen as plain text rows (textual's compositor, as the terminal gets it)."""
    return [strip.text for strip in app.screen._compositor.render_strips()]


def assert_nothing_cut(app):
    """Every line a panel was given fits its panel (no wrap, no cut), and appears whole
    on one row of the screen as drawn."""
    rows = screen_rows(app)
    lay = app.layout
    inner = {"top": (lay.width, 1), "decision": (lay.decision_w - 4, lay.row1 - 2),
             "classes": (lay.classes_inner, lay.row1 - 2), "strip": (lay.width - 4, lay.strip - 2),
             "hears": lay.hears_inner, "health": (lay.health_w - 4, lay.row2 - 2),
             "session": (lay.session_w - 4, lay.row2 - 2)}
    for wid in PANELS:
        text = app._shown[wid]
        lines = text.split("\n")
        w, h = inner[wid]
        assert len(lines) <= h, (wid, len(lines), h)
        for line in lines:
            assert line.cell_len <= w, (wid, line.plain, w)
            plain = line.plain.rstrip()
            if plain:
                assert any(plain in r for r in rows), (wid, plain)
    return rows


@pytest.mark.parametrize("size", SIZES, ids=[f"{w}x{h}" for w, h in SIZES])
def test_snapshot_live_view(long_app, snap_compare, size):
    seen = {}

    async def run_before(pilot):
        await _until_finished(pilot)
        seen["rows"] = assert_nothing_cut(pilot.app)
        seen["windows"] = pilot.app.state.tally.windows

    assert snap_compare(long_app, terminal_size=size, run_before=run_before)
    assert seen["windows"] >= 120
    rows = seen["rows"]
    # the picture grows with the terminal: one text row per two pixel rows of the picture
    assert sum(1 for r in rows if "▀" in r) == long_app.layout.hears_inner[1] - 2
    # the strip: one cell per hop across the panel, its span in the title
    cells = size[0] - 4 - 9
    assert any(f"last {cells * 0.5:.0f} s" in r for r in rows)


@pytest.mark.parametrize("size", [(80, 24), (120, 40)], ids=["80x24", "120x40"])
def test_snapshot_stage_view(long_app, snap_compare, size):
    async def stage(pilot):
        await _until_finished(pilot)
        await pilot.press("s")
        await pilot.pause(0.3)

    assert snap_compare(long_app, terminal_size=size, run_before=stage)


def test_too_small_says_the_size_needed(long_app):
    seen = {}

    async def main():
        async with long_app.run_test(size=(60, 18)) as pilot:
            await _until_finished(pilot)
            seen["rows"] = "\n".join(screen_rows(long_app))
            seen["main"] = long_app.query_one("#main").display
            await pilot.resize_terminal(80, 24)
            await pilot.pause(0.3)
            seen["after"] = long_app.query_one("#main").display
            await pilot.press("q")

    asyncio.run(main())
    text = " ".join(seen["rows"].split())
    assert "at least 80 x 24" in text and "this one is 60 x 18" in text
    assert seen["main"] is False and seen["after"] is True


def test_footer_offers_only_the_keys_that_work(long_app, quiet_clip, tmp_path):
    footers = {}

    async def main(app, name, stepped_src=None):
        async with app.run_test(size=(80, 24)) as pilot:
            if stepped_src is not None:
                await step(pilot, stepped_src, 4, 3)
            else:
                await _until_finished(pilot)
            # the footer as redrawn after the session became ready (the relabel key needs the
            # session; the first frame, drawn before it, offers only pause, stage and quit)
            await wait_for(pilot, lambda: "r relabel" in screen_rows(app)[-1])
            footers[name] = screen_rows(app)[-1]
            await pilot.press("q")
            await wait_for(pilot, lambda: app.finished)

    asyncio.run(main(long_app, "file"))
    src = stepped(quiet_clip)
    asyncio.run(main(make_app(src, tmp_path / "k"), "keys", src))
    assert "truth" not in footers["file"] and "capture" not in footers["file"]
    assert "1-4 truth" in footers["keys"] and "0 unknown" in footers["keys"]
    assert "c capture" in footers["keys"] and "A/B" not in footers["keys"]


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
@pytest.mark.parametrize("standalone", [False, True], ids=["live", "standalone"])
def test_relabel_footer_holds_only_its_own_keys(quiet_clip, tmp_path, standalone):
    """At 80 x 24 the relabel view's footer lists its own keys and its back key, whole, and
    none of the live view's; those keys do nothing there (a digit sets no live truth)."""
    from monitor.ui.screens import RelabelScreen

    src, out = stepped(quiet_clip), tmp_path / "s"
    app = make_app(src, out)
    seen = {}

    async def live(pilot):
        await step(pilot, src, 6, 5)
        await wait_for(pilot, lambda: "r relabel" in screen_rows(app)[-1])
        await pilot.press("2")  # the truth: voices
        await step(pilot, src, 1, 6)
        await pilot.press("c")  # a snippet to list
        await step(pilot, src, 1, 7)
        await pilot.press("r")
        await wait_for(pilot, lambda: isinstance(app.screen, RelabelScreen))
        await pilot.pause(0.3)
        seen["footer"] = screen_rows(app)[-1]
        for key in ("p", "s", "m", "c", "1"):  # the live view's keys
            await pilot.press(key)
        await pilot.pause(0.2)
        seen["after"] = (type(app.screen).__name__, app.paused, app.key_truth)
        await pilot.press("escape")
        await pilot.pause(0.2)
        seen["back"] = screen_rows(app)[-1]

    run_app(app, live)
    if standalone:
        classes = json.loads((out / "session.json").read_text())["classes"]
        solo = RelabelApp(out, classes)

        async def alone():
            async with solo.run_test(size=(80, 24)) as pilot:
                await pilot.pause(0.3)
                seen["footer"] = screen_rows(solo)[-1]
                await pilot.press("escape")

        asyncio.run(alone())
    footer = seen["footer"]
    assert re.findall(r"(\S+) (\S+)", footer) == [
        ("space", "play"), ("k", "keep"), ("d", "drop"), ("l", "label…"), ("esc", "back")]
    assert len(footer.rstrip()) <= 80
    if not standalone:
        assert seen["after"] == ("RelabelScreen", False, "voices")
        assert "r relabel" in seen["back"] and "p pause" in seen["back"]


# --- two models, unfamiliar sounds ----------------------------------------------------------
def lagging_copy(tmp_path, confirm=8):
    """The int8 demo model with its card beside it, its decision confirming later (so that
    A and B disagree after each scene change)."""
    d = tmp_path / "b"
    d.mkdir()
    shutil.copy(MODELS / "demo.int8.tflite", d / "demo.int8.tflite")
    card = (MODELS / "demo.int8.toml").read_text()
    card = "\n".join(f"confirm = {confirm}" if line.startswith("confirm") else line
                     for line in card.splitlines())
    (d / "demo.int8.toml").write_text(card + "\n")
    return d / "demo.int8.tflite"


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_two_models_side_by_side(tour, tmp_path):
    start, seconds = 20.0, 30.0  # quiet room into voices
    audio = clip_of(tour, tmp_path, start, seconds)
    truth = clip_truth(tour, tmp_path, start, seconds)
    src = stepped(audio)
    out = tmp_path / "s"
    plan = SessionPlan(source=src, models=(ModelPlan(MODELS / "demo.tflite"),
                                           ModelPlan(lagging_copy(tmp_path))),
                       output=OutputPlan(out, "t"), truth=truth)
    app = MonitorApp(session_starter(plan), heading="ab", show_timings=False,
                     cpu_meter=lambda: 0.0)
    panels = []

    async def drive(pilot):
        n = 1
        while n < 2 * seconds - 2:
            await step(pilot, src, 2 if n == 1 else 1, n)
            panels.append((panel_text(app, "decision"), app.state.lanes[0].decision,
                           app.state.lanes[1].decision))
            n += 1
        assert_nothing_cut(app)
        panels.append(("final", app.state.agreement, [ln.tally.accuracy for ln in app.state.lanes]))

    assert run_app(app, drive) == 0
    differ = [p for p, a, b in panels[:-1] if a != b]
    same = [p for p, a, b in panels[:-1] if a == b and a is not None]
    assert differ and same
    assert all("≠" in p for p in differ) and not any("≠" in p for p in same)
    assert all("A " in p and "B " in p and "agree" in p and "acc" in p for p, _, _ in panels[:-1])
    # agreement and both accuracies re-derived from the session files
    wa = [json.loads(x) for x in (out / "windows.jsonl").read_text().splitlines()]
    wb = [json.loads(x) for x in (out / "windows.b.jsonl").read_text().splitlines()]
    shown = app.state
    n = shown.tally.windows
    agree = sum(a["decision"] == b["decision"] for a, b in zip(wa[:n], wb[:n])) / n
    assert panels[-1][1] == pytest.approx(agree)
    for k, ws in enumerate((wa, wb)):
        truthful = [w for w in ws[:n] if w["truth"] is not None]
        acc = sum(w["decision"] == w["truth"] for w in truthful) / len(truthful)
        assert panels[-1][2][k] == pytest.approx(acc)
        assert f"{acc:6.1%}" in panels[-2][0]
    assert f"agree {agree:6.1%}" in panels[-2][0]


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
def test_unfamiliar_mark_beside_the_decision(tour, tmp_path):
    """A profile fitted on the quiet room alone, beside a copy of the model: the voices
    that follow are unfamiliar to it, and the decision panel says so."""
    from monitor.features.card import load_card
    from monitor.features.frontend import FrontEnd
    from monitor.inference.novelty import fit_profile, profile_path_for, save_profile
    from monitor.session.truth import load_truth
    from monitor.sound.windower import windows_of

    d = tmp_path / "m"
    d.mkdir()
    for name in ("demo.tflite", "demo.toml"):
        shutil.copy(MODELS / name, d / name)
    card = load_card(d / "demo.toml")
    quiet = next(sp for sp in load_truth(tour[1]).spans if sp.label == "quiet_room")
    x, sr = sf.read(str(tour[0]), dtype="float32")
    x = x[int(quiet.onset * sr) + sr:int(quiet.offset * sr) - sr]
    feats = FrontEnd(card).batch(windows_of(x, card.window_samples, sr // 20))
    save_profile(fit_profile(feats, card), profile_path_for(d / "demo.tflite"))
    start = quiet.offset - 6.0
    audio = clip_of(tour, tmp_path, start, 16.0)
    src = stepped(audio)
    plan = SessionPlan(source=src, models=(ModelPlan(d / "demo.tflite"),),
                       output=OutputPlan(tmp_path / "s", "t"))
    app = MonitorApp(session_starter(plan), heading="u", show_timings=False,
                     cpu_meter=lambda: 0.0)
    seen = []

    async def drive(pilot):
        for n in range(1, 30):
            await step(pilot, src, 2 if n == 1 else 1, n)
            seen.append((app.state.lanes[0].unfamiliar, panel_text(app, "decision"),
                         panel_text(app, "session")))

    run_app(app, drive)
    flagged = [p for u, p, _ in seen if u]
    assert flagged and all("◆ unfamiliar" in p for p in flagged)
    assert not any("unfamiliar" in p for u, p, _ in seen if not u)
    assert any("◆ unfamiliar" in s for _, _, s in seen)  # the session panel's count


# --- the stage font -----------------------------------------------------------------------------
def test_stage_font_every_letter_distinct():
    import itertools
    import string

    from monitor.session.snippets import safe_label
    from monitor.ui.draw import FONT, FONT_H, FONT_W, big_text

    # every character a class name can hold (the label rule of monitor.session.snippets), upper-cased
    # as the stage shows it
    chars = sorted({c.upper() for c in string.ascii_letters + string.digits + "_-"
                    if safe_label(f"a{c}b") == f"a{c}b"})
    assert len(chars) == 26 + 10 + 2
    for ch in chars:
        assert len(FONT[ch]) == FONT_H and all(len(r) == FONT_W for r in FONT[ch]), ch
    cells = {ch: "".join(FONT[ch]) for ch in chars}
    worst = min((sum(a != b for a, b in zip(cells[p], cells[q])), p, q)
                for p, q in itertools.combinations(chars, 2))
    assert worst[0] >= 3, worst  # every pair differs in at least 3 of its cells
    # and so does what the stage draws, at both scales
    for scale_width in (10 ** 6, 6):
        drawn = {ch: big_text(ch, max_width=scale_width).plain for ch in chars}
        assert len(set(drawn.values())) == len(chars)


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


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
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


@pytest.mark.slow  # seconds of work: in the full suite, not the quick tier
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


@pytest.fixture(scope="module")
def ab_snippet_session(tour, tmp_path_factory):
    """The tour's first 60 s under the demo model (A) and a copy of it deciding on every raw
    window (B: no smoothing, no confirmation): the two disagree after scene changes."""
    d = tmp_path_factory.mktemp("rlab")
    audio = clip_of(tour, d, 0.0, 60.0)
    truth = clip_truth(tour, d, 0.0, 60.0)
    jumpy_copy(d)
    r = cli("replay", audio, "--model", MODELS / "demo.tflite", "--model", d / "jumpy.tflite",
            "--truth", truth, "--fast", "--headless", "--out", d / "s")
    assert r.returncode == 0, r.stderr
    return d / "s"


def test_relabel_view_shows_both_predictions_where_the_models_disagree(ab_snippet_session):
    from textual.widgets import DataTable

    from monitor.session.snippets import iter_snippets

    snips = iter_snippets(ab_snippet_session)
    md = [sn for sn in snips if sn.reason == "models_disagree"]
    assert md and len(md) < len(snips)
    classes = json.loads((ab_snippet_session / "session.json").read_text())["classes"]
    app = RelabelApp(ab_snippet_session, classes)
    seen = {}

    async def drive():
        async with app.run_test(size=(80, 24)) as pilot:
            await pilot.pause(0.3)
            table = app.screen.query_one(DataTable)
            seen["cells"] = {sn.sidecar: [c.plain if hasattr(c, "plain") else str(c)
                                          for c in table.get_row(str(sn.sidecar))]
                             for sn in snips}
            seen["rows"] = screen_rows(app)
            await pilot.press("escape")

    asyncio.run(drive())
    for sn in snips:
        said = seen["cells"][sn.sidecar][3]  # the "predicted" column
        if sn.reason == "models_disagree":
            a, b = sn.meta["predicted"], sn.meta["model_b"]["predicted"]
            assert said == f"A {a[:10]}\nB {b[:10]}"
        else:
            assert said == sn.meta["predicted"][:12]
    # on screen: B's line right under A's, in the same column
    first = md[0]
    rows = seen["rows"]
    k = next(i for i, r in enumerate(rows) if f"A {first.meta['predicted'][:10]}" in r
             and f"{first.t0:7.1f} s" in r)
    col = rows[k].index(f"A {first.meta['predicted'][:10]}")
    assert rows[k + 1][col:].startswith(f"B {first.meta['model_b']['predicted'][:10]}")


def read_count(text):
    """A short count back as a number, its letter read as a decimal point times the unit
    (IEC 60062's letter code for resistor values, from memory): "1k2" -> 1200, "12k" ->
    12000, "M12" -> 120000, "999" -> 999."""
    m = re.fullmatch(r"(\d*)([kMG]?)(\d*)", text)
    assert m and (m[1] or m[3]) and (m[2] or not m[3]), text
    value = float(f"{m[1] or 0}.{m[3] or 0}")
    return round(value * {"": 1, "k": 1e3, "M": 1e6, "G": 1e9}[m[2]])


@pytest.mark.parametrize("n", [0, 7, 999, 1000, 1049, 1050, 7200, 9949, 9950, 12_345, 99_499,
                               99_500, 149_999, 150_000, 949_999, 950_000, 1_234_567,
                               99_499_999, 99_500_000, 3_210_000_000])
def test_short_counts_fit_three_cells_and_read_back(n):
    from monitor.ui.draw import count3, count4

    assert len(count3(n)) <= 3 and len(count4(n)) <= 4
    back = read_count(count3(n))
    # two significant digits at most: within 5% (and exact below 1000)
    assert back == n if n < 1000 else abs(back - n) <= 0.05 * n, (n, count3(n), back)


@pytest.mark.parametrize("case", ["thousands", "hundreds_of_thousands"])
@pytest.mark.parametrize("size", SIZES, ids=[f"{w}x{h}" for w, h in SIZES])
def test_session_panel_keeps_its_columns_for_hours_of_windows(case, size):
    """A session of hours: confusion cells of 1,000+ and 100,000+ windows, 10+ and 100+
    snippets. At every size the time and counts are whole, every cell keeps its column
    under its key (a space between cells) and says its count, and no line is cut."""

    from monitor.decisions.tally import Tally
    from monitor.ui import draw as D
    from monitor.ui.app import layout_for

    classes = ("quiet_room", "voices", "traffic", "machinery")
    keys = D.class_keys(classes)
    # (truth, decision) -> windows; None: undecided
    counts = ({(0, 0): 7_200, (0, 1): 1_049, (1, 1): 9_950, (2, 2): 999, (2, None): 12,
               (3, 3): 1_500} if case == "thousands" else
              {(0, 0): 120_000, (0, 3): 7_200, (1, 1): 99_600, (2, 2): 150_000,
               (3, 3): 1_049, (3, None): 3})
    snippets = 12 if case == "thousands" else 123
    tally = Tally(classes, hop_s=0.5)
    t = 0.0
    for (ti, di), n in counts.items():
        for _ in range(n):
            tally.add(t, t + 1.0, None if di is None else classes[di], classes[ti])
            t += 0.5
    t_s = t + 0.5
    assert t_s > 2 * 3600  # hours of windows
    w, h = size
    lay = layout_for(w, h, len(classes), False)
    width, height = lay.session_w - 4, lay.row2 - 2
    text = D.session_text(t_s=t_s, windows=tally.windows, snippets=snippets, tally=tally,
                          classes=classes, keys=keys, width=width, height=height,
                          truth_mode="file", unfamiliar=snippets * 10)
    lines = [line.plain for line in text.split("\n")]
    assert len(lines) <= height and all(len(line) <= width for line in lines)
    assert lines[0] == f"time {D.clock(t_s):>8}  win {tally.windows:>7,}"
    assert lines[1].startswith(f"snip {snippets:>8,}  acc ")
    head = next(i for i, line in enumerate(lines) if line.startswith("truth↓"))
    header, rows = lines[head + 1], lines[head + 2:head + 2 + len(classes)]
    cols = [keys[c] for c in classes] + ["?"]
    cell = (len(header) - 3) // len(cols)
    assert header == "   " + "".join(f"{k:>{cell - 1}} " for k in cols)
    for ti, (c, row) in enumerate(zip(classes, rows)):
        assert row.startswith(f" {keys[c]} ") and len(row) == len(header), (row, header)
        for j in range(len(cols)):
            slot = row[3 + j * cell:3 + (j + 1) * cell]
            assert slot.endswith(" ") and slot[-2] != " ", (row, j)  # right-aligned, spaced
            shown = slot.strip()
            want = counts.get((ti, None if j == len(classes) else j), 0)
            if want == 0:
                assert shown == "·"
            else:
                back = read_count(shown)
                assert back == want if want < 1000 else abs(back - want) <= 0.05 * want, \
                    (shown, want)


def test_feature_picture_axis_and_no_colour_form(demo_card):
    """The picture's frequency labels are the card's mel band centres (HTK mel, as the card
    says: m = 2595 log10(1 + f / 700), bands evenly spaced in mel), and without colour the
    picture reads by glyph density: a spectrum rising with frequency is denser on top."""
    import numpy as np

    from monitor.ui.draw import SHADES, heat_text, picture_spec

    spec = picture_spec(demo_card)
    mel_cfg = demo_card.frontend.mel
    bands, frames = mel_cfg.mel_bands, demo_card.frames_per_window
    m_lo, m_hi = (2595 * np.log10(1 + f / 700) for f in (mel_cfg.fmin, mel_cfg.fmax))
    mel = np.linspace(m_lo, m_hi, bands + 2)[1:-1]
    centres = 700 * (10 ** (mel / 2595) - 1)
    assert np.allclose(spec.centres_hz, centres, rtol=1e-9)
    # scaled features that undo to a level rising from the ramp's bottom to its top
    want = np.linspace(spec.lo, spec.hi, bands)[None, :].repeat(frames, axis=0)
    feats = (want - spec.offset) / spec.gain
    text = heat_text(feats, spec, 5, 20, color=False).plain.split("\n")
    assert len(text) == 5
    density = [max(SHADES.index(ch) for ch in line[4:]) for line in text]
    assert density == sorted(density, reverse=True) and density[0] > density[-1]
    assert text[0][:3].strip() == f"{centres[-1] / 1000:.1f}"  # the top row's highest band


def test_the_screen_says_what_happens_before_the_model_loads(quiet_clip, tmp_path):
    # while the plan's preparation runs (the demo makes its tour) the screen says so, not
    # "loading the model"; then it loads the model
    gate, seen = threading.Event(), []
    plan = SessionPlan(source=FileInput(quiet_clip, realtime=False),
                       models=(ModelPlan(MODELS / "demo.tflite"),),
                       output=OutputPlan(tmp_path / "s", "t"), prepare=gate.wait,
                       prepare_note="making the demo tour (the first run only) …")
    app = MonitorApp(session_starter(plan), heading="test", show_timings=False)

    async def drive():
        async with app.run_test(size=(80, 24)) as pilot:
            await wait_for(pilot, lambda: "making the demo tour" in app.message)
            seen.append(app.message)
            gate.set()
            await wait_for(pilot, lambda: app.finished)
            await pilot.press("q")

    asyncio.run(drive())
    assert seen and "loading the model" not in seen[0]
