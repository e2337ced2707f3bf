"""The textual app: live view, stage view, relabel view.

Threads: the UI thread runs textual. One worker thread ("session") runs
`assemble.run_session` (the compute thread, with its source and session-writer threads);
it posts `SessionReady` once with the session's `SessionHandle`, then `NewWindows` and
`Status` messages through `UIBridge` (post_message: never blocks). The UI redraws from its
own `ViewState` at most `redraw_hz` times a second, however fast windows arrive. Keys reach
the session only through the handle's thread-safe methods (`set_truth`, `capture_now`) and
the stop `Event`; the UI never reads the engine, the source or the writer.
"""

from __future__ import annotations

import dataclasses
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from rich.text import Text
from textual import work
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal
from textual.message import Message
from textual.reactive import var
from textual.widgets import Footer, Static
from textual.worker import Worker, WorkerState

from monitor.errors import ExitCode, ScenemonError, exit_code_for, one_sentence, summary_failure
from monitor.tally import SILENT_BELOW_DBFS, Tally
from monitor.ui import draw as D
from monitor.ui.bridge import NewWindows, SessionStatus, Status, UIBridge
from monitor.ui.screens import AskLabel, RelabelScreen, StageScreen

STRIP_HOPS = 120  # one minute at a 0.5 s hop


@dataclass
class SessionHooks:
    """What the UI hands the session function (`start(hooks) -> summary`)."""

    bridge: UIBridge
    stop: threading.Event
    ready: Callable[[Any], None]  # called with the assemble.SessionHandle
    say: Callable[[str], None] = lambda text: None  # what the session is doing, before it runs


class SessionReady(Message):
    def __init__(self, handle) -> None:
        super().__init__()
        self.handle = handle


@dataclass
class ViewState:
    """The UI's own copy of what it shows (UI thread only)."""

    classes: tuple | None = None
    keys: dict = field(default_factory=dict)
    hop_s: float = 0.5
    enter: float = 0.6
    decision: str | None = None
    since_t: float = 0.0
    t1: float = 0.0
    probs: Any = None
    smoothed: Any = None
    features: Any = None
    level: float = -160.0
    clipped: float = 0.0
    quiet_s: float = 0.0
    truth: str | None = None
    tally: Tally | None = None
    decisions: deque = field(default_factory=lambda: deque(maxlen=STRIP_HOPS * 2))
    truths: deque = field(default_factory=lambda: deque(maxlen=STRIP_HOPS * 2))
    b_decision: str | None = None
    b_tally: Tally | None = None
    agree: int = 0
    unfamiliar: bool = False
    status: SessionStatus | None = None

    def start(self, classes, hop_s: float, enter: float, two: bool) -> None:
        self.classes, self.hop_s, self.enter = tuple(classes), hop_s, enter
        self.keys = D.class_keys(self.classes)
        self.tally = Tally(self.classes, hop_s=hop_s)
        self.b_tally = Tally(self.classes, hop_s=hop_s) if two else None

    def add(self, r) -> None:
        if self.decision != r.decision:
            self.decision, self.since_t = r.decision, r.t1
        self.t1 = r.t1
        if r.probs is not None:
            self.probs, self.smoothed = r.probs, r.smoothed
        self.features = r.features
        self.level, self.clipped = r.level_dbfs, r.clipped
        self.quiet_s = self.quiet_s + self.hop_s if r.level_dbfs < SILENT_BELOW_DBFS else 0.0
        self.truth = r.truth
        self.unfamiliar = bool(r.unfamiliar)
        self.decisions.append(r.decision)
        self.truths.append(r.truth)
        self.tally.add(r.t0, r.t1, r.decision, r.truth, r.gap)
        if r.others and self.b_tally is not None:
            b = r.others[0]
            self.b_decision = b.decision
            self.b_tally.add(b.t0, b.t1, b.decision, b.truth, b.gap)
            self.agree += int(b.decision == r.decision)


class CpuMeter:
    """This process's CPU use as a share of one core, over the last few seconds."""

    def __init__(self) -> None:
        self.samples: deque = deque(maxlen=30)

    def __call__(self) -> float:
        self.samples.append((time.monotonic(), time.process_time()))
        (w0, c0), (w1, c1) = self.samples[0], self.samples[-1]
        return (c1 - c0) / (w1 - w0) if w1 > w0 else 0.0


class MonitorApp(App):
    """The live view (see module docstring)."""

    CSS_PATH = "app.tcss"
    TITLE = "scenemon"
    ENABLE_COMMAND_PALETTE = False
    BINDINGS = [
        Binding("1", "truth(1)", "truth", key_display="1-9", id="truth"),
        *[Binding(str(k), f"truth({k})", f"truth {k}", show=False, id=f"truth_{k}")
          for k in range(2, 10)],
        Binding("0", "truth(0)", "unknown", id="truth_unknown"),
        Binding("c", "capture", "capture", id="capture"),
        Binding("p", "pause", "pause", id="pause"),
        Binding("s", "stage", "stage", id="stage"),
        Binding("r", "relabel", "relabel", id="relabel"),
        Binding("q", "quit_session", "quit", id="quit"),
    ]

    paused: var[bool] = var(False)
    """Display frozen; capture and the session go on."""

    def __init__(self, start: Callable[[SessionHooks], dict], *, heading: str = "",
                 redraw_hz: float = 12.0, show_timings: bool = True,
                 cpu_meter: Callable[[], float] | None = None,
                 exit_when_done: bool = False) -> None:
        super().__init__()
        self.start_session = start
        self.heading = heading
        self.redraw_hz = redraw_hz
        self.show_timings = show_timings
        self.cpu_meter = cpu_meter or CpuMeter()
        self.exit_when_done = exit_when_done
        self.bridge = UIBridge(self)
        self.stop_event = threading.Event()
        self.state = ViewState()
        self.handle = None
        self.summary: dict | None = None
        self.error: BaseException | None = None
        self.finished = False
        self.quitting = False
        self.dirty = True
        self.message = "starting …"
        self.redraws = 0
        self._health_t = 0.0
        self._shown: dict[str, Text] = {}

    # --- layout -----------------------------------------------------------------------------
    def compose(self) -> ComposeResult:
        yield Static(id="top")
        with Horizontal(id="row1"):
            yield Static(id="decision", classes="panel")
            yield Static(id="classes", classes="panel")
        yield Static(id="strip", classes="panel")
        with Horizontal(id="row2"):
            yield Static(id="hears", classes="panel")
            yield Static(id="health", classes="panel")
            yield Static(id="session", classes="panel")
        yield Footer()

    def on_mount(self) -> None:
        titles = {"decision": "decision", "classes": "classes", "strip": "last minute",
                  "hears": "what it hears", "health": "health", "session": "session"}
        for wid, title in titles.items():
            self.query_one(f"#{wid}").border_title = title
        self.set_interval(1.0 / self.redraw_hz, self.redraw)
        self.run_worker_session()
        self.redraw(force=True)

    # --- the session worker ---------------------------------------------------------------------
    def say(self, text: str) -> None:
        """Show what the session is doing before it runs (any thread)."""
        def show() -> None:
            self.message = text
            self.dirty = True

        try:
            self.call_from_thread(show)
        except RuntimeError:
            show()

    @work(thread=True, exclusive=True, exit_on_error=False, name="session")
    def run_worker_session(self) -> dict:
        def ready(handle) -> None:
            self.bridge.attach(handle)
            self.post_message(SessionReady(handle))

        return self.start_session(SessionHooks(self.bridge, self.stop_event, ready, self.say))

    def on_session_ready(self, message: SessionReady) -> None:
        h = self.handle = message.handle
        self.state.start(h.classes, h.card.hop_s, h.decisions[0].enter, len(h.models) > 1)
        self.message = "running"
        self.dirty = True

    def on_new_windows(self, message: NewWindows) -> None:
        if self.state.classes is None:
            return
        for r in self.bridge.drain():
            self.state.add(r)
        self.dirty = True

    def on_status(self, message: Status) -> None:
        self.state.status = message.status

    def on_worker_state_changed(self, event: Worker.StateChanged) -> None:
        if event.worker.name != "session":
            return
        if event.state == WorkerState.SUCCESS:
            self.finished = True
            self.summary = event.worker.result
            self.on_new_windows(NewWindows())
            fail = summary_failure(self.summary)
            self.message = fail or "session closed; q quits"
        elif event.state == WorkerState.ERROR:
            # bad input or a failure before or during the session: leave the screen and let
            # the command line say it in one sentence with the right exit code
            self.finished = True
            self.error = event.worker.error
            self.exit(self.return_code_for())
            return
        else:
            return
        self.dirty = True
        if self.quitting or self.exit_when_done:
            self.exit(self.return_code_for())

    def return_code_for(self) -> int:
        if self.error is not None:
            return exit_code_for(self.error)
        return ExitCode.FAILURE if summary_failure(self.summary) else ExitCode.OK

    # --- keys ------------------------------------------------------------------------------------
    def _now(self) -> float:
        return self.handle.now_s()

    def action_truth(self, k: int) -> None:
        st = self.state
        if self.handle is None or self.finished:
            return
        if self.handle.live_truth is None:
            self.notify("the truth comes from the truth file in this session")
            return
        if k == 0:
            label = None
        elif k <= len(st.classes):
            label = st.classes[k - 1]
        else:
            return
        self.handle.set_truth(label)
        self.notify(f"truth: {label or 'unknown'}", timeout=1.5)
        self.dirty = True

    def action_capture(self) -> None:
        if self.handle is None or self.finished:
            return
        if self.handle.capture is None:
            self.notify("capture is off (--capture none)")
            return
        lt = self.handle.live_truth
        label = lt.current if lt is not None else self.state.truth
        if label is not None:
            self._capture(label)
            return
        self.push_screen(AskLabel(self.state.classes, "No truth is set. What is this sound?"),
                         lambda lab: lab is not None and self._capture(lab))

    def _capture(self, label: str) -> None:
        snip = self.handle.capture_now(label)
        if snip is None:
            self.notify("nothing to capture yet")
        else:
            self.notify(f"captured {snip['t1'] - snip['t0']:.1f} s as {label}", timeout=2)
        self.dirty = True

    def action_pause(self) -> None:
        self.paused = not self.paused
        self.dirty = True
        self.redraw(force=True)

    def action_stage(self) -> None:
        if isinstance(self.screen, StageScreen):
            self.pop_screen()
        else:
            self.push_screen(StageScreen())

    def action_relabel(self) -> None:
        if self.handle is None:
            return
        self.push_screen(RelabelScreen(self.handle.dir, list(self.state.classes)))

    def action_quit_session(self) -> None:
        self.quitting = True
        self.stop_event.set()
        self.message = "closing the session …"
        self.redraw(force=True)
        if self.finished:
            self.exit(self.return_code_for())

    # --- drawing -----------------------------------------------------------------------------
    def redraw(self, force: bool = False) -> None:
        if not (self.dirty or force):
            return
        if self.paused and not force:
            return
        self.dirty = False
        self.redraws += 1
        st = self.state
        top = Text(f" scenemon  {self.heading}", style="bold")
        top.append(f"   {self.message}", style="dim")
        if self.paused:
            top.append("   DISPLAY PAUSED (p)", style="bold reverse")
        self.query_one("#top", Static).update(top, layout=False)
        if isinstance(self.screen, StageScreen):
            self.screen.refresh_view()
        if st.classes is None:
            text = Text(f"\n  {self.message}", style="bold")
            self.query_one("#decision", Static).update(text, layout=False)
            return
        top_p = float(max(st.smoothed)) if st.smoothed is not None else 0.0
        self._set("decision", D.decision_text(
            st.classes, st.keys, st.decision, st.t1 - st.since_t, st.truth, top_p))
        inner = max(30, self.query_one("#classes").size.width - 4)
        name_w = min(12, max(len(c) for c in st.classes))
        bar_w = max(5, (inner - name_w - 10) // 2)
        self.query_one("#classes", Static).update(D.class_bars(
            st.classes, st.keys, st.probs, st.smoothed, st.enter, width=bar_w, name_w=name_w),
            layout=False)
        width = max(20, self.query_one("#strip").size.width - 14)
        self._set("strip", D.strip_text(st.classes, st.keys, st.decisions, st.truths, width,
                                        st.hop_s))
        hw = max(12, self.query_one("#hears").size.width - 4)
        hears = D.heat_text(st.features, rows=5, cols=hw, color=not self.no_color)
        hears.append_text(D.level_text(st.level, st.clipped, st.quiet_s, width=max(4, hw - 17)))
        self.query_one("#hears", Static).update(hears, layout=False)
        now = time.monotonic()
        if force or now - self._health_t >= 1.0:  # figures that need no faster refresh
            self._health_t = now
            self._set("health", self._health())
        self._set("session", self._session())

    def _set(self, wid: str, text: Text) -> None:
        """Update a panel only when its text changed (each update costs a re-render)."""
        if self._shown.get(wid) != text:
            self._shown[wid] = text
            self.query_one(f"#{wid}", Static).update(text, layout=False)

    def _health(self) -> Text:
        st = self.state
        src = self.handle.source if self.handle else {}
        status = st.status
        t = Text()
        name = src.get("device") or Path(str(src.get("file", ""))).name
        t.append(f"{src.get('kind', '')} {name}"[:26] + "\n")
        t.append(f"native {src.get('native_rate', '-')} Hz\n")
        eng = status.engine if status else None
        if self.show_timings:
            ms = "-" if eng is None or eng.ms is None else f"{eng.ms:6.2f} ms"
            t.append(f"compute {ms}\n")
            lat = "-" if eng is None or eng.latency_ms is None else f"{eng.latency_ms:6.1f} ms"
            t.append(f"latency {lat}\n")
            t.append(f"CPU {self.cpu_meter() * 100:5.1f}%\n")
        else:
            t.append("timings hidden\n\n\n")
        if status is not None and status.write_error:
            t.append("DISK: writing stopped\n", style="bold reverse red")
        over = eng.overruns if eng else 0
        gaps = eng.gap_windows if eng else 0
        t.append(f"overruns {over}  gaps {gaps}", style="bold reverse" if over or gaps else "")
        return t

    def _session(self) -> Text:
        st = self.state
        t = Text()
        snips = st.status.snippets if st.status else 0
        tl = st.tally
        t.append(f"{st.t1:6.1f} s · {tl.windows} win · {snips} snip\n")
        if tl.with_truth:
            t.append(f"accuracy {tl.accuracy:6.1%} of {tl.with_truth}\n", style="bold")
            t.append_text(D.confusion_text(st.classes, st.keys, tl.confusion.tolist()))
        else:
            t.append("no truth yet: press 1-9\n", style="dim")
        return t

    def on_unmount(self) -> None:
        self.stop_event.set()


class RelabelApp(App):
    """`scenemon relabel SESSION`: the relabel view on its own."""

    CSS_PATH = "app.tcss"
    TITLE = "scenemon relabel"
    ENABLE_COMMAND_PALETTE = False

    def __init__(self, session_dir: Path, classes: list[str]) -> None:
        super().__init__()
        self.session_dir, self.class_names = Path(session_dir), list(classes)

    def on_mount(self) -> None:
        self.push_screen(RelabelScreen(self.session_dir, self.class_names, standalone=True))


def session_starter(plan) -> Callable[[SessionHooks], dict]:
    """The function the UI's session worker runs: `assemble.run_session` with the UI's
    observer, stop event and ready callback."""
    from monitor.assemble import run_session

    plan = dataclasses.replace(plan, keep_features=True, live_truth=True)

    def start(hooks: SessionHooks) -> dict:
        return run_session(plan, observers=[hooks.bridge], stop=hooks.stop,
                           on_ready=hooks.ready, notices=False, progress=hooks.say)

    return start


def run_ui(plan, *, heading: str) -> int:
    """The terminal UI around one session; returns the exit code."""
    import sys

    from monitor.plan import MicInput
    from monitor.run import finish

    timed = isinstance(plan.source, MicInput) and plan.source.seconds is not None
    app = MonitorApp(session_starter(plan), heading=heading, exit_when_done=timed)
    code = app.run()
    if app.error is not None:
        sys.stderr.write(f"scenemon: {one_sentence(app.error)}\n")
        return exit_code_for(app.error)
    if app.summary is not None:
        return finish(app.summary)
    return code if isinstance(code, int) else ExitCode.OK


def run_relabel(session: Path, *, interactive: bool) -> int:
    """`scenemon relabel SESSION`: the relabel view; it needs a terminal."""
    from monitor.session_reader import load_session

    s = load_session(session)
    if not (s.dir / "snippets").is_dir():
        raise ScenemonError(f"{s.dir}: the session has no snippets to relabel")
    if not interactive:
        raise ScenemonError(f"{s.dir}: relabel is an interactive view and needs a terminal "
                            f"(stdin and stdout are not one)")
    RelabelApp(s.dir, s.classes).run()
    return ExitCode.OK
