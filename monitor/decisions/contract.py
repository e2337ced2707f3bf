"""The observer contract: what the engine publishes and what it reads from.

`WindowResult` (one window's outcome, frozen), `EngineStatus` (the snapshot after each
batch), the `Observer` protocol with its no-op base `ObserverBase`, and the `Source`
protocol of a producer that owns the ring the engine reads. The engine
(``monitor.assembly.engine``) uses these; the observers (session writer, capture, printing
observers, the UI bridge) and the sources implement them without importing the engine.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from monitor.base.files import dumps
from monitor.sound.ringbuffer import RingBuffer

HOOKS = ("on_audio", "on_window", "on_status")  # the `Observer` protocol's methods
NON_FINITE = "non-finite figure"  # the fault of a line whose figure JSON cannot carry


_QUOTED: dict[str, str] = {}  # JSON text of the labels seen (classes, truth labels, faults)


def _quoted(text: str | None) -> str | None:
    """JSON text of a label (``null`` for None), remembered for the first 1,024 labels; None
    for a value that is not a string."""
    if text is None:
        return "null"
    if type(text) is not str:
        return None
    q = _QUOTED.get(text)
    if q is None:
        q = dumps(text)
        if len(_QUOTED) < 1024:
            _QUOTED[text] = q
    return q


def _finite_only(value: Any) -> Any:
    """`value` with every float that is not finite replaced by None (JSON's null)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite_only(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite_only(v) for v in value]
    return value


@dataclass(frozen=True, slots=True)
class WindowResult:
    """One window's outcome for one model; immutable once published to observers.

    ``probs`` and ``smoothed`` are None when the model gave a non-finite output (``fault``
    says so); the decision then stays what it was.

    Attributes
    ----------
    i : int
        The window's index in the session.
    start : int
        Its first sample on the session clock.
    t0, t1 : float
        Its start and end in seconds from the session start.
    probs, smoothed : numpy.ndarray or None
        Raw and smoothed probabilities in class order.
    top : str or None
        The raw top class.
    decision : str or None
        The decision after smoothing and hysteresis (None: undecided).
    truth : str or None
        The truth label covering at least half of the window.
    level_dbfs : float
        Its level (AES17).
    clipped : float
        Share of full-scale samples.
    gap : int
        Samples lost just before it.
    ms : float
        Front end and model time per window of its batch.
    latency_ms : float or None
        From the newest sample's arrival to the decision (live only).
    features : numpy.ndarray or None
        The model input, kept only when asked for.
    novelty : float or None
        Distance from the model's profile, when it has one.
    unfamiliar : bool or None
        Whether the sound counts as unfamiliar.
    fault : str or None
        What was not finite, when something was.
    model : int
        0 for model A, 1 for model B.
    others : tuple of WindowResult
        Model B's result of the same window.
    """

    i: int
    start: int
    t0: float
    t1: float
    probs: np.ndarray | None
    smoothed: np.ndarray | None
    top: str | None
    decision: str | None
    truth: str | None
    level_dbfs: float
    clipped: float
    gap: int
    ms: float
    latency_ms: float | None = None
    features: np.ndarray | None = None
    novelty: float | None = None
    unfamiliar: bool | None = None
    fault: str | None = None
    model: int = 0  # 0: model A, 1: model B
    others: tuple[WindowResult, ...] = ()  # model B's result of the same window
    _record: dict | None = field(default=None, repr=False, compare=False)
    _line: str | None = field(default=None, repr=False, compare=False)

    def record(self) -> dict[str, Any]:
        """The `windows.jsonl` fields (the README's session directory); made once, shared by every reader (the
        writer and a printer need the same dict; nobody changes it)."""
        if self._record is None:
            object.__setattr__(self, "_record", self._make_record())
        return self._record

    def json_line(self) -> str:
        """`record()` as one JSON line with its newline (made once).

        The usual line is put together directly (`_quick_line`), a few times faster than
        building the record and encoding it, with the very text `dumps(record())` gives (a
        property test compares them); anything unusual goes through `dumps`.
        """
        if self._line is None:
            quick = self._quick_line() if self._record is None else None
            if quick is not None:
                object.__setattr__(self, "_line", quick)
                return quick
            try:
                line = dumps(self.record())
            except ValueError:  # NaN or infinity: written as null and flagged, never left out
                rec = _finite_only(self.record())
                rec.setdefault("fault", NON_FINITE)
                line = dumps(rec)
            object.__setattr__(self, "_line", line + "\n")
        return self._line

    def _quick_line(self) -> str | None:
        """`json_line`'s text for a line of plain finite numbers and known strings, else None."""
        floats = (self.t0, self.t1, self.level_dbfs, self.clipped, self.ms)
        if not all(type(v) is float and math.isfinite(v) for v in floats):
            return None
        if type(self.i) is not int or type(self.gap) is not int:
            return None
        vectors = []
        for v in (self.probs, self.smoothed):
            if v is None:
                vectors.append("null")
                continue
            values = v.tolist()
            if not all(type(x) is float and math.isfinite(x) for x in values):
                return None
            vectors.append("[" + ", ".join([repr(round(x, 6)) for x in values]) + "]")
        texts = []
        for t in (self.top, self.decision, self.truth):
            q = _quoted(t)
            if q is None:
                return None
            texts.append(q)
        tail = ""
        if self.latency_ms is not None:
            if type(self.latency_ms) is not float or not math.isfinite(self.latency_ms):
                return None
            tail += f', "latency_ms": {round(self.latency_ms, 2)!r}'
        if self.novelty is not None:
            if type(self.novelty) is not float or not math.isfinite(self.novelty):
                return None
            tail += (f', "novelty": {round(self.novelty, 4)!r}, "unfamiliar": '
                     f'{"true" if self.unfamiliar else "false"}')
        if self.fault is not None:
            q = _quoted(self.fault)
            if q is None:
                return None
            tail += f', "fault": {q}'
        return (f'{{"i": {self.i}, "t0": {round(self.t0, 6)!r}, "t1": {round(self.t1, 6)!r}, '
                f'"probs": {vectors[0]}, "smoothed": {vectors[1]}, "top": {texts[0]}, '
                f'"decision": {texts[1]}, "truth": {texts[2]}, '
                f'"level_dbfs": {round(self.level_dbfs, 2)!r}, '
                f'"clipped": {round(self.clipped, 6)!r}, "gap": {self.gap}, '
                f'"ms": {round(self.ms, 4)!r}{tail}}}\n')

    def _make_record(self) -> dict[str, Any]:
        rec = {
            "i": self.i, "t0": round(self.t0, 6), "t1": round(self.t1, 6),
            "probs": None if self.probs is None else [round(v, 6) for v in self.probs.tolist()],
            "smoothed": None if self.smoothed is None
            else [round(v, 6) for v in self.smoothed.tolist()],
            "top": self.top, "decision": self.decision, "truth": self.truth,
            "level_dbfs": round(self.level_dbfs, 2), "clipped": round(self.clipped, 6),
            "gap": self.gap, "ms": round(self.ms, 4),
        }
        if self.latency_ms is not None:
            rec["latency_ms"] = round(self.latency_ms, 2)
        if self.novelty is not None:
            rec["novelty"] = round(self.novelty, 4)
            rec["unfamiliar"] = bool(self.unfamiliar)
        if self.fault is not None:
            rec["fault"] = self.fault
        return rec


@dataclass(frozen=True, slots=True)
class EngineStatus:
    """What the engine publishes after each batch of windows (one snapshot, never a view
    into its internals).

    Attributes
    ----------
    now_s : float
        The newest sample on the session clock, in seconds, gaps included.
    windows : int
        Windows so far.
    overruns : int
        Times the ring overran.
    dropped_samples : int
        Samples lost to overruns.
    gap_windows : int
        Windows that came after a gap.
    ms : float or None
        Front end and model time per window of the last batch.
    latency_ms : float or None
        The last window's latency (live only).
    model_faults : int
        Windows whose model output was not finite.
    """

    now_s: float  # the newest sample on the session clock, gaps included
    windows: int
    overruns: int
    dropped_samples: int
    gap_windows: int
    ms: float | None
    latency_ms: float | None
    model_faults: int


class Observer(Protocol):
    """What the engine calls, on its own thread; no method may block."""

    def on_audio(self, chunk: np.ndarray, gap: int) -> None:
        """Every chunk read from the ring, after `gap` lost samples, before it is windowed.

        Runs on the engine's compute thread and must not block.
        """
        ...

    def on_window(self, result: WindowResult) -> None:
        """One published result per window (model A's; model B's in ``result.others``).

        Runs on the engine's compute thread and must not block.
        """
        ...

    def on_status(self, status: EngineStatus) -> None:
        """One `EngineStatus` snapshot after each batch of windows.

        Runs on the engine's compute thread and must not block.
        """
        ...


class ObserverBase:
    """An `Observer` whose hooks do nothing; subclasses override what they need."""

    def on_audio(self, chunk: np.ndarray, gap: int) -> None:
        """Do nothing; the engine does not even call a hook a subclass leaves as it is."""
        return None

    def on_window(self, result: WindowResult) -> None:
        """Do nothing; the engine does not even call a hook a subclass leaves as it is."""
        return None

    def on_status(self, status: EngineStatus) -> None:
        """Do nothing; the engine does not even call a hook a subclass leaves as it is."""
        return None


class Source(Protocol):
    """A producer that owns the ring the engine reads (file or microphone)."""

    ring: RingBuffer
    realtime: bool
    finished: threading.Event
    error: BaseException | None  # an unexpected failure of the producer thread
    failure: str | None  # a runtime failure the session survives (a lost device)

    def start(self) -> None:
        """Start producing into `ring` on the source's own thread; `Engine.run` calls it once."""
        ...

    def stop(self) -> None:
        """Stop producing and join the producer; `Engine.run` calls it once, also after an error."""
        ...

    def describe(self) -> dict:
        """session.json's ``source`` entry (kind, file or device, native rate, channels, pace)."""
        ...

    def stats(self) -> dict:
        """The source's own figures, merged into summary.json at the end (may be empty)."""
        ...
