"""The composition root: the one place that turns a plan into a running chain.

`run_session(plan)` loads the cards, the truth, the source and the models, builds the
engine, the session writer and the capture policy, runs the session and closes it; `live`,
`replay`, `demo` and the terminal UI all go through it. `load_model`, `replay_file` and
`file_windows` give `score`, `bench` and the device tools the very same chain without a
session directory. Nothing else wires the chain's parts together.

Threads: `run_session` runs the engine on the caller's thread (the compute thread); the
source and the session writer start their own (see `engine`, `sources`, `session_writer`).
Bad input is found before the session directory exists; if the source still fails to start
(a device that cannot be opened), the empty directory is removed again.
"""

from __future__ import annotations

import gc
import os
import shutil
import signal
import sys
import threading
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from monitor import __version__
from monitor.assembly.engine import Engine, Observer, Source
from monitor.assembly.plan import FileInput, MicInput, ModelPlan, OutputPlan, SessionPlan
from monitor.base.errors import ScenemonError
from monitor.base.files import session_is_live
from monitor.base.records import record
from monitor.features.card import DecisionSettings, ModelCard, card_for_model
from monitor.inference.base import Runner
from monitor.inference.registry import load_runner
from monitor.session.capture import CapturePolicy
from monitor.session.clock import clock_now
from monitor.session.truth import LiveTruth, TruthTrack, load_truth
from monitor.session.writer import MAX_BACKLOG_BYTES, SessionWriter
from monitor.sound.windower import windows_of


@record(frozen=False)
class LoadedModel:
    """A model ready to run: its plan, its card and its runner.

    Attributes
    ----------
    plan : ModelPlan
        What was asked for.
    card : ModelCard
        Its card.
    runner : Runner
        The loaded model.
    profile : Profile or None
        Its unfamiliar-sound profile, when one lies beside it.
    """

    plan: ModelPlan
    card: ModelCard
    runner: Runner
    profile: Any = None  # its novelty profile, when one lies beside the model

    def describe(self) -> dict[str, Any]:
        """session.json's entry for this model."""
        return {"path": str(self.runner.path), "sha256": self.runner.sha256,
                "kind": self.runner.model_kind, "runtime": self.runner.runtime,
                "card": self.card.name}


def card_of(plan: ModelPlan) -> ModelCard:
    """The card of a planned model: its ``--card``, or the card beside the model file.

    Run first for every model, so that a bad card is refused before any model loads or any
    session directory exists.

    Parameters
    ----------
    plan : ModelPlan
        The model's path and, optionally, an explicit card path.

    Returns
    -------
    ModelCard

    Raises
    ------
    ModelError
        The model file does not exist.
    CardError
        No card beside the model and none given, or the card is invalid.
    """
    return card_for_model(plan.path, plan.card)


def load_model(plan: ModelPlan, card: ModelCard | None = None) -> LoadedModel:
    """Card (unless given) and runner of one model, checked against each other.

    Parameters
    ----------
    plan : ModelPlan
        The model file, its card and runtime.
    card : ModelCard, optional
        The card, when already read.

    Returns
    -------
    LoadedModel
        The card, runner and profile.
    """
    card = card or card_of(plan)
    runner = load_runner(plan.path, card, runtime=plan.runtime, trust_model=plan.trust)
    from monitor.inference.novelty import profile_beside

    return LoadedModel(plan, card, runner, profile_beside(plan.path, card))


def decision_settings(card: ModelCard, overrides: dict[str, Any]) -> DecisionSettings:
    """The card's ``[decision]`` table with the command line's values over it.

    Parameters
    ----------
    card : ModelCard
        The model's card.
    overrides : dict
        Settings given on the command line (None: not given).

    Returns
    -------
    DecisionSettings
        The settings used.

    Raises
    ------
    ScenemonError
        A combination the settings refuse.
    """
    try:
        return card.decision.replace(**overrides)
    except ValueError as exc:
        raise ScenemonError(f"decision flags: {exc}") from None


def open_source(src: FileInput | MicInput | Source, card: ModelCard) -> Source:
    """The file or microphone source for a card's rate and window (validated now); a
    `Source` already built (a test's, or an embedding program's) is used as it is.

    Parameters
    ----------
    src : FileInput, MicInput or Source
        What to listen to.
    card : ModelCard
        Model A's card (its rate and window).

    Returns
    -------
    Source
        The source, not started.
    """
    if not isinstance(src, (FileInput, MicInput)):
        return src
    if isinstance(src, FileInput):
        from monitor.sound.sources import FileSource

        return FileSource(src.path, model_rate=card.sample_rate,
                          window_samples=card.window_samples, realtime=src.realtime,
                          allow_upsample=src.allow_upsample, speed=src.speed)
    from monitor.sound.sources import MicSource

    return MicSource(src.device, model_rate=card.sample_rate,
                     window_samples=card.window_samples, latency=src.latency,
                     blocksize=src.blocksize, max_seconds=src.seconds,
                     reopen_tries=src.reopen_tries, reopen_wait_s=src.reopen_wait_s)


# --- where sessions go ---------------------------------------------------------------------
def demo_models() -> Path:
    """The folder of the demo models.

    ``models/`` of the current folder when it holds them (a checkout, as ``make demo`` runs
    it), else the copy installed with the package (a wheel ships them as
    ``monitor/demo/models``), else the checkout the package was installed from (an
    editable install).

    Returns
    -------
    Path
        The folder.
    """
    cwd = Path.cwd() / "models"
    if (cwd / "demo.toml").is_file():
        return cwd
    packaged = Path(__file__).resolve().parent.parent / "demo" / "models"
    if (packaged / "demo.toml").is_file():
        return packaged
    return Path(__file__).resolve().parent.parent.parent / "models"


def recordings_dir() -> Path:
    """Where sessions and the demo tour go without ``--out``: ``recordings/`` in the current
    folder (never inside the installed package or its checkout).

    Returns
    -------
    Path
        The folder (not made here).
    """
    return Path.cwd() / "recordings"


def unclosed_sessions(base: Path, limit: int = 2000) -> list[Path]:
    """Sessions under `base` that did not close cleanly (killed, power loss); sessions that
    another process is still writing are not among them.

    Parameters
    ----------
    base : Path
        A folder of sessions.
    limit : int
        Sessions looked at, at most.

    Returns
    -------
    list of Path
        The sessions without a summary.json and without a live writer.
    """
    try:
        dirs = sorted(p.parent for p in base.glob("*/session.json"))[-limit:]
    except OSError:
        return []
    return [d for d in dirs if not (d / "summary.json").exists() and not session_is_live(d)]


def session_dir(out: OutputPlan) -> Path:
    """The session directory: ``--out``, or a new ``recordings/<date>-<time>-<name>`` in
    the current folder.

    Parameters
    ----------
    out : OutputPlan
        Where and what the session writes.

    Returns
    -------
    Path
        The directory (not yet made).
    """
    if out.dir is not None:
        return Path(out.dir)
    base = recordings_dir()
    for d in unclosed_sessions(base):
        sys.stderr.write(f"scenemon: warning: {d} did not close cleanly; "
                         f"{invocation()} repair {d} makes it whole\n")
    stamp = time.strftime("%Y%m%d-%H%M%S")
    safe = "".join(c if c.isalnum() or c in "-_" else "-" for c in out.name)[:40] or "session"
    d = base / f"{stamp}-{safe}"
    k = 1
    while d.exists():
        k += 1
        d = base / f"{stamp}-{safe}-{k}"
    return d


def invocation() -> str:
    """How the user can run scenemon again from here: the bare name when it is on PATH, else
    the program's path as it was typed (``.venv/bin/scenemon``, or an absolute path), with
    ``..`` parts folded into a normalised absolute path (a venv outside the checkout).

    Returns
    -------
    str
        The command a person can type, without its arguments.
    """
    typed = sys.argv[0] if sys.argv and sys.argv[0] else None
    exe = Path(typed) if typed else None
    found = shutil.which("scenemon")
    if exe is not None and exe.name == "scenemon":
        if found and Path(found).resolve() == exe.resolve():
            return "scenemon"
        return typed if ".." not in exe.parts else os.path.normpath(os.path.abspath(typed))
    if found:
        return "scenemon"
    # `python -m monitor`: this interpreter, by its bare name only when that name finds it
    py = Path(sys.executable)
    on_path = shutil.which(py.name)
    # the paths themselves, links not followed: a venv's python is a link to the base
    # interpreter, which may also be the one on PATH, without the venv's packages
    if on_path and os.path.abspath(on_path) == os.path.abspath(py):
        return f"{py.name} -m monitor"
    rel = os.path.relpath(py)
    return f"{rel if not rel.startswith('..') else os.path.normpath(py)} -m monitor"


# --- one session -----------------------------------------------------------------------------
@record(frozen=False)
class SessionHandle:
    """What a front end (the UI) may use of a running session; every method is thread-safe.

    The UI never reads the engine, the writer, the capture policy or the source itself: it
    asks the handle (`now_s`, `can_capture`, `snippet_count`, `write_error`).

    Attributes
    ----------
    dir : Path
        The session directory.
    models : list of LoadedModel
        The models, A first.
    decisions : list of DecisionSettings
        Each model's decision settings.
    live_truth : LiveTruth or None
        The truth keys' record, when the truth is told live.
    source : dict
        session.json's ``source``.
    """

    dir: Path
    models: list[LoadedModel]
    decisions: list[DecisionSettings]
    _capture: CapturePolicy | None
    live_truth: LiveTruth | None
    source: dict[str, Any]
    _engine: Engine
    _writer: SessionWriter

    @property
    def card(self) -> ModelCard:
        """Model A's card (the session's rate, window and hop)."""
        return self.models[0].card

    @property
    def classes(self) -> tuple[str, ...]:
        """Model A's classes in output order (the ones the truth keys name)."""
        return self.card.classes

    def now_s(self) -> float:
        """The newest sample on the session clock (what the engine last published)."""
        return self._engine.published_samples / self.card.sample_rate

    def set_truth(self, label: str | None) -> None:
        """From the newest sample on, the truth is `label` (None: unknown)."""
        if self.live_truth is None:
            raise ScenemonError("the truth comes from the truth file in this session")
        self.live_truth.set(label, self.now_s())

    @property
    def can_capture(self) -> bool:
        """True when the session cuts snippets (capture is not off)."""
        return self._capture is not None

    def capture_now(self, label: str) -> dict | None:
        """Save the last seconds as a manual snippet labelled `label`."""
        return None if self._capture is None else self._capture.manual(label)

    def snippet_count(self) -> int:
        """Snippets cut so far (every reason)."""
        return 0 if self._capture is None else self._capture.total

    def write_error(self) -> str | None:
        """The session writer's failure in one sentence, or None while it writes."""
        return self._writer.error_text

    def stop_audio(self, reason: str) -> None:
        """Keep no more audio in this session (window lines go on); `reason` goes in the summary."""
        self._writer.stop_audio(reason)

    def audio_stopped(self) -> str | None:
        """Why the session's audio stopped (a full disk, `stop_audio`), or None."""
        return self._writer.audio_stopped

    def records_audio(self) -> bool:
        """True while the session writes audio."""
        return self._writer.write_audio and self._writer.audio_stopped is None


def describe_session(plan: SessionPlan, models: list[LoadedModel],
                     decisions: list[DecisionSettings], source: Source) -> dict[str, Any]:
    """session.json (the README's session directory): model A as a one-model session has it, plus ``models``.

    Parameters
    ----------
    plan : SessionPlan
        The session's plan.
    models : list of LoadedModel
        The models, A first.
    decisions : list of DecisionSettings
        Each model's settings.
    source : Source
        The source (its ``describe()``).

    Returns
    -------
    dict
        session.json's content.
    """
    a = models[0]
    meta = {
        "tool": "scenemon", "version": __version__,
        "started_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        # both clocks: the wall clock may step (a board syncing its time after boot); the
        # monotonic one does not, and is comparable within one boot
        "clock": clock_now(),
        "source": source.describe(),
        "classes": list(a.card.classes),
        "card": a.card.settings_dict(),
        "decision": decisions[0].to_dict(),
        "model": {k: v for k, v in a.describe().items() if k != "card"},
        "sample_rate": a.card.sample_rate,
        "truth_file": str(plan.truth) if plan.truth else None,
        "models": [{**m.describe(), "decision": d.to_dict(),
                    **({"classes": list(m.card.classes)} if i else {})}
                   for i, (m, d) in enumerate(zip(models, decisions))],
    }
    for m, entry in zip(models, meta["models"]):
        if m.profile is not None:
            entry["profile"] = m.profile.describe()
    return meta


def run_session(plan: SessionPlan, *, observers: Sequence[Observer] = (),
                stop: threading.Event | None = None,
                on_ready: Callable[[SessionHandle], None] | None = None,
                notices: bool = True,
                progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Validate everything, run one session, close it; return its summary.

    Parameters
    ----------
    plan : SessionPlan
    observers : sequence of Observer
        Extra observers after the session's own (writer, capture): printers, the UI bridge.
    stop : threading.Event, optional
        Set it to end the session cleanly (Ctrl-C sets it on the main thread).
    on_ready : callable, optional
        Called with the `SessionHandle` once everything is loaded, before the first window.
    notices : bool
        Say on stderr, once, when writing stops (a full disk); the UI shows it instead.
    progress : callable, optional
        Told what the session is doing before its first window ("loading the model").

    Raises
    ------
    ScenemonError
        Bad input (card, model, audio, truth, flags, output directory): nothing is left on disk.

    Returns
    -------
    dict
        summary.json's content.
    """
    say = progress or (lambda text: None)
    if plan.prepare is not None:
        say(plan.prepare_note)
        plan.prepare()
    say("loading the model …")
    if not plan.models:
        raise ScenemonError("no model given (--model M)")
    cards = [card_of(m) for m in plan.models]
    decisions = [decision_settings(c, plan.decision) for c in cards]
    truth: TruthTrack | None = None
    if plan.truth is not None:
        truth = load_truth(plan.truth, classes=cards[0].classes)
    live = LiveTruth(cards[0].classes) if plan.live_truth and truth is None else None
    source = open_source(plan.source, cards[0])
    models = [load_model(m, c) for m, c in zip(plan.models, cards)]
    engine = Engine([(m.card, m.runner) for m in models], source, decisions=decisions,
                    truth=truth.label_for if truth else live.label_for if live else None,
                    profiles=[m.profile for m in models], keep_features=plan.keep_features)
    meta = describe_session(plan, models, decisions, source)
    target = session_dir(plan.output)
    existed = target.exists()
    # a source that waits for the engine loses nothing by waiting for the disk too: its
    # writer queues 4 MB of audio (a minute at 16 kHz; enough to ride out a snippet's and
    # a sync's waits for the disk, 1 MB was not), a live one minutes of it
    writer = SessionWriter(target, meta, sample_rate=cards[0].sample_rate,
                           audio=plan.output.audio, segment_s=plan.output.segment_s,
                           truth_file=plan.truth,
                           max_backlog_bytes=MAX_BACKLOG_BYTES if source.realtime else 4 << 20)
    capture = None
    if plan.capture is not None:
        capture = CapturePolicy(plan.capture, classes=cards[0].classes,
                                sample_rate=cards[0].sample_rate, sink=writer.on_snippet,
                                two_models=len(models) > 1)
    engine.observers = [writer, *([capture] if capture else []), *observers]
    if notices:
        from monitor.assembly.observers import WriteWatch

        engine.observers.append(WriteWatch(writer))
    handle = SessionHandle(writer.dir, models, decisions, capture, live, source.describe(),
                           engine, writer)
    if on_ready is not None:
        on_ready(handle)
    stop = stop or threading.Event()
    old = signal.signal(signal.SIGINT, lambda *_: stop.set()) \
        if threading.current_thread() is threading.main_thread() else None
    # Start-up made many long-lived objects (modules, the model); freezing them keeps the
    # garbage collector's passes cheap while windows stream (a measurable share of live CPU).
    # No collection first: it cost 8 ms of start-up to free a little start-up garbage.
    gc.freeze()
    try:
        summary = engine.run(stop)
    except ScenemonError:
        writer.close(None)
        if engine.count == 0 and not existed:
            shutil.rmtree(writer.dir, ignore_errors=True)
        raise
    except BaseException:
        writer.close(None)
        raise
    finally:
        if old is not None:
            signal.signal(signal.SIGINT, old)
    summary["session"] = str(writer.dir)
    summary["clock_end"] = clock_now()
    if capture is not None:
        capture.close()
        summary["snippets"] = dict(capture.counts)
        summary["snippets_rate_limited"] = capture.limited
        if capture.lost:
            summary["snippets_lost"] = capture.lost
    spans = truth.spans if truth else live.spans(end_t=summary["duration_s"]) if live else None
    if spans is not None:
        spans = [s for s in spans if s.onset < summary["duration_s"] + 1e-9]
    writer.close(summary, spans)
    if writer.error is not None:
        summary["write_error"] = writer.error_text
    return summary


# --- the chain without a session: score, bench, device tools ----------------------------------
def replay_file(models: Sequence[LoadedModel], audio, *, truth: TruthTrack | None = None,
                observers: Sequence[Observer] = (), realtime: bool = False) -> dict[str, Any]:
    """One recording (a file, or a list of one recording's files) through the replay chain,
    without a session directory; returns the summary.

    Parameters
    ----------
    models : sequence of LoadedModel
        One model, or two (A/B).
    audio : Path or list of Path
        The recording.
    truth : TruthTrack, optional
        Its truth.
    observers : sequence of Observer
        Observers of the windows (a `Collector`).
    realtime : bool
        Pace the file at real time.

    Returns
    -------
    dict
        The summary.
    """
    from monitor.sound.sources import FileSource

    card = models[0].card
    source = FileSource(audio, model_rate=card.sample_rate, window_samples=card.window_samples,
                        realtime=realtime)
    engine = Engine([(m.card, m.runner) for m in models], source,
                    truth=truth.label_for if truth else None,
                    profiles=[m.profile for m in models], observers=observers)
    return engine.run()


def recording_files(path: Path) -> list[Path]:
    """The audio files of a recording: the file itself, or a session's audio segments.

    Parameters
    ----------
    path : Path
        An audio file or a session directory.

    Returns
    -------
    list of Path
        The audio files, in order.

    Raises
    ------
    ScenemonError
        A session without audio.
    """
    from monitor.base.files import audio_segments

    path = Path(path)
    if path.is_dir():
        segs = audio_segments(path)
        if not segs:
            raise ScenemonError(f"{path}: a session directory without audio.wav (recorded "
                                f"with --no-audio?)")
        return segs
    return [path]


def file_windows(path: Path, card: ModelCard) -> np.ndarray:
    """Every window of a recording (or a session's audio segments, joined) at the card's rate,
    resampled exactly as replay resamples; shape ``(n, window_samples)``.

    Parameters
    ----------
    path : Path
        An audio file or a session directory.
    card : ModelCard
        The card (rate, window, hop).

    Returns
    -------
    numpy.ndarray
        float32 windows.
    """
    from monitor.sound.sources import load_audio

    x = load_audio(recording_files(path), model_rate=card.sample_rate,
                   window_samples=card.window_samples)
    return windows_of(x, card.window_samples, card.hop_samples)
