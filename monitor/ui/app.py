"""The textual app: live view, stage view, relabel view.

Threads: the UI thread runs textual. One worker thread ("session") loads the card and the
model, then runs the engine (`Engine.run` with its source and session-writer threads); it
posts `Ready` once and `NewWindows` notifications through `UIBridge` (post_message: never
blocks). The UI redraws from its own copy of the state at most `redraw_hz` times a second,
however fast windows arrive. Keys reach the engine through thread-safe objects only:
`LiveTruth.set`, `CapturePolicy.manual` and the stop `Event`.
"""

from __future__ import annotations

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

from monitor.errors import ScenemonError
from monitor.ui import widgets as W
from monitor.ui.bridge import NewWindows, UIBridge
from monitor.ui.screens import AskLabel, RelabelScreen, StageScreen

STRIP_HOPS = 120  # one minute at a 0.5 s hop


@dataclass
class SessionContext:
    """What the session worker hands the UI once everything is loaded."""

    engine: Any
    capture: Any
    writer: Any
    live_truth: Any  # LiveTruth, or None when the truth comes from a file
    card: Any


@dataclass
class SessionHooks:
    """What the UI hands the session function (`start(hooks) -> summary`)."""

    bridge: UIBridge
    stop: threading.Event
    ready: Callable[[SessionContext], None]


class SessionReady(Message):
    def __init__(self, ctx: SessionContext) -> None:
        super().__init__()
        self.ctx = ctx


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
    ms: float | None = None
    latency: float | None = None
    gaps: int = 0
    gap_samples: int = 0
    windows: int = 0
    with_truth: int = 0
    correct: int = 0
    cm: list = field(default_factory=list)
    truth: str | None = None
    decisions: deque = field(default_factory=lambda: deque(maxlen=STRIP_HOPS * 2))
    truths: deque = field(default_factory=lambda: deque(maxlen=STRIP_HOPS * 2))

    def add(self, r) -> None:
        if self.decision != r.decision:
            self.decision, self.since_t = r.decision, r.t1
        self.t1 = r.t1
        self.probs, self.smoothed, self.features = r.probs, r.smoothed, r.features
        self.level, self.clipped = r.level_dbfs, r.clipped
        self.quiet_s = self.quiet_s + self.hop_s if r.level_dbfs < -70.0 else 0.0
        self.ms, self.latency = r.ms, r.latency_ms
        if r.gap:
            self.gaps += 1
            self.gap_samples += r.gap
        self.windows += 1
        self.truth = r.truth
        self.decisions.append(r.decision)
        self.truths.append(r.truth)
        if r.truth is not None and r.truth in self.classes:
            self.with_truth += 1
            self.correct += int(r.decision == r.truth)
            col = self.classes.index(r.decision) if r.decision in self.classes else len(self.classes)
            self.cm[self.classes.index(r.truth)][col] += 1


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
                 cpu_meter: Callable[[], float] | None = None) -> None:
        super().__init__()
        self.start_session = start
        self.heading = heading
        self.redraw_hz = redraw_hz
        self.show_timings = show_timings
        self.cpu_meter = cpu_meter or CpuMeter()
        self.bridge = UIBridge(self)
        self.stop_event = threading.Event()
        self.state = ViewState()
        self.ctx: SessionContext | None = None
        self.summary: dict | None = None
        self.error: BaseException | None = None
        self.finished = False
        self.quitting = False
        self.dirty = True
        self.message = "loading the model …"
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
    @work(thread=True, exclusive=True, exit_on_error=False, name="session")
    def run_worker_session(self) -> dict:
        hooks = SessionHooks(self.bridge, self.stop_event,
                             lambda ctx: self.post_message(SessionReady(ctx)))
        return self.start_session(hooks)

    def on_session_ready(self, message: SessionReady) -> None:
        ctx = self.ctx = message.ctx
        card = ctx.card
        st = self.state
        st.classes = tuple(card.classes)
        st.keys = W.class_keys(st.classes)
        st.hop_s = card.hop_s
        st.enter = ctx.engine.decision.enter
        st.cm = [[0] * (len(st.classes) + 1) for _ in st.classes]
        self.message = "running"
        self.dirty = True

    def on_new_windows(self, message: NewWindows) -> None:
        if self.state.classes is None:
            return
        for r in self.bridge.drain():
            self.state.add(r)
        self.dirty = True

    def on_worker_state_changed(self, event: Worker.StateChanged) -> None:
        if event.worker.name != "session":
            return
        if event.state == WorkerState.SUCCESS:
            self.finished = True
            self.summary = event.worker.result
            self.on_new_windows(NewWindows())
            fail = (self.summary or {}).get("source_failure")
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
        if self.quitting:
            self.exit(self.return_code_for())

    def return_code_for(self) -> int:
        if isinstance(self.error, ScenemonError):
            return 2
        if self.error is not None:
            return 1
        return 1 if (self.summary or {}).get("source_failure") else 0

    # --- keys ------------------------------------------------------------------------------------
    def _now(self) -> float:
        eng = self.ctx.engine
        return eng.windower.end / eng.card.sample_rate

    def action_truth(self, k: int) -> None:
        st = self.state
        if self.ctx is None or self.finished:
            return
        if self.ctx.live_truth is None:
            self.notify("the truth comes from the truth file in this session")
            return
        if k == 0:
            label = None
        elif k <= len(st.classes):
            label = st.classes[k - 1]
        else:
            return
        self.ctx.live_truth.set(label, self._now())
        self.notify(f"truth: {label or 'unknown'}", timeout=1.5)
        self.dirty = True

    def action_capture(self) -> None:
        if self.ctx is None or self.finished:
            return
        if self.ctx.capture is None:
            self.notify("capture is off (--capture none)")
            return
        label = self.ctx.live_truth.current if self.ctx.live_truth else self.state.truth
        if label is not None:
            self._capture(label)
            return
        self.push_screen(AskLabel(self.state.classes, "No truth is set. What is this sound?"),
                         lambda lab: lab is not None and self._capture(lab))

    def _capture(self, label: str) -> None:
        snip = self.ctx.capture.manual(label)
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
        if self.ctx is None:
            return
        self.push_screen(RelabelScreen(self.ctx.writer.dir, list(self.state.classes)))

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
        self._set("decision", W.decision_text(
            st.classes, st.keys, st.decision, st.t1 - st.since_t, st.truth, top_p))
        inner = max(30, self.query_one("#classes").size.width - 4)
        name_w = min(12, max(len(c) for c in st.classes))
        bar_w = max(5, (inner - name_w - 10) // 2)
        self.query_one("#classes", Static).update(W.class_bars(
            st.classes, st.keys, st.probs, st.smoothed, st.enter, width=bar_w, name_w=name_w), layout=False)
        width = max(20, self.query_one("#strip").size.width - 14)
        self._set("strip", W.strip_text(st.classes, st.keys, st.decisions, st.truths, width,
                                        st.hop_s))
        hw = max(12, self.query_one("#hears").size.width - 4)
        hears = W.heat_text(st.features, rows=5, cols=hw, color=not self.no_color)
        hears.append_text(W.level_text(st.level, st.clipped, st.quiet_s, width=max(4, hw - 17)))
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
        st, ctx = self.state, self.ctx
        src = ctx.engine.source.describe() if ctx else {}
        ring = ctx.engine.source.ring if ctx else None
        t = Text()
        name = src.get("device") or Path(str(src.get("file", ""))).name
        t.append(f"{src.get('kind', '')} {name}"[:26] + "\n")
        t.append(f"native {src.get('native_rate', '-')} Hz\n")
        if self.show_timings:
            t.append(f"compute {st.ms or 0:6.2f} ms\n")
            lat = "-" if st.latency is None else f"{st.latency:6.1f} ms"
            t.append(f"latency {lat}\n")
            t.append(f"CPU {self.cpu_meter() * 100:5.1f}%\n")
        else:
            t.append("timings hidden\n\n\n")
        if ctx and ctx.writer.error_text:
            t.append("DISK: writing stopped\n", style="bold reverse red")
        over = ring.overruns if ring else 0
        t.append(f"overruns {over}  gaps {st.gaps}",
                 style="bold reverse" if over or st.gaps else "")
        return t

    def _session(self) -> Text:
        st = self.state
        t = Text()
        snips = sum(self.ctx.capture.counts.values()) if self.ctx and self.ctx.capture else 0
        t.append(f"{st.t1:6.1f} s · {st.windows} win · {snips} snip\n")
        if st.with_truth:
            t.append(f"accuracy {st.correct / st.with_truth:6.1%} of {st.with_truth}\n", style="bold")
            t.append_text(W.confusion_text(st.classes, st.keys, st.cm))
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
