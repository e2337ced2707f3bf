"""The chain: source -> ring -> windower -> front end -> runner -> decider -> observers.

Threads: `Engine.run` is the compute thread (the caller's thread in headless use, a worker
thread under the UI). It reads the ring, cuts windows, computes features and probabilities
for all windows that are ready (a batch in fast replay, one at a time live), decides, and
hands each `WindowResult` to the observers in order. Observers must not block: the session
writer only queues, the UI only posts a message. The source runs its own producer thread.
"""

from __future__ import annotations

import threading
import time
from collections import deque
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from monitor import __version__
from monitor.decide import Decider
from monitor.errors import ScenemonError
from monitor.frontend import FrontEnd, clipped_fraction, level_dbfs
from monitor.runners import Runner
from monitor.session import percentile
from monitor.spec import DecisionSettings, ModelCard
from monitor.windower import Windower

STAT_KEEP = 20000  # per-window timings kept for percentiles (memory stays flat)


@dataclass
class WindowResult:
    """One window's outcome; immutable once published to observers."""

    i: int
    start: int
    t0: float
    t1: float
    probs: np.ndarray
    smoothed: np.ndarray
    top: str
    decision: str | None
    truth: str | None
    level_dbfs: float
    clipped: float
    gap: int
    ms: float
    latency_ms: float | None = None
    samples: np.ndarray | None = field(default=None, repr=False)
    features: np.ndarray | None = field(default=None, repr=False)

    def record(self) -> dict[str, Any]:
        """The `windows.jsonl` fields (DESIGN.md)."""
        rec = {
            "i": self.i, "t0": round(self.t0, 6), "t1": round(self.t1, 6),
            "probs": [round(float(v), 6) for v in self.probs],
            "smoothed": [round(float(v), 6) for v in self.smoothed],
            "top": self.top, "decision": self.decision, "truth": self.truth,
            "level_dbfs": round(self.level_dbfs, 2), "clipped": round(self.clipped, 6),
            "gap": self.gap, "ms": round(self.ms, 4),
        }
        if self.latency_ms is not None:
            rec["latency_ms"] = round(self.latency_ms, 2)
        return rec


class Observer(Protocol):
    def on_audio(self, chunk: np.ndarray, gap: int) -> None: ...
    def on_window(self, result: WindowResult) -> None: ...


class Source(Protocol):
    ring: Any
    realtime: bool
    finished: threading.Event
    error: BaseException | None

    def start(self) -> None: ...
    def stop(self) -> None: ...
    def describe(self) -> dict: ...


class SourceFailed(Exception):
    """The source thread died with an unexpected error (runtime failure, exit 1)."""


class Stats:
    """Running counts for summary.json; bounded memory."""

    def __init__(self, classes: tuple[str, ...], hop_s: float) -> None:
        self.classes, self.hop_s = classes, hop_s
        self.windows = 0
        self.gap_samples = 0
        self.gap_windows = 0
        self.changes = 0
        self.last_decision: str | None = None
        self.decided_windows = {c: 0 for c in classes}
        self.undecided = 0
        self.with_truth = 0
        self.correct = 0
        self.ms: deque[float] = deque(maxlen=STAT_KEEP)
        self.latency: deque[float] = deque(maxlen=STAT_KEEP)
        self.end_t = 0.0

    def add(self, r: WindowResult) -> None:
        self.windows += 1
        self.end_t = r.t1
        if r.gap:
            self.gap_samples += r.gap
            self.gap_windows += 1
        if r.decision != self.last_decision and self.windows > 1:
            self.changes += 1
        self.last_decision = r.decision
        if r.decision is None:
            self.undecided += 1
        else:
            self.decided_windows[r.decision] += 1
        if r.truth is not None:
            self.with_truth += 1
            self.correct += int(r.decision == r.truth)
        self.ms.append(r.ms)
        if r.latency_ms is not None:
            self.latency.append(r.latency_ms)

    def summary(self) -> dict[str, Any]:
        minutes = self.end_t / 60.0
        return {
            "windows": self.windows,
            "duration_s": round(self.end_t, 3),
            "gap_samples": self.gap_samples,
            "windows_after_gap": self.gap_windows,
            "decision_changes": self.changes,
            "switches_per_min": round(self.changes / minutes, 3) if minutes > 0 else None,
            "decided_s": {c: round(n * self.hop_s, 3) for c, n in self.decided_windows.items()},
            "undecided_windows": self.undecided,
            "windows_with_truth": self.with_truth,
            "accuracy": round(self.correct / self.with_truth, 6) if self.with_truth else None,
            "ms_median": _r(percentile(list(self.ms), 50)),
            "ms_p99": _r(percentile(list(self.ms), 99)),
            "latency_ms_median": _r(percentile(list(self.latency), 50)),
            "latency_ms_p99": _r(percentile(list(self.latency), 99)),
        }


def _r(v: float | None) -> float | None:
    return None if v is None else round(v, 4)


class Engine:
    """Wires the chain (see module docstring).

    Parameters
    ----------
    card : ModelCard
    runner : Runner
        Loaded and checked against `card`.
    source : Source
        Owns the ring buffer the engine reads.
    decision : DecisionSettings, optional
        Defaults to the card's `[decision]` table.
    truth : callable, optional
        ``truth(t0, t1) -> label or None`` for each window.
    observers : iterable
        Objects with ``on_audio(chunk, gap)`` and/or ``on_window(result)``.
    """

    def __init__(self, card: ModelCard, runner: Runner, source: Source, *,
                 decision: DecisionSettings | None = None,
                 truth: Callable[[float, float], str | None] | None = None,
                 observers: Iterable[Any] = (), max_batch: int = 64,
                 keep_features: bool = False) -> None:
        self.card, self.runner, self.source = card, runner, source
        self.decision = decision or card.decision
        self.truth = truth
        self.observers = list(observers)
        self.frontend = FrontEnd(card)
        self.decider = Decider(self.decision)
        self.windower = Windower(card.window_samples, card.hop_samples)
        self.stats = Stats(card.classes, card.hop_s)
        self.max_batch = max_batch
        self.keep_features = keep_features
        self.count = 0
        self.stopped_by_user = False

    def describe(self) -> dict[str, Any]:
        """The session.json description of what this engine runs."""
        return {
            "tool": "scenemon", "version": __version__,
            "started_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "source": self.source.describe(),
            "classes": list(self.card.classes),
            "card": self.card.settings_dict(),
            "decision": self.decision.to_dict(),
            "model": {"path": str(self.runner.path), "sha256": self.runner.sha256,
                      "kind": self.runner.kind},
            "sample_rate": self.card.sample_rate,
        }

    def run(self, stop: threading.Event | None = None) -> dict[str, Any]:
        """Run until the source ends or `stop` is set; return the summary."""
        stop = stop or threading.Event()
        src, ring = self.source, self.source.ring
        limit = self.max_batch * self.card.hop_samples + self.card.window_samples
        poll = 0.01 if src.realtime else 0.001
        src.start()
        try:
            while True:
                if stop.is_set():
                    self.stopped_by_user = True
                    break
                arrived = ring.last_write_t
                chunk, gap = ring.read(limit)
                if chunk.size or gap:
                    for obs in self.observers:
                        if hasattr(obs, "on_audio"):
                            obs.on_audio(chunk, gap)
                    wins = self.windower.push(chunk, gap)
                    if wins:
                        self._process(wins, arrived)
                    continue
                if src.error is not None:
                    if isinstance(src.error, ScenemonError):
                        raise src.error
                    raise SourceFailed(f"audio source failed: {src.error!r}") from src.error
                if src.finished.is_set() and ring.available() == 0:
                    break
                time.sleep(self._idle_wait(poll))
        finally:
            src.stop()
        summary = self.stats.summary()
        summary.update({
            "overruns": ring.overruns, "dropped_samples": ring.dropped,
            "input_overflows": ring.producer_overflows,
            "stopped_by_user": self.stopped_by_user,
        })
        summary.update(getattr(src, "stats", dict)())
        summary["clean"] = getattr(src, "failure", None) is None
        return summary

    def _idle_wait(self, poll: float) -> float:
        """Sleep until the next window can be complete (at most 50 ms, at least `poll`)."""
        if not self.source.realtime:
            return poll
        missing = self.windower.next_start + self.card.window_samples - self.windower.end
        return min(0.05, max(poll, missing / self.card.sample_rate))

    def _process(self, wins: list, arrived: float) -> None:
        card = self.card
        sr = card.sample_rate
        t = time.perf_counter()
        if len(wins) > 1 and all(b.start - a.start == card.hop_samples
                                 for a, b in zip(wins, wins[1:])):
            # one hop apart: frames shared by overlapping windows are computed once
            span = np.concatenate([wins[0].samples] + [w.samples[-card.hop_samples:]
                                                       for w in wins[1:]]) \
                if card.hop_samples <= card.window_samples else None
            feats = (self.frontend.batch_consecutive(span, len(wins)) if span is not None
                     else self.frontend.batch(np.stack([w.samples for w in wins])))
        else:
            feats = self.frontend.batch(np.stack([w.samples for w in wins]))
        probs = self.runner.predict(feats)
        ms = (time.perf_counter() - t) * 1000.0 / len(wins)
        done = time.monotonic()
        latency = (done - arrived) * 1000.0 if self.source.realtime and arrived else None
        for w, f, p in zip(wins, feats, probs):
            t0, t1 = w.start / sr, (w.start + card.window_samples) / sr
            smoothed, d = self.decider.step(p, t1)
            res = WindowResult(
                i=self.count, start=w.start, t0=t0, t1=t1, probs=p, smoothed=smoothed,
                top=card.classes[int(np.argmax(p))],
                decision=None if d is None else card.classes[d],
                truth=self.truth(t0, t1) if self.truth else None,
                level_dbfs=level_dbfs(w.samples), clipped=clipped_fraction(w.samples),
                gap=w.gap, ms=ms, latency_ms=latency, samples=w.samples,
                features=f if self.keep_features else None)
            self.count += 1
            self.stats.add(res)
            for obs in self.observers:
                if hasattr(obs, "on_window"):
                    obs.on_window(res)
