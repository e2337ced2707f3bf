"""When to save a snippet: disagreement with the truth, model uncertainty, two models that
disagree, an unfamiliar sound, or by hand.

`CapturePolicy` is an engine observer. It keeps the last seconds of audio (the compute
thread's `on_audio`), watches each `WindowResult` (`on_window`), merges consecutive
windows of the same kind into one snippet with a pre- and post-roll, caps its length,
rate-limits each (truth, predicted) pair, and hands the finished snippet to the session
writer, whose thread writes it (audio first, sidecar last, each atomically). `manual()` is
the plain function the UI's capture key calls; it may be called from any thread.

Uncertainty sampling follows Settles 2009, "Active Learning Literature Survey" (least
confidence: top probability below a threshold; margin: top two close together).

Policies, in order of precedence for one window: "disagreement" (the truth is known and
the decision differs), "models_disagree" (an A/B session whose two decisions differ, after
both have decided once), "unfamiliar" (the novelty profile flags the window; labelled
"unknown"), "uncertain" (labelled "unknown"). Each needs what it compares: without truth,
a second model or a profile it simply never fires.
"""

from __future__ import annotations

import threading
from dataclasses import field
from typing import Any

import numpy as np

from monitor.base.records import record
from monitor.decisions.contract import ObserverBase, WindowResult
from monitor.session.snippets import REASONS

POLICIES = ("disagreement", "uncertain", "models_disagree", "unfamiliar")
MAX_ROLL_S = 60.0  # pre- and post-roll
MAX_SNIPPET_S = 600.0
MAX_EVERY_S = 86400.0


@record
class CaptureSettings:
    """When and how snippets are cut (the ``--capture*`` flags; defaults here are theirs).

    Attributes
    ----------
    policies : tuple of str
        The reasons snippets are taken for, each one of `POLICIES` (disagreement, uncertain,
        models_disagree, unfamiliar); a manual capture needs none.
    on : {"decision", "top"}
        What is compared with the truth for "disagreement".
    pre_roll_s, post_roll_s : float
        Seconds kept before and after the windows that triggered it, from 0 to `MAX_ROLL_S`.
    max_s : float
        Seconds a snippet may last at most, above 0 and at most `MAX_SNIPPET_S`.
    every_s : float
        At most one snippet per (truth, predicted) pair this often, in seconds (per reason
        alone for unfamiliar and uncertain sounds), from 0 to `MAX_EVERY_S`.
    uncertain_below : float
        "uncertain": the top smoothed probability is below this (least confidence), 0 to 1.
    uncertain_margin : float
        "uncertain": the top two smoothed probabilities are closer than this (margin), 0 to 1.
    manual_s : float
        Seconds a manual capture keeps, above 0 and at most `MAX_SNIPPET_S`.

    Raises
    ------
    ValueError
        An unknown policy, `on` not "decision" or "top", or a figure outside its range
        (NaN included).

    References
    ----------
    B. Settles, "Active Learning Literature Survey", Computer Sciences Technical Report 1648,
    University of Wisconsin-Madison, 2009 (least-confidence and margin uncertainty sampling).
    """

    policies: tuple[str, ...] = POLICIES
    on: str = "decision"  # "decision" | "top": what disagrees with the truth
    pre_roll_s: float = 0.5
    post_roll_s: float = 0.5
    max_s: float = 10.0
    every_s: float = 5.0  # at most one snippet per (truth, predicted) pair this often
    uncertain_below: float = 0.5  # least confidence: top smoothed probability below this
    uncertain_margin: float = 0.1  # margin: top two smoothed closer than this
    manual_s: float = 3.0

    def __post_init__(self) -> None:
        bad = [p for p in self.policies if p not in POLICIES]
        if bad:
            raise ValueError(f"unknown capture policy {bad[0]!r} (use {', '.join(POLICIES)}, "
                             f"or none)")
        if self.on not in ("decision", "top"):
            raise ValueError(f"capture on={self.on!r} must be decision or top")
        limits = {"pre_roll_s": (0.0, MAX_ROLL_S), "post_roll_s": (0.0, MAX_ROLL_S),
                  "every_s": (0.0, MAX_EVERY_S), "uncertain_below": (0.0, 1.0),
                  "uncertain_margin": (0.0, 1.0)}
        for name, (lo, hi) in limits.items():
            v = getattr(self, name)
            if not lo <= v <= hi:  # also refuses NaN
                raise ValueError(f"{name}={v!r} must be a number from {lo:g} to {hi:g}")
        for name in ("max_s", "manual_s"):
            v = getattr(self, name)
            if not 0.0 < v <= MAX_SNIPPET_S:
                raise ValueError(f"{name}={v!r} must be above 0 and at most {MAX_SNIPPET_S:g} s")


@record(frozen=False)
class _Run:
    """A snippet being cut: why, the labels and span so far, when its audio is complete."""

    reason: str
    label: str
    predicted: str
    t0: float
    t1: float
    probs: list = field(default_factory=list)
    smoothed: list = field(default_factory=list)
    ready_at: float = 0.0  # audio end needed before cutting (t1 + post-roll)
    b: dict = field(default_factory=dict)  # model B's side of a models_disagree snippet


class AudioHistory:
    """The last `seconds` of the session's audio at the model rate, on the sample clock.

    The engine hands audio over before the windows it holds are decided, so a chunk's whole
    length must fit beside the `seconds` a snippet may reach back: a chunk longer than the room
    left grows the buffer once (fast replay reads up to the ring's size at a time).

    Parameters
    ----------
    sample_rate : int
        Hz (the model's rate).
    seconds : float
        Seconds a cut may reach back; the buffer grows when a chunk does not fit beside
        them.
    """

    def __init__(self, sample_rate: int, seconds: float) -> None:
        self.sr = sample_rate
        self.hold = int(seconds * sample_rate)
        self.cap = self.hold + sample_rate  # a second of room for a live stream's chunks
        self.buf = np.zeros(self.cap, np.float32)
        self.end = 0  # samples seen (gaps as silence)
        self.held_from = 0  # the oldest sample still held (a growth keeps no older ones)

    def add(self, chunk: np.ndarray, gap: int) -> None:
        """Append the next chunk, after `gap` lost samples that are held as silence.

        Parameters
        ----------
        chunk : numpy.ndarray
            float32 samples at the model rate, 1-D (may be empty).
        gap : int
            Samples lost just before `chunk` (>= 0). The clock advances by them, so cut times
            stay on the session clock.
        """
        if chunk.size + self.hold > self.cap:
            self._grow(2 * chunk.size + self.hold)  # with room: few growths, not one a chunk
        if gap:
            self._put(np.zeros(min(gap, self.cap), np.float32), gap)
        if chunk.size:
            self._put(chunk, chunk.size)

    def _grow(self, cap: int) -> None:
        held = min(self.end, self.cap)
        old = self.buf[np.arange(self.end - held, self.end) % self.cap]
        self.cap = cap
        self.buf = np.zeros(cap, np.float32)
        self.buf[np.arange(self.end - held, self.end) % cap] = old
        self.held_from = self.end - held

    def _put(self, x: np.ndarray, advance: int) -> None:
        x = x[-self.cap:]
        start = self.end + advance - x.size
        pos = start % self.cap
        first = min(x.size, self.cap - pos)
        self.buf[pos:pos + first] = x[:first]
        self.buf[:x.size - first] = x[first:]
        self.end += advance

    def cut(self, t0: float, t1: float) -> tuple[np.ndarray, float, float]:
        """Audio between t0 and t1 (clamped to what is still held); with the times used."""
        a = max(int(round(t0 * self.sr)), self.end - self.cap, self.held_from, 0)
        b = min(int(round(t1 * self.sr)), self.end)
        if b <= a:
            return np.zeros(0, np.float32), a / self.sr, a / self.sr
        idx = np.arange(a, b) % self.cap
        return self.buf[idx].copy(), a / self.sr, b / self.sr


def _key(kind: tuple[str, str, str]) -> tuple[str, str]:
    """What makes two windows one run, and one rate-limited pair: (truth, predicted) for a
    disagreement, the reason alone for a sound that is unfamiliar or uncertain (the model's
    guess may wander while the sound goes on)."""
    reason, label, predicted = kind
    if reason in ("unfamiliar", "uncertain"):
        return (reason, "")
    if reason == "models_disagree":
        return (reason, predicted)
    return (label, predicted)


class CapturePolicy(ObserverBase):
    """Engine observer that decides and cuts snippets (see module docstring).

    Parameters
    ----------
    settings : CaptureSettings
        When and how snippets are cut.
    classes : tuple of str
        Model A's classes in output order.
    sample_rate : int
        Hz of the audio handed to `on_audio` (the model's rate).
    sink : callable
        ``sink(snippet: dict)`` receives finished snippets (the session writer's
        `on_snippet`, which only queues).
    two_models : bool
        The session runs two models (A/B); stored as ``two_models``. The "models_disagree"
        policy reads model B from each window's ``others``.
    """

    def __init__(self, settings: CaptureSettings, *, classes: tuple[str, ...],
                 sample_rate: int, sink, two_models: bool = False) -> None:
        self.s = settings
        self.classes = classes
        self.sr = sample_rate
        self.sink = sink
        hold = settings.max_s + settings.pre_roll_s + settings.post_roll_s + 4.0
        self.audio = AudioHistory(sample_rate, max(hold, settings.manual_s + 2.0))
        self._run: _Run | None = None
        self._pending: list[_Run] = []
        self._last: dict[tuple[str, str], float] = {}
        self._lock = threading.Lock()
        self.counts = {r: 0 for r in REASONS}
        self.limited = 0
        self.lost = 0  # ended runs whose audio had already left the history
        self.last_result = None
        self._ever_decided = False
        self._both_decided = False
        self.two_models = two_models

    @property
    def total(self) -> int:
        """Snippets cut so far."""
        return sum(self.counts.values())

    # --- observer interface (compute thread) -------------------------------------------
    def on_audio(self, chunk: np.ndarray, gap: int) -> None:
        """Keep the chunk in the history; cut the pending snippets whose post-roll has now arrived.

        Runs on the engine's compute thread and must not block: the lock is held only for the copy
        into the history and the hand-over to the sink, which only queues.
        """
        with self._lock:
            self.audio.add(chunk, gap)
            self._flush(final=False)

    def on_window(self, r: WindowResult) -> None:
        """Classify one window and start, extend or end the run that becomes a snippet.

        A window of another kind (another reason, or another (truth, predicted) pair) ends the open
        run, and so does a run that reaches `max_s` with its rolls; an ended run is rate-limited,
        then cut once its post-roll has arrived. A window with a model fault is ignored. Runs on
        the engine's compute thread and must not block.
        """
        if r.fault is not None:
            return
        with self._lock:
            self.last_result = r
            kind = self._classify(r)
            run = self._run
            if run is not None and (kind is None or _key(kind) != _key((run.reason, run.label,
                                                                       run.predicted))):
                self._end_run()
                run = None
            if kind is not None:
                reason, label, predicted = kind
                if run is None:
                    run = self._run = _Run(reason, label, predicted, r.t0, r.t1)
                run.t1 = r.t1
                run.probs.append([float(v) for v in r.probs])
                run.smoothed.append([float(v) for v in r.smoothed])
                if reason == "models_disagree":
                    b = r.others[0]
                    run.b.setdefault("predicted", b.decision or "undecided")
                    run.b.setdefault("probs", []).append([float(v) for v in b.probs])
                    run.b.setdefault("smoothed", []).append([float(v) for v in b.smoothed])
                if run.t1 - run.t0 + self.s.pre_roll_s + self.s.post_roll_s >= self.s.max_s:
                    self._end_run()
            self._flush(final=False)

    def close(self) -> None:
        """End any open run and cut every pending snippet with the audio there is."""
        with self._lock:
            self._end_run()
            self._flush(final=True)

    # --- the UI's capture key (any thread) -----------------------------------------------
    def manual(self, label: str | None = None, seconds: float | None = None) -> dict | None:
        """Save the last `seconds` (default `manual_s`) as a snippet labelled `label`."""
        with self._lock:
            end = self.audio.end / self.sr
            if end <= 0:
                return None
            secs = seconds or self.s.manual_s
            r = self.last_result
            run = _Run("manual", label or "unknown",
                       r.decision or r.top if r is not None else "unknown",
                       max(0.0, end - secs), end)
            if r is not None and r.probs is not None:
                run.probs.append([float(v) for v in r.probs])
                run.smoothed.append([float(v) for v in r.smoothed])
            return self._emit(run, run.t0, run.t1)

    # --- internals ------------------------------------------------------------------------
    def _classify(self, r: WindowResult) -> tuple[str, str, str] | None:
        pol = self.s.policies
        if r.decision is not None:
            self._ever_decided = True
        b = r.others[0] if r.others and r.others[0].fault is None else None
        if b is not None and r.decision is not None and b.decision is not None:
            self._both_decided = True
        if "disagreement" in pol and r.truth is not None:
            predicted = r.top if self.s.on == "top" else r.decision
            # the windows before the very first decision are the hysteresis confirming,
            # not the model being wrong: no snippet for those
            if predicted != r.truth and (predicted is not None or self._ever_decided):
                return ("disagreement", r.truth, predicted or "undecided")
        if ("models_disagree" in pol and b is not None and self._both_decided
                and b.decision != r.decision):
            return ("models_disagree", r.truth or "unknown", r.decision or "undecided")
        if "unfamiliar" in pol and r.unfamiliar:
            return ("unfamiliar", "unknown", r.decision or r.top or "undecided")
        if "uncertain" in pol:
            s = sorted(r.smoothed.tolist(), reverse=True)  # a few classes: cheaper than numpy
            if s[0] < self.s.uncertain_below or s[0] - s[1] < self.s.uncertain_margin:
                top = self.classes[int(np.argmax(r.smoothed))]
                return ("uncertain", "unknown", top)
        return None

    def _end_run(self) -> None:
        run, self._run = self._run, None
        if run is None:
            return
        key = _key((run.reason, run.label, run.predicted))
        last = self._last.get(key)
        if last is not None and run.t0 - last < self.s.every_s:
            self.limited += 1
            return
        self._last[key] = run.t0
        run.ready_at = run.t1 + self.s.post_roll_s
        self._pending.append(run)

    def _flush(self, *, final: bool) -> None:
        end = self.audio.end / self.sr
        keep = []
        for run in self._pending:
            if final or end >= run.ready_at:
                t0 = max(0.0, run.t0 - self.s.pre_roll_s)
                t1 = min(run.ready_at, t0 + self.s.max_s)
                self._emit(run, t0, t1)
            else:
                keep.append(run)
        self._pending = keep

    def _emit(self, run: _Run, t0: float, t1: float) -> dict | None:
        audio, t0, t1 = self.audio.cut(t0, t1)
        if audio.size == 0:
            if run.reason != "manual":
                self.lost += 1
            return None
        probs = np.asarray(run.probs) if run.probs else np.zeros((0, len(self.classes)))
        smoothed = np.asarray(run.smoothed) if run.smoothed else probs
        snippet: dict[str, Any] = {
            "reason": run.reason, "label": run.label, "predicted": run.predicted,
            "in_classes": run.label in self.classes, "t0": round(t0, 4), "t1": round(t1, 4),
            "sample_rate": self.sr, "probs": probs.round(6).tolist(),
            "smoothed": smoothed.round(6).tolist(),
            "confidence": round(float(smoothed.mean(0).max()), 6) if len(smoothed) else None,
            "audio": audio,
        }
        if run.b:
            snippet["model_b"] = {"predicted": run.b["predicted"],
                                  "probs": np.asarray(run.b["probs"]).round(6).tolist(),
                                  "smoothed": np.asarray(run.b["smoothed"]).round(6).tolist()}
        self.counts[run.reason] += 1
        self.sink(snippet)
        return snippet
