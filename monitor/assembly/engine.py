"""The chain: source -> ring -> windower -> front end -> runner(s) -> decider(s) -> observers.

Threads: `Engine.run` is the compute thread (the caller's thread in headless use, a worker
thread under the UI). It is the only reader of the ring and the only user of the runners. It
cuts windows, computes features and probabilities for all windows that are ready (a batch in
fast replay, one at a time live), decides, and hands each `WindowResult` to the observers in
order, then one `EngineStatus`. Observers must not block: the session writer only queues,
the UI bridge only posts a message. The source runs its own producer thread.

With two models (A/B) both see exactly the same windows; when their cards' front ends are
equal the features are computed once. Model A's result is the one published; model B's
rides along in ``result.others``.
"""

from __future__ import annotations

import math
import threading
import time
from collections import deque
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from monitor.base.errors import ModelError, ScenemonError, SourceFailed
from monitor.base.records import record
from monitor.decisions.contract import (
    HOOKS,
    EngineStatus,
    Observer,
    ObserverBase,
    Source,
    WindowResult,
)
from monitor.decisions.decide import Decider
from monitor.decisions.tally import LevelTally, Tally, percentile
from monitor.features.card import DecisionSettings, ModelCard
from monitor.features.frontend import FrontEnd
from monitor.inference.base import Runner
from monitor.sound.samples import window_levels
from monitor.sound.windower import Window, Windower

STAT_KEEP = 20000  # per-window timings kept for percentiles (memory stays flat)
MODEL_FAULT = "non-finite model output"
NOVELTY_FAULT = "non-finite novelty"


@record(frozen=False)
class _Lane:
    """One model's part of the chain: its card, runner, decider and tally."""

    card: ModelCard
    runner: Runner
    frontend: FrontEnd
    decider: Decider
    decision: DecisionSettings
    tally: Tally
    profile: Any = None  # a novelty profile (monitor.inference.novelty), or None
    faults: int = 0
    novelty_faults: int = 0  # windows whose novelty was not finite (novelty null, flagged)




def _overrides(cls: type, name: str) -> bool:
    """True when an observer's class has its own `name` hook (not ObserverBase's no-op)."""
    hook = getattr(cls, name, None)
    return hook is not None and hook is not getattr(ObserverBase, name)


class Engine:
    """Wires the chain (see module docstring).

    Parameters
    ----------
    models : sequence of (ModelCard, Runner)
        One model, or two for an A/B session (same rate, window and hop).
    source : Source
        Owns the ring buffer the engine reads.
    decisions : sequence of DecisionSettings, optional
        Per model; defaults to each card's ``[decision]`` table.
    truth : callable, optional
        ``truth(t0, t1) -> label or None`` for each window.
    observers : sequence of Observer
    profiles : sequence, optional
        Per model, a novelty profile or None.
    max_batch : int
        Windows computed together at most (fast replay): 16 keeps a batch's arrays to a few
        MB (peak memory 66 against 72 MB at 64 on four tours) at no measurable cost in speed.
    keep_features : bool
        Keep each window's features in its result (for the UI's picture).

    Raises
    ------
    ModelError
        Two models whose cards differ in rate, window or hop.
    ValueError
        No model, or more than two.
    """

    def __init__(self, models: Sequence[tuple[ModelCard, Runner]], source: Source, *,
                 decisions: Sequence[DecisionSettings | None] | None = None,
                 truth: Callable[[float, float], str | None] | None = None,
                 observers: Sequence[Observer] = (), profiles: Sequence[Any] | None = None,
                 max_batch: int = 16, keep_features: bool = False) -> None:
        if not 1 <= len(models) <= 2:
            raise ValueError("the engine runs one model, or two side by side")
        a = models[0][0]
        for card, _ in models[1:]:
            for key in ("sample_rate", "window_samples", "hop_samples"):
                if getattr(card, key) != getattr(a, key):
                    raise ModelError(f"{card.name}: {key} {getattr(card, key)} differs from "
                                     f"{a.name}'s {getattr(a, key)}; two models in one session "
                                     f"must see the same windows")
        decisions = list(decisions or [None] * len(models))
        profiles = list(profiles or [None] * len(models))
        frontends: list[FrontEnd] = []
        self.lanes: list[_Lane] = []
        for (card, runner), dec, prof in zip(models, decisions, profiles):
            fe = next((f for f in frontends if f.card.same_front_end(card)), None)
            if fe is None:
                fe = FrontEnd(card)
                frontends.append(fe)
            dec = dec or card.decision
            self.lanes.append(_Lane(card, runner, fe, Decider(dec), dec,
                                    Tally(card.classes, hop_s=card.hop_s),
                                    prof.fresh(dec.confirm) if prof is not None else None))
        self.card = a
        self.source = source
        self.truth = truth
        self.observers: list[Observer] = list(observers)
        self.windower = Windower(a.window_samples, a.hop_samples)
        self.max_batch = max_batch
        self.keep_features = keep_features
        self.count = 0
        self.stopped_by_user = False
        self.levels = LevelTally()
        self.published_samples = 0  # newest sample seen; one int store, read by other threads
        self._ms: deque[float] = deque(maxlen=STAT_KEEP)
        self._latency: deque[float] = deque(maxlen=STAT_KEEP)
        self._last_ms: float | None = None
        self._last_latency: float | None = None

    @property
    def decision(self) -> DecisionSettings:
        """Model A's decision settings."""
        return self.lanes[0].decision

    @property
    def tally(self) -> Tally:
        """Model A's running tally."""
        return self.lanes[0].tally

    def status(self) -> EngineStatus:
        """A snapshot of the chain's counters now: what the ``on_status`` observers receive.

        Made on the compute thread after each batch of windows; it shares nothing with the engine.
        """
        ring = self.source.ring
        return EngineStatus(
            now_s=self.windower.end / self.card.sample_rate, windows=self.count,
            overruns=ring.overruns, dropped_samples=ring.dropped,
            gap_windows=self.tally.windows_after_gap, ms=self._last_ms,
            latency_ms=self._last_latency, model_faults=sum(ln.faults for ln in self.lanes))

    def run(self, stop: threading.Event | None = None) -> dict[str, Any]:
        """Run until the source ends or `stop` is set; return the summary."""
        stop = stop or threading.Event()
        src, ring = self.source, self.source.ring
        batch = self.max_batch * self.card.hop_samples + self.card.window_samples
        limit = self.card.window_samples  # the first result as soon as one window is in
        poll = 0.01 if src.realtime else 0.001
        for obs in self.observers:  # before anything starts: a half observer is a bug
            missing = [h for h in HOOKS if not callable(getattr(obs, h, None))]
            if missing:
                raise TypeError(f"{type(obs).__name__} is not an engine observer: it lacks "
                                f"{', '.join(missing)} (subclass engine.ObserverBase)")
        audio_obs = [o for o in self.observers if _overrides(type(o), "on_audio")]
        self._window_obs = [o for o in self.observers if _overrides(type(o), "on_window")]
        self._status_obs = [o for o in self.observers if _overrides(type(o), "on_status")]
        src.start()
        try:
            while True:
                if stop.is_set():
                    self.stopped_by_user = True
                    break
                arrived = ring.last_write_t
                chunk, gap = ring.read(limit)
                if chunk.size or gap:
                    for obs in audio_obs:
                        obs.on_audio(chunk, gap)
                    wins = self.windower.push(chunk, gap)
                    self.published_samples = self.windower.end
                    if wins:
                        self._process(wins, arrived, self.windower.span)
                        limit = batch
                    continue
                if src.error is not None:
                    if isinstance(src.error, ScenemonError):
                        raise src.error
                    raise SourceFailed(f"audio source failed: {src.error!r}") from src.error
                if src.finished.is_set() and ring.available() == 0:
                    break
                stop.wait(self._idle_wait(poll))  # a stop ends the wait at once
        finally:
            src.stop()
        return self.summary()

    def summary(self) -> dict[str, Any]:
        """summary.json's figures so far (model A's at the top level)."""
        ring, src = self.source.ring, self.source
        summary = lane_summary(self.lanes[0])
        summary.update({
            "gap_samples": self.tally.gap_samples,
            "windows_after_gap": self.tally.windows_after_gap,
            "ms_median": _r(percentile(self._ms, 50)), "ms_p99": _r(percentile(self._ms, 99)),
            "latency_ms_median": _r(percentile(self._latency, 50)),
            "latency_ms_p99": _r(percentile(self._latency, 99)),
            "overruns": ring.overruns, "dropped_samples": ring.dropped,
            "device_gap_samples": ring.skipped,
            "input_overflows": ring.producer_overflows,
            "stopped_by_user": self.stopped_by_user,
        })
        summary.update(self.levels.finish().summary() if self.count else LevelTally().summary())
        summary.update(src.stats())
        summary["clean"] = src.failure is None
        faults = sum(ln.faults for ln in self.lanes)
        summary["model_faults"] = faults
        if faults:
            summary["model_fault"] = (f"{faults} window(s) had a non-finite model output (NaN "
                                      f"or infinity); they are recorded with null "
                                      f"probabilities and the flag \"fault\"")
        novelty_faults = sum(ln.novelty_faults for ln in self.lanes)
        if novelty_faults:
            summary["novelty_faults"] = novelty_faults
        if len(self.lanes) > 1:
            summary["b"] = lane_summary(self.lanes[1])
        return summary

    def _idle_wait(self, poll: float) -> float:
        """Seconds to wait until the next window can be complete (at least `poll`, at most
        one second).

        Live, the engine (and the session writer after it) wakes about once a window, not
        every pump period: a hop's audio is read in one piece.
        """
        if not self.source.realtime:
            return poll
        missing = self.windower.next_start + self.card.window_samples - self.windower.end
        speed = getattr(self.source, "speed", 1.0)  # a file clocked faster than real time
        return min(1.0 / speed, max(poll, missing / self.card.sample_rate / speed))

    def _features(self, fe: FrontEnd, wins: list[Window], span: np.ndarray | None) -> np.ndarray:
        # live as in fast replay, a frame shared by overlapping windows is computed once (the
        # front end's stream keeps the newest window's frames); the same numbers as whole
        # windows, byte for byte
        return fe.stream.features([w.start for w in wins], [w.samples for w in wins], span)

    def _levels(self, wins: list[Window], span: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
        """Level and clipped share of each window, from hop-long pieces (`window_levels`);
        `span` is the windows' samples as one array (`Windower.span`: one push's windows,
        one hop apart), or None."""
        hop, win = self.card.hop_samples, self.card.window_samples
        if span is not None and win % hop == 0:
            return window_levels(span, np.arange(len(wins)) * hop, win, hop)
        out = [window_levels(w.samples, np.zeros(1, int), win, hop) for w in wins]
        return np.concatenate([o[0] for o in out]), np.concatenate([o[1] for o in out])

    def _process(self, wins: list[Window], arrived: float, span: np.ndarray | None) -> None:
        card = self.card
        sr = card.sample_rate
        t = time.perf_counter()
        feats: dict[int, np.ndarray] = {}
        probs = []
        for lane in self.lanes:
            key = id(lane.frontend)
            if key not in feats:
                feats[key] = self._features(lane.frontend, wins, span)
            probs.append(lane.runner.predict(feats[key]))
        ms = (time.perf_counter() - t) * 1000.0 / len(wins)
        done = time.monotonic()
        latency = (done - arrived) * 1000.0 if self.source.realtime and arrived else None
        self._last_ms, self._last_latency = ms, latency
        levels, clipped = self._levels(wins, span)
        novelty = [lane.profile.distances_of(feats[id(lane.frontend)])
                   if lane.profile is not None else None for lane in self.lanes]
        # per batch, not per window: which rows are finite, and each row's top class
        finite = [np.isfinite(pm).all(axis=1).tolist() for pm in probs]
        tops = [pm.argmax(axis=1).tolist() for pm in probs]
        for k, w in enumerate(wins):
            t0, t1 = w.start / sr, (w.start + card.window_samples) / sr
            truth = self.truth(t0, t1) if self.truth else None
            level, clip = float(levels[k]), float(clipped[k])
            self.levels.add(t0, t1, level, clip)
            results = []
            for m, lane in enumerate(self.lanes):
                f = feats[id(lane.frontend)][k]
                nov = None if novelty[m] is None else float(novelty[m][k])
                top = tops[m][k] if finite[m][k] else None
                results.append(self._decide(lane, m, w, t0, t1, truth, level, clip, ms,
                                            latency, probs[m][k], top, f, nov))
            res = results[0]
            if len(results) > 1:
                res = _with_others(res, tuple(results[1:]))
            self.count += 1
            self._ms.append(ms)
            if latency is not None:
                self._latency.append(latency)
            for obs in self._window_obs:
                obs.on_window(res)
        if self._status_obs:
            status = self.status()
            for obs in self._status_obs:
                obs.on_status(status)

    def _decide(self, lane: _Lane, m: int, w: Window, t0: float, t1: float,
                truth: str | None, level: float, clipped: float, ms: float,
                latency: float | None, p: np.ndarray, top: int | None, f: np.ndarray,
                novelty: float | None) -> WindowResult:
        classes = lane.card.classes
        unfamiliar = None
        fault = None
        if novelty is not None and not math.isfinite(novelty):  # flagged, never left out
            lane.novelty_faults += 1
            novelty, fault = None, NOVELTY_FAULT
        if novelty is not None:
            unfamiliar = lane.profile.count(novelty)
        if top is None:  # a non-finite output: a model fault
            lane.faults += 1
            d = lane.decider.hysteresis.decision
            decision = None if d is None else classes[d]
            lane.tally.add(t0, t1, decision, truth, w.gap)
            return WindowResult(
                i=self.count, start=w.start, t0=t0, t1=t1, probs=None, smoothed=None,
                top=None, decision=decision, truth=truth, level_dbfs=level, clipped=clipped,
                gap=w.gap, ms=ms, latency_ms=latency,
                features=f if self.keep_features else None, novelty=novelty,
                unfamiliar=unfamiliar, fault=MODEL_FAULT, model=m)
        smoothed, d = lane.decider.step(p, t1)
        decision = None if d is None else classes[d]
        lane.tally.add(t0, t1, decision, truth, w.gap)
        return WindowResult(
            i=self.count, start=w.start, t0=t0, t1=t1, probs=p, smoothed=smoothed,
            top=classes[top], decision=decision, truth=truth,
            level_dbfs=level, clipped=clipped, gap=w.gap, ms=ms, latency_ms=latency,
            features=f if self.keep_features else None, novelty=novelty,
            unfamiliar=unfamiliar, fault=fault, model=m)


def _with_others(res: WindowResult, others: tuple[WindowResult, ...]) -> WindowResult:
    import dataclasses

    return dataclasses.replace(res, others=others)


def lane_summary(lane: _Lane) -> dict[str, Any]:
    """One model's decision figures for summary.json.

    Parameters
    ----------
    lane : _Lane
        One model's part of the chain.

    Returns
    -------
    dict
        Windows, decision changes, accuracy and the rest of that model's figures.
    """
    t = lane.tally
    return {
        "windows": t.windows,
        "duration_s": round(t.duration_s, 3),
        "decision_changes": t.changes,
        "switches_per_min": _r3(t.switches_per_min),
        "decided_s": {c: round(v, 3) for c, v in t.decided_s().items()},
        "undecided_windows": t.undecided,
        "windows_with_truth": t.with_truth,
        "accuracy": round(t.accuracy, 6) if t.accuracy is not None else None,
    }


def _r(v: float | None) -> float | None:
    return None if v is None else round(v, 4)


def _r3(v: float | None) -> float | None:
    return None if v is None else round(v, 3)
