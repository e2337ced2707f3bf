"""The textual app: live view, stage view, relabel view.

Threads: the UI thread runs textual. One worker thread ("session") runs
`assemble.run_session` (the compute thread, with its source and session-writer threads);
it posts `SessionReady` once with the session's `SessionHandle`, then `NewWindows` and
`Status` messages through `UIBridge` (post_message: never blocks). The UI redraws from its
own `ViewState` at most `redraw_hz` times a second, however fast windows arrive. Keys reach
the session only through the handle's thread-safe methods (`set_truth`, `capture_now`) and
the stop `Event`; the UI never reads the engine, the source or the writer.

The layout is computed from the terminal size (`layout_for`): at the minimum (80 x 24)
everything fits; extra room goes to the feature picture and the strip; below it the screen
says the size it needs. Notices go to the top line, never over a panel.
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
from textual.containers import Horizontal, Vertical
from textual.message import Message
from textual.reactive import var
from textual.theme import Theme
from textual.widgets import Footer, Static
from textual.worker import Worker, WorkerState

from monitor.base import palette as P
from monitor.base.errors import (
    ExitCode,
    ScenemonError,
    exit_code_for,
    one_sentence,
    summary_failure,
)
from monitor.base.native import screen_owns_the_terminal
from monitor.decisions.tally import SILENT_BELOW_DBFS, Tally
from monitor.ui import draw as D
from monitor.ui.bridge import NewWindows, SessionStatus, Status, UIBridge
from monitor.ui.screens import AskLabel, RelabelScreen, StageScreen

MIN_W, MIN_H = 80, 24
KEEP_HOPS = 1000  # strip history: wider than any terminal
# the live view's own actions (its key bindings): none of them works over the relabel view
LIVE_ACTIONS = frozenset({"truth", "capture", "model", "pause", "stage", "relabel",
                          "quit_session"})

# The framework's widgets (footer, tables) in our palette: greys and ALERT only, never a class
# colour (a class colour means that class, and the relabel table's rows hold class-coloured
# labels); the table's cursor row is light text on the rule grey
THEME = Theme(
    name="scenemon", primary=P.MUTED, secondary=P.MUTED, accent=P.TEXT, warning=P.ALERT,
    error=P.ALERT, success=P.TEXT, foreground=P.TEXT, background=P.GROUND, surface=P.PANEL,
    panel=P.PANEL, boost=P.LINE, dark=True,
    variables={"line": P.LINE, "muted": P.MUTED, "footer-key-foreground": P.TEXT,
               "footer-background": P.PANEL, "footer-description-foreground": P.MUTED,
               "block-cursor-background": P.LINE, "block-cursor-foreground": P.TEXT,
               "block-hover-background": P.PANEL})


@dataclass(frozen=True)
class Layout:
    """Outer sizes of the live view's parts for one terminal size (cells).

    Attributes
    ----------
    width, height : int
        The terminal's cells and lines.
    row1 : int
        Lines of the top row (decision, health, session panels).
    strip : int
        Lines of the decision strip.
    row2 : int
        Lines of the bottom row (class bars, feature picture).
    decision_w, health_w, session_w : int
        Widths of the top row's panels.
    """

    width: int
    height: int
    row1: int
    strip: int
    row2: int
    decision_w: int
    health_w: int = 22
    session_w: int = 30

    @property
    def fits(self) -> bool:
        """True when the live view fits: at least 80 x 24, and 9 lines for the second row."""
        return self.width >= MIN_W and self.height >= MIN_H and self.row2 >= 9

    @property
    def needed(self) -> tuple[int, int]:
        """The smallest terminal (width, height) that fits with the rows of this layout.

        80 wide, and tall enough for the top and footer lines, the first row, the strip and a
        second row of 9 lines.
        """
        return MIN_W, max(MIN_H, self.height - self.row2 + 9)

    # inner sizes: a round border and one cell of padding left and right
    @property
    def classes_inner(self) -> int:
        """Inner width of the classes panel: what the first row leaves beside the decision panel."""
        return self.width - self.decision_w - 4

    @property
    def hears_inner(self) -> tuple[int, int]:
        """Inner (width, height) of the "what it hears" panel, beside health and session."""
        return self.width - self.health_w - self.session_w - 4, self.row2 - 2


def layout_for(width: int, height: int, n_classes: int, two: bool) -> Layout:
    """The live view's layout (see module docstring).

    Parameters
    ----------
    width, height : int
        The terminal's cells and lines.
    n_classes : int
        The model's classes.
    two : bool
        Two models (A/B).

    Returns
    -------
    Layout
        The sizes.
    """
    row1 = max(6, n_classes + 2)
    strip = 6 if two else 5
    row2 = height - 2 - row1 - strip
    decision_w = 40 + min(10, max(0, width - MIN_W) // 4)
    return Layout(width, height, row1, strip, row2, decision_w)


@dataclass
class SessionHooks:
    """What the UI hands the session function (`start(hooks) -> summary`).

    Attributes
    ----------
    bridge : UIBridge
        The observer that posts results to the UI.
    stop : threading.Event
        Set to end the session.
    ready : callable
        Called once with the `SessionHandle`.
    say : callable
        Shows a line while the session prepares.
    """

    bridge: UIBridge
    stop: threading.Event
    ready: Callable[[Any], None]  # called with the assemble.SessionHandle
    say: Callable[[str], None] = lambda text: None  # what the session is doing, before it runs


class SessionReady(Message):
    """Posted once by the session worker with its `SessionHandle`, before the first window.

    Parameters
    ----------
    handle : SessionHandle
        The running session.
    """

    def __init__(self, handle) -> None:
        super().__init__()
        self.handle = handle


@dataclass
class Lane:
    """One model's part of what the UI shows (UI thread only).

    Attributes
    ----------
    decision : str or None
        The model's decision.
    since_t : float
        Session seconds since the decision was set.
    probs, smoothed : numpy.ndarray or None
        The newest window's raw and smoothed probabilities.
    unfamiliar : bool
        The newest window is unfamiliar.
    unfamiliar_windows : int
        Windows marked unfamiliar so far.
    decisions : collections.deque
        Recent decisions, one per hop, for the strip.
    tally : Tally or None
        The running counts.
    """

    decision: str | None = None
    since_t: float = 0.0
    probs: Any = None
    smoothed: Any = None
    unfamiliar: bool = False
    unfamiliar_windows: int = 0
    decisions: deque = field(default_factory=lambda: deque(maxlen=KEEP_HOPS))
    tally: Tally | None = None

    def add(self, r) -> None:
        """Take this model's result of the newest window (UI thread).

        The decision and since when it holds, the newest finite probabilities (a faulty window
        keeps the previous ones), the unfamiliar flag, the strip's history and the tally.
        """
        if self.decision != r.decision:
            self.decision, self.since_t = r.decision, r.t1
        if r.probs is not None:
            self.probs, self.smoothed = r.probs, r.smoothed
        self.unfamiliar = bool(r.unfamiliar)
        self.unfamiliar_windows += int(self.unfamiliar)
        self.decisions.append(r.decision)
        self.tally.add(r.t0, r.t1, r.decision, r.truth, r.gap)

    def view(self, name: str, t1: float) -> D.ModelView:
        """What the decision panel shows of this model at session time `t1`.

        The decision, how long it has held, the top smoothed probability, the accuracy so far
        (None without truth) and the unfamiliar flag.
        """
        top = float(max(self.smoothed)) if self.smoothed is not None else 0.0
        acc = self.tally.accuracy if self.tally.with_truth else None
        return D.ModelView(name, self.decision, t1 - self.since_t, top, acc, self.unfamiliar)


@dataclass
class ViewState:
    """The UI's own copy of what it shows (UI thread only).

    Attributes
    ----------
    classes : tuple or None
        Model A's classes (None before the session is ready).
    keys : dict
        Each class's letter.
    hop_s, enter : float
        The hop and the decision threshold.
    t1 : float
        The newest window's end.
    features : numpy.ndarray or None
        The newest window's features.
    level, clipped, quiet_s : float
        The newest level, clipped share and seconds of silence.
    truth : str or None
        The truth now.
    truths : collections.deque
        Recent truths, one per hop.
    lanes : list of Lane
        One per model.
    agree : int
        Windows where A and B decided alike.
    profiled : bool
        A profile gives unfamiliar flags.
    status : SessionStatus or None
        The newest health figures.
    """

    classes: tuple | None = None
    keys: dict = field(default_factory=dict)
    hop_s: float = 0.5
    enter: float = 0.6
    t1: float = 0.0
    features: Any = None
    level: float = -160.0
    clipped: float = 0.0
    quiet_s: float = 0.0
    truth: str | None = None
    truths: deque = field(default_factory=lambda: deque(maxlen=KEEP_HOPS))
    lanes: list[Lane] = field(default_factory=list)
    agree: int = 0
    profiled: bool = False  # a profile gives unfamiliar flags
    status: SessionStatus | None = None

    def start(self, classes, hop_s: float, enter: float, two: bool) -> None:
        """Set up for a session: classes and their keys, hop, enter threshold, a lane per model."""
        self.classes, self.hop_s, self.enter = tuple(classes), hop_s, enter
        self.keys = D.class_keys(self.classes)
        self.lanes = [Lane(tally=Tally(self.classes, hop_s=hop_s)) for _ in range(2 if two else 1)]

    # model A's figures under their old names (the stage view and the tests read them)
    @property
    def decision(self) -> str | None:
        """Model A's current decision (None before a session and while undecided)."""
        return self.lanes[0].decision if self.lanes else None

    @property
    def smoothed(self):
        """Model A's newest smoothed probabilities (None before the first)."""
        return self.lanes[0].smoothed if self.lanes else None

    @property
    def decisions(self) -> deque:
        """Model A's recent decisions, one per window (the strip's row)."""
        return self.lanes[0].decisions

    @property
    def tally(self) -> Tally | None:
        """Model A's running tally (None before a session)."""
        return self.lanes[0].tally if self.lanes else None

    @property
    def two(self) -> bool:
        """True in an A/B session (two lanes)."""
        return len(self.lanes) > 1

    @property
    def agreement(self) -> float | None:
        """Share of windows where A and B decided alike; None with one model or before a window."""
        n = self.lanes[0].tally.windows if self.lanes else 0
        return self.agree / n if n and self.two else None

    def add(self, r) -> None:
        """Take the newest window's result (model A's, B's in ``others``); UI thread.

        Level, truth, features and each lane follow it; ``quiet_s`` grows by a hop for each window
        below the silence level and starts again at 0 after a louder one.
        """
        self.t1 = r.t1
        self.features = r.features
        self.level, self.clipped = r.level_dbfs, r.clipped
        self.quiet_s = self.quiet_s + self.hop_s if r.level_dbfs < SILENT_BELOW_DBFS else 0.0
        self.truth = r.truth
        self.truths.append(r.truth)
        self.profiled = self.profiled or r.novelty is not None
        self.lanes[0].add(r)
        if r.others and self.two:
            b = r.others[0]
            self.lanes[1].add(b)
            self.agree += int(b.decision == r.decision)


class CpuMeter:
    """This process's CPU use as a share of one core, over the last few seconds."""

    def __init__(self) -> None:
        self.samples: deque = deque(maxlen=30)

    def __call__(self) -> float:
        self.samples.append((time.monotonic(), time.process_time()))
        (w0, c0), (w1, c1) = self.samples[0], self.samples[-1]
        return (c1 - c0) / (w1 - w0) if w1 > w0 else 0.0


def too_small_text(width: int, height: int, need: tuple[int, int]) -> Text:
    """The sentence shown instead of the live view while the terminal is smaller than `need`.

    Parameters
    ----------
    width, height : int
        The terminal's size.
    need : tuple of int
        The size the view needs.

    Returns
    -------
    rich.text.Text
        The sentence.
    """
    return Text(f"scenemon needs a terminal of at least {need[0]} x {need[1]} characters; "
                f"this one is {width} x {height}. Make the window larger or the font "
                f"smaller.", style=f"bold {P.TEXT}")


class MonitorApp(App):
    """The live view (see module docstring).

    Parameters
    ----------
    start : callable
        The session function, run on a worker thread (`session_starter`).
    heading : str
        The title line.
    redraw_hz : float
        Redraws per second at most.
    show_timings : bool
        Show compute and latency figures.
    cpu_meter : callable, optional
        The process's CPU share (a test's fixed one).
    exit_when_done : bool
        Leave the app when the session ends.
    """

    CSS_PATH = "app.tcss"
    TITLE = "scenemon"
    ENABLE_COMMAND_PALETTE = False
    BINDINGS = [
        Binding("1", "truth(1)", "truth", id="truth"),
        *[Binding(str(k), f"truth({k})", f"truth {k}", show=False, id=f"truth_{k}")
          for k in range(2, 10)],
        Binding("0", "truth(0)", "unknown", id="truth_unknown"),
        Binding("c", "capture", "capture", id="capture"),
        Binding("m", "model", "A/B table", id="model"),
        Binding("p", "pause", "pause", id="pause"),
        Binding("s", "stage", "stage", id="stage"),
        Binding("r", "relabel", "relabel", id="relabel"),
        Binding("q", "quit_session", "quit", id="quit"),
    ]

    paused: var[bool] = var(False)
    """Display frozen; capture and the session go on."""
    shown_model: var[int] = var(0)
    """Whose confusion table the session panel shows (0: A, 1: B)."""

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
        self.key_truth: str | None = None  # what this UI last set with a key
        self.summary: dict | None = None
        self.error: BaseException | None = None
        self.finished = False
        self.quitting = False
        self.dirty = True
        self.message = "starting …"
        self.notice_text = ""
        self.notice_until = 0.0
        self.redraws = 0
        self.layout: Layout | None = None
        self.spec: D.PictureSpec | None = None
        self._health_t = 0.0
        self._shown: dict[str, Text] = {}
        self.register_theme(THEME)
        self.theme = "scenemon"

    # --- layout -----------------------------------------------------------------------------
    def compose(self) -> ComposeResult:
        """The live view's widgets: top line, two rows of panels around the strip, footer.

        The first row holds decision and classes, the second what it hears, health and session; a
        too-small notice takes the place of all of them when the terminal is too small.
        """
        yield Static(id="top")
        with Vertical(id="main"):
            with Horizontal(id="row1"):
                yield Static(id="decision", classes="panel")
                yield Static(id="classes", classes="panel")
            yield Static(id="strip", classes="panel")
            with Horizontal(id="row2"):
                yield Static(id="hears", classes="panel")
                yield Static(id="health", classes="panel")
                yield Static(id="session", classes="panel")
        yield Static(id="too_small")
        yield Footer()

    def on_mount(self) -> None:
        """Title the panels, lay them out, start the redraw timer and the session worker."""
        titles = {"decision": "decision", "classes": "classes", "strip": "recent",
                  "hears": "what it hears", "health": "health", "session": "session"}
        for wid, title in titles.items():
            self.query_one(f"#{wid}").border_title = title
        self.apply_layout(self.size.width, self.size.height)
        self.set_interval(1.0 / self.redraw_hz, self.redraw)
        self.run_worker_session()
        self.redraw(force=True)

    def on_resize(self, event) -> None:
        """Lay the view out again for the new size and redraw at once."""
        self.apply_layout(event.size.width, event.size.height)
        self.redraw(force=True)

    @property
    def mode_two(self) -> bool:
        """True once an A/B session is running (two models in the handle)."""
        return self.handle is not None and len(self.handle.models) > 1

    def apply_layout(self, width: int | None = None, height: int | None = None) -> None:
        """Size the panels for `width` x `height`, or show the too-small notice instead.

        Without a size, the last layout's size is used (a new session may bring more classes).
        """
        n = len(self.state.classes) if self.state.classes else 4
        if width is None or height is None:
            width, height = (self.layout.width, self.layout.height) if self.layout else \
                (self.size.width, self.size.height)
        lay = self.layout = layout_for(width, height, n, self.mode_two)
        main, small = self.query_one("#main"), self.query_one("#too_small", Static)
        main.display = lay.fits
        small.display = not lay.fits
        if not lay.fits:
            small.update(too_small_text(lay.width, lay.height, lay.needed))
            return
        self.query_one("#row1").styles.height = lay.row1
        self.query_one("#strip").styles.height = lay.strip
        self.query_one("#decision").styles.width = lay.decision_w
        self.query_one("#health").styles.width = lay.health_w
        self.query_one("#session").styles.width = lay.session_w
        self._shown.clear()

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
        """The "session" worker: run the session function on its own thread (the compute thread).

        Its ready callback attaches the handle to the bridge before posting `SessionReady`, so the
        bridge's first status already has the counts; the summary it returns is picked up by
        `on_worker_state_changed`.
        """
        def ready(handle) -> None:
            self.bridge.attach(handle)
            self.post_message(SessionReady(handle))

        return self.start_session(SessionHooks(self.bridge, self.stop_event, ready, self.say))

    def on_session_ready(self, message: SessionReady) -> None:
        """Set the view up for the session that has just become ready.

        Classes, hop and enter threshold, the feature picture's axis, and the panel titles for one
        model or two.
        """
        h = self.handle = message.handle
        self.state.start(h.classes, h.card.hop_s, h.decisions[0].enter, len(h.models) > 1)
        self.spec = D.picture_spec(h.card)
        self.message = "running"
        self.query_one("#classes").border_title = (
            "smoothed p · A │ B" if self.mode_two else "classes · raw │ smoothed")
        self.query_one("#classes").border_subtitle = f"│ enter {self.state.enter:g}"
        hears = self.query_one("#hears")
        hears.border_title = "what it hears" + (" (kHz)" if self.spec.centres_hz else "")
        hears.border_subtitle = f"{self.spec.what} · {h.card.window_s:g} s"
        self.apply_layout()
        self.refresh_bindings()
        self.dirty = True

    def on_new_windows(self, message: NewWindows) -> None:
        """Drain every result waiting in the bridge into the view state (UI thread).

        Before `SessionReady` the results stay in the bridge; the redraw follows at the next tick.
        """
        if self.state.classes is None:
            return
        for r in self.bridge.drain():
            self.state.add(r)
        self.dirty = True

    def on_status(self, message: Status) -> None:
        """Keep the newest `SessionStatus` for the health and session panels.

        The handler of the bridge's `Status` message, on the UI thread; not the engine observer
        hook of the same name.
        """
        self.state.status = message.status

    def on_worker_state_changed(self, event: Worker.StateChanged) -> None:
        """React to the end of the session worker.

        On success keep the summary, drain the last windows and show whether it failed; on an
        error leave the app with that error's exit code. After a success the app exits when q was
        pressed or when it was told to end with the session (`exit_when_done`).
        """
        if event.worker.name != "session":
            return
        if event.state == WorkerState.SUCCESS:
            self.finished = True
            self.summary = event.worker.result
            self.on_new_windows(NewWindows())
            fail = summary_failure(self.summary)
            self.message = fail or "session closed; q quits"
            self.refresh_bindings()
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
        """The app's exit code: the error's, else FAILURE when the summary reports one, else OK."""
        if self.error is not None:
            return exit_code_for(self.error)
        return ExitCode.FAILURE if summary_failure(self.summary) else ExitCode.OK

    # --- keys ------------------------------------------------------------------------------------
    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        """Only the keys that work now are offered (and shown in the footer).

        Over the relabel view (and its label question) none of the live view's keys works:
        the view's own keys and its back key are all its footer shows, and a digit meant for
        the table never sets the live truth.
        """
        if action in LIVE_ACTIONS and any(isinstance(s, RelabelScreen) for s in self.screen_stack):
            return False
        h = self.handle
        running = h is not None and not self.finished
        if action == "truth":
            k = int(parameters[0]) if parameters else 0
            return running and h.live_truth is not None and k <= len(self.state.classes)
        if action == "capture":
            return running and h.can_capture
        if action == "model":
            return self.mode_two
        if action == "relabel":
            return h is not None
        return True

    def get_key_display(self, binding: Binding) -> str:
        """The footer's key: "1-N" for the truth keys (N classes, at most 9), else textual's own."""
        if binding.id == "truth" and self.state.classes:
            n = min(len(self.state.classes), 9)
            return "1" if n == 1 else f"1-{n}"
        return super().get_key_display(binding)

    def notice(self, text: str, seconds: float = 3.0) -> None:
        """Say something on the top line for a few seconds (it covers no panel)."""
        self.notice_text, self.notice_until = text, time.monotonic() + seconds
        self.dirty = True

    def _now(self) -> float:
        return self.handle.now_s()

    def action_truth(self, k: int) -> None:
        """Keys 1-9: from the newest sample on the truth is class `k` (1-based); 0: unknown.

        Only with live truth and while the session runs; a key beyond the classes does nothing.
        """
        st = self.state
        if self.handle is None or self.finished or self.handle.live_truth is None:
            return
        if k == 0:
            label = None
        elif k <= len(st.classes):
            label = st.classes[k - 1]
        else:
            return
        self.handle.set_truth(label)
        self.key_truth = label
        self.notice(f"truth: {label or 'unknown'} from {D.clock(self._now())}", 2.0)

    def action_capture(self) -> None:
        """Key c: save the last seconds as a manual snippet labelled with the truth now.

        The truth is the one last set with a key (live truth) or the truth file's; without one the
        label is asked for first.
        """
        if self.handle is None or self.finished or not self.handle.can_capture:
            return
        # the truth told now, by this terminal's keys or the presenter page's buttons
        label = self.handle.live_truth.current if self.handle.live_truth is not None \
            else self.state.truth
        if label is not None:
            self._capture(label)
            return
        self.push_screen(AskLabel(self.state.classes, "No truth is set. What is this sound?"),
                         lambda lab: lab is not None and self._capture(lab))

    def _capture(self, label: str) -> None:
        snip = self.handle.capture_now(label)
        if snip is None:
            self.notice("nothing to capture yet")
        else:
            self.notice(f"captured {snip['t1'] - snip['t0']:.1f} s as {label}")

    def action_model(self) -> None:
        """Key m: show the other model's figures in the session panel (A/B sessions only)."""
        if self.mode_two:
            self.shown_model = 1 - self.shown_model
            self.dirty = True

    def action_pause(self) -> None:
        """Key p: freeze or resume the display; the session and capture go on."""
        self.paused = not self.paused
        self.dirty = True
        self.redraw(force=True)

    def action_stage(self) -> None:
        """Key s: open the stage view, or close it when it is showing."""
        if isinstance(self.screen, StageScreen):
            self.pop_screen()
        else:
            self.push_screen(StageScreen())

    def action_relabel(self) -> None:
        """Key r: open the relabel view of this session's snippets (once the session exists)."""
        if self.handle is None:
            return
        self.push_screen(RelabelScreen(self.handle.dir, list(self.state.classes)))

    def action_quit_session(self) -> None:
        """Key q: stop the session cleanly; the app exits once the worker has closed it.

        When the session has already ended, the app exits at once.
        """
        self.quitting = True
        self.stop_event.set()
        self.message = "closing the session …"
        self.redraw(force=True)
        if self.finished:
            self.exit(self.return_code_for())

    # --- drawing -----------------------------------------------------------------------------
    @property
    def truth_mode(self) -> str:
        """"keys" (the operator gives the truth) or "file" (the session has a truth file: the
        UI asks for live truth whenever no file is given)."""
        h = self.handle
        if h is None:
            return "none"
        return "keys" if h.live_truth is not None else "file"

    def _top(self) -> Text:
        w = self.layout.width if self.layout else self.size.width
        now = time.monotonic()
        right = self.notice_text if now < self.notice_until else self.message
        if self.paused:
            right = "DISPLAY PAUSED (p resumes)"
        left = Text(no_wrap=True, overflow="crop")
        left.append(" scenemon ", style=f"bold {P.GROUND} on {P.TEXT}")
        left.append(" " + D.fit(self.heading, max(10, w - len(right) - 16)), style=P.TEXT)
        pad = max(1, w - left.cell_len - len(right) - 1)
        left.append(" " * pad)
        style = f"bold reverse {P.TEXT}" if self.paused else \
            f"bold {P.TEXT}" if now < self.notice_until else P.MUTED
        left.append(D.fit(right, max(0, w - left.cell_len - 1)), style=style)
        return left

    def redraw(self, force: bool = False) -> None:
        """Redraw the panels from the view state (the timer calls it `redraw_hz` times a second).

        Unless something changed or `force` is given, only an expired notice is cleared. A paused
        display is drawn only when forced, the health panel at most once a second, and a panel
        whose text did not change is not updated.
        """
        if not (self.dirty or force):
            if self.notice_text and time.monotonic() >= self.notice_until:
                self.notice_text = ""
                self._set("top", self._top())
            return
        if self.paused and not force:
            return
        self.dirty = False
        self.redraws += 1
        st = self.state
        self._set("top", self._top())
        if isinstance(self.screen, StageScreen):
            self.screen.refresh_view()
        lay = self.layout
        if lay is None or not lay.fits:
            return
        if st.classes is None:
            self._set("decision", Text(self.message, style=f"bold {P.TEXT}"))
            return
        color = not self.no_color
        inner_d = lay.decision_w - 4
        names = ("A", "B") if st.two else ("",)
        views = [lane.view(n, st.t1) for lane, n in zip(st.lanes, names)]
        self._set("decision", D.decision_text(st.classes, st.keys, views, st.truth,
                                              truth_mode=self.truth_mode,
                                              agreement=st.agreement, width=inner_d))
        if st.two:
            cols = [(ln.smoothed, True, True) for ln in st.lanes]
        else:
            cols = [(st.lanes[0].probs, False, False), (st.lanes[0].smoothed, True, True)]
        self._set("classes", D.class_bars(st.classes, st.keys, cols, st.enter,
                                          width=lay.classes_inner))
        strip_w = lay.width - 4
        rows = [("A", st.lanes[0].decisions), ("B", st.lanes[1].decisions)] if st.two else \
            [("decision", st.lanes[0].decisions)]
        rows.append(("truth", st.truths))
        strip = self.query_one("#strip")
        strip.border_title = D.strip_title(strip_w, st.hop_s)
        self._set("strip", D.strip_text(st.classes, st.keys, rows, strip_w, st.hop_s))
        hw, hh = lay.hears_inner
        hears = D.heat_text(st.features, self.spec, max(1, hh - 2), hw - D.AXIS_W, color=color)
        hears.append("\n")
        hears.append_text(D.scale_text(self.spec, hw, color=color))
        hears.append("\n")
        hears.append_text(D.level_text(st.level, st.clipped, st.quiet_s, hw))
        self._set("hears", hears)
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
        eng = status.engine if status else None
        name = src.get("device") or Path(str(src.get("file", ""))).name
        return D.health_text(
            source=f"{src.get('origin', '')} {name}", rate=src.get("native_rate", "-"),
            ms=eng.ms if eng else None, latency_ms=eng.latency_ms if eng else None,
            cpu=self.cpu_meter(), overruns=eng.overruns if eng else 0,
            gaps=eng.gap_windows if eng else 0,
            write_error=bool(status is not None and status.write_error),
            width=self.layout.health_w - 4, show_timings=self.show_timings,
            model_faults=eng.model_faults if eng else 0, height=self.layout.row2 - 2)

    def _session(self) -> Text:
        st = self.state
        k = self.shown_model if st.two else 0
        lay = self.layout
        session = self.query_one("#session")
        session.border_title = f"session · model {'AB'[k]}" if st.two else "session"
        return D.session_text(
            t_s=st.t1, windows=st.tally.windows,
            snippets=st.status.snippets if st.status else 0, tally=st.lanes[k].tally,
            classes=st.classes, keys=st.keys, width=lay.session_w - 4, height=lay.row2 - 2,
            truth_mode=self.truth_mode, which="AB"[k] if st.two else "",
            unfamiliar=st.lanes[k].unfamiliar_windows if st.profiled else None,
            color=not self.no_color)

    def on_unmount(self) -> None:
        """Set the stop event, so that the session ends however the app is closed."""
        self.stop_event.set()


class RelabelApp(App):
    """`scenemon relabel SESSION`: the relabel view on its own.

    Parameters
    ----------
    session_dir : Path
        The session.
    classes : list of str
        Its classes.
    """

    CSS_PATH = "app.tcss"
    TITLE = "scenemon relabel"
    ENABLE_COMMAND_PALETTE = False

    def __init__(self, session_dir: Path, classes: list[str]) -> None:
        super().__init__()
        self.session_dir, self.class_names = Path(session_dir), list(classes)
        self.register_theme(THEME)
        self.theme = "scenemon"

    def on_mount(self) -> None:
        """Open the relabel view as the app's only screen (its back key leaves the app)."""
        self.push_screen(RelabelScreen(self.session_dir, self.class_names, standalone=True))


def session_starter(plan, *, observers=(), on_ready=None) -> Callable[[SessionHooks], dict]:
    """The function the UI's session worker runs: `assemble.run_session` with the UI's
    observer, stop event and ready callback.

    Parameters
    ----------
    plan : SessionPlan
        The session.
    observers : sequence of Observer
        More observers after the UI's bridge (the stage server's feed).
    on_ready : callable, optional
        Given the `SessionHandle` after the UI's own ready callback.

    Returns
    -------
    callable
        ``start(hooks) -> summary``.
    """
    from monitor.assembly.assemble import run_session

    plan = dataclasses.replace(plan, keep_features=True, live_truth=True)

    def start(hooks: SessionHooks) -> dict:
        def ready(handle) -> None:
            hooks.ready(handle)
            if on_ready is not None:
                on_ready(handle)

        return run_session(plan, observers=[hooks.bridge, *observers], stop=hooks.stop,
                           on_ready=ready, notices=False, progress=hooks.say)

    return start


def run_ui(plan, *, heading: str, observers=(), on_ready=None) -> int:
    """The terminal UI around one session; returns the exit code.

    Parameters
    ----------
    plan : SessionPlan
        The session.
    heading : str
        The title line.
    observers : sequence of Observer
        More observers of the session (the stage server's feed).
    on_ready : callable, optional
        Given the `SessionHandle` before the first window, after the UI has it.

    Returns
    -------
    int
        The exit code.
    """
    import sys

    from monitor.assembly.plan import MicInput
    from monitor.assembly.run import finish

    timed = isinstance(plan.source, MicInput) and plan.source.seconds is not None
    with screen_owns_the_terminal():
        app = MonitorApp(session_starter(plan, observers=observers, on_ready=on_ready),
                         heading=heading, exit_when_done=timed)
        code = app.run()
    if app.error is not None:
        sys.stderr.write(f"scenemon: {one_sentence(app.error)}\n")
        return exit_code_for(app.error)
    if app.return_code:  # the UI itself failed (textual has printed what went wrong)
        return ExitCode.FAILURE
    if app.summary is not None:
        return finish(app.summary)
    return code if isinstance(code, int) else ExitCode.OK


def run_relabel(session: Path, *, interactive: bool) -> int:
    """`scenemon relabel SESSION`: the relabel view; it needs a terminal.

    Parameters
    ----------
    session : Path
        The session directory.
    interactive : bool
        stdin and stdout are a terminal.

    Returns
    -------
    int
        The exit code.

    Raises
    ------
    ScenemonError
        A session without snippets, or no terminal.
    """
    from monitor.session.reader import load_session

    s = load_session(session)
    if not (s.dir / "snippets").is_dir():
        raise ScenemonError(f"{s.dir}: the session has no snippets to relabel")
    if not interactive:
        raise ScenemonError(f"{s.dir}: relabel is an interactive view and needs a terminal "
                            f"(stdin and stdout are not one)")
    with screen_owns_the_terminal():
        RelabelApp(s.dir, s.classes).run()
    return ExitCode.OK
