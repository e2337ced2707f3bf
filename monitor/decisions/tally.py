"""The running statistics of a stream of decided windows, in one incremental tally.

The engine's summary, the terminal UI's session panel, `report` (via `review.metrics`) and
the `tune` sweep all count the same things: windows, decision changes, time per decided
class, accuracy against the truth, the confusion matrix and the decision latency after each
truth change. `Tally` counts them once per window in O(1) time and bounded memory, so a
live session of hours and a re-scored archive get the same numbers.

Accuracy and class-wise accuracy follow the acoustic scene metrics of Mesaros, Heittola and
Virtanen 2016, "Metrics for Polyphonic Sound Event Detection" (Applied Sciences 6(6):162);
undecided windows count as wrong and get their own confusion column (rows: truth).

Decision latency after a truth change has no standard definition for scene streams; ours:
the time from the change (the onset of the new truth span) to the end ``t1`` of the first
window (in stream order) whose decision equals the new truth, among the windows that end
after the change and start before the new span ends. A change with no such window is
"never reached".
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Iterable, Sequence

import numpy as np

from monitor.base.records import record

UNDECIDED = "(undecided)"


def percentile(values: Iterable[float], q: float) -> float | None:
    """The q-th percentile (numpy's linear rule), or None for no values.

    Parameters
    ----------
    values : iterable of float
        The values.
    q : float
        From 0 to 100.

    Returns
    -------
    float or None
        numpy.percentile's value; None when there are no values.
    """
    v = np.asarray(list(values), dtype=np.float64)
    if not v.size:
        return None
    if not np.isfinite(v).all():  # NaN or infinity: numpy's own handling
        p = float(np.percentile(v, q))
        return p if math.isfinite(p) else None
    # numpy's "linear" rule, step by step as numpy.percentile takes it (its _lerp), without
    # the import of numpy.ma that numpy.percentile costs at a session's end (13 ms here)
    v.sort()
    h = (v.size - 1) * (q / 100.0)
    lo = math.floor(h)
    a, b = float(v[lo]), float(v[min(lo + 1, v.size - 1)])
    t = h - lo
    d = b - a
    p = b - d * (1 - t) if t >= 0.5 else a + d * t
    return p if math.isfinite(p) else None


@record
class Change:
    """A truth change: the new label from `onset` (s) until `offset` (s; inf if unknown).

    Attributes
    ----------
    onset : float
        Seconds: when the new truth starts.
    label : str
        The new truth.
    offset : float
        Seconds: when it ends (infinity when unknown).
    """

    onset: float
    label: str
    offset: float = math.inf


class Tally:
    """Counts of a decided window stream (see module docstring).

    Parameters
    ----------
    classes : sequence of str
        The model's classes, in output order.
    hop_s : float, optional
        Seconds between windows (for time per decided class); taken from the first two
        windows when not given.
    changes : iterable of Change, optional
        The truth changes when the truth is known as spans (each span after the first);
        without them the changes are found in the windows' own truth labels.
    """

    def __init__(self, classes, *, hop_s: float | None = None,
                 changes: Iterable[Change] | None = None) -> None:
        self.classes = list(classes)
        self._idx = {c: i for i, c in enumerate(self.classes)}
        self.hop_s = hop_s
        self.windows = 0
        self.end_t = 0.0
        self._first_t0: float | None = None
        self.gap_samples = 0
        self.windows_after_gap = 0
        self.changes = 0
        self._last: object = ...  # decision of the previous window (... before the first)
        self._last_set: str | None = None  # the latest decision that was not undecided
        n = len(self.classes)
        self.confusion = np.zeros((n, n + 1), dtype=np.int64)  # undecided last
        self.decided_windows = np.zeros(n, dtype=np.int64)
        self.undecided = 0
        self.with_truth = 0
        self.correct = 0
        # latency
        self.latencies: list[float] = []
        self.never_reached = 0
        self.truth_changes = 0
        self._spans_known = changes is not None
        self._future: deque[Change] = deque(sorted(changes or (), key=lambda c: c.onset))
        self.truth_changes = len(self._future)
        self._active: list[Change] = []
        self._recent: deque[tuple[float, float, str | None]] = deque()
        self._prev_truth: str | None = None

    # --- feeding ---------------------------------------------------------------------------
    def add(self, t0: float, t1: float, decision: str | None, truth: str | None,
            gap: int = 0) -> None:
        """Count one window (in stream order)."""
        if self.windows == 1 and self.hop_s is None and self._first_t0 is not None:
            self.hop_s = t0 - self._first_t0
        if self.windows == 0:
            self._first_t0 = t0
        self.windows += 1
        self.end_t = t1
        if gap:
            self.gap_samples += gap
            self.windows_after_gap += 1
        # a change is a switch once a first decision is made: the undecided start is not
        # one (the raw top class, never undecided at the start, is counted the same way)
        if self._last is not ... and decision != self._last and self._last_set is not None:
            self.changes += 1
        self._last = decision
        if decision is not None:
            self._last_set = decision
        d = self._idx.get(decision) if decision is not None else None
        if d is None:
            self.undecided += 1
        else:
            self.decided_windows[d] += 1
        ti = self._idx.get(truth) if truth is not None else None
        if ti is not None:
            self.with_truth += 1
            self.confusion[ti, len(self.classes) if d is None else d] += 1
            self.correct += int(d == ti)
        self._latency(t0, t1, decision, truth)

    def _latency(self, t0: float, t1: float, decision: str | None, truth: str | None) -> None:
        if not self._spans_known and truth is not None:
            if self._prev_truth is not None and truth != self._prev_truth:
                ch = Change(t0, truth)
                self.truth_changes += 1
                self._recent.append((t0, t1, decision))
                hit = next((r for r in self._recent if r[1] > ch.onset and r[0] < ch.offset
                            and r[2] == ch.label), None)
                self._recent.pop()
                if hit is not None:
                    self.latencies.append(round(hit[1] - ch.onset, 6))
                else:
                    self._active.append(ch)
            self._prev_truth = truth
        while self._future and self._future[0].onset < t1:
            self._active.append(self._future.popleft())
        if self._active:
            keep = []
            for ch in self._active:
                if t1 > ch.onset and t0 < ch.offset and decision == ch.label:
                    self.latencies.append(round(t1 - ch.onset, 6))
                elif t0 >= ch.offset:
                    self.never_reached += 1
                else:
                    keep.append(ch)
            self._active = keep
        if not self._spans_known:  # windows a later change could still be reached by
            self._recent.append((t0, t1, decision))
            while self._recent and self._recent[0][1] <= t0:
                self._recent.popleft()

    def finish(self) -> Tally:
        """End of the stream: changes still waiting are never reached. Returns self."""
        self.never_reached += len(self._active) + len(self._future)
        self._active, self._future = [], deque()
        return self

    def merge(self, other: Tally) -> Tally:
        """Add a finished tally of another stream (another file) into this one: counts and
        latencies add up, the duration is the streams' seconds added; each stream's decision
        changes stay its own (none is counted across the join). Returns self."""
        self.windows += other.windows
        self.end_t += other.duration_s
        self.gap_samples += other.gap_samples
        self.windows_after_gap += other.windows_after_gap
        self.changes += other.changes
        self.confusion += other.confusion
        self.decided_windows += other.decided_windows
        self.undecided += other.undecided
        self.with_truth += other.with_truth
        self.correct += other.correct
        self.latencies += other.latencies
        self.never_reached += other.never_reached
        self.truth_changes += other.truth_changes
        if self.hop_s is None:
            self.hop_s = other.hop_s
        return self

    # --- figures -----------------------------------------------------------------------------
    @property
    def duration_s(self) -> float:
        """Seconds from the stream's start to the end ``t1`` of the last window counted."""
        return self.end_t

    @property
    def accuracy(self) -> float | None:
        """Correct windows over windows with truth (undecided is wrong); None without truth."""
        return self.correct / self.with_truth if self.with_truth else None

    @property
    def switches_per_min(self) -> float | None:
        """Decision changes per minute of stream; None before any time has passed."""
        minutes = self.end_t / 60.0
        return self.changes / minutes if minutes > 0 else None

    def decided_s(self) -> dict[str, float]:
        """Seconds each class was the decision: its decided windows times the hop.

        Every class reads 0 s while the hop is unknown (a single window and no `hop_s` given).
        """
        hop = self.hop_s or 0.0
        return {c: float(n) * hop for c, n in zip(self.classes, self.decided_windows)}

    def per_class(self) -> dict[str, dict[str, float | int | None]]:
        """Precision, recall, F1 and support per class (undecided is never a prediction)."""
        cm = self.confusion
        out = {}
        for c, i in self._idx.items():
            support = int(cm[i].sum())
            predicted = int(cm[:, i].sum())
            tp = int(cm[i, i])
            p = tp / predicted if predicted else None
            r = tp / support if support else None
            f1 = (2 * p * r / (p + r) if p and r else 0.0) if p is not None and r is not None \
                else None
            out[c] = {"support": support, "precision": p, "recall": r, "f1": f1}
        return out

    @property
    def balanced_accuracy(self) -> float | None:
        """Mean of the per-class recalls over the classes with support."""
        recalls = [m["recall"] for m in self.per_class().values() if m["recall"] is not None]
        return float(np.mean(recalls)) if recalls else None

    latency_median = property(lambda self: latency_median(self.latencies),
                              doc="Median decision latency after a truth change (s), or None.")
    latency_worst = property(lambda self: latency_worst(self.latencies),
                             doc="Longest decision latency after a truth change (s), or None.")


def latency_median(latencies: Sequence[float]) -> float | None:
    """The median of decision latencies.

    Parameters
    ----------
    latencies : sequence of float
        Seconds from each truth change to the decision that reached it.

    Returns
    -------
    float or None
        The median in seconds; None when no change was reached.
    """
    return float(np.median(latencies)) if len(latencies) else None


def latency_worst(latencies: Sequence[float]) -> float | None:
    """The longest of decision latencies.

    Parameters
    ----------
    latencies : sequence of float
        Seconds from each truth change to the decision that reached it.

    Returns
    -------
    float or None
        The longest in seconds; None when no change was reached.
    """
    return float(max(latencies)) if len(latencies) else None


def switches(labels: Sequence[str | None]) -> int:
    """Changes of a label stream, counted as `Tally` counts decision changes: a switch from
    one label to another, or to and from None, once a first label is there (a leading None,
    the undecided start, is no change).

    Parameters
    ----------
    labels : sequence of str or None
        One label per window, in stream order.

    Returns
    -------
    int
        The changes.
    """
    first = next((k for k, x in enumerate(labels) if x is not None), len(labels))
    rest = labels[first:]
    return sum(1 for a, b in zip(rest, rest[1:]) if a != b)


def changes_from_spans(spans) -> list[Change]:
    """The truth changes of a span list: every span after the first (in time order).

    Parameters
    ----------
    spans : list of Span
        Truth spans.

    Returns
    -------
    list of Change
        One per span after the first, in time order.
    """
    ordered = sorted(spans, key=lambda s: s.onset)
    return [Change(s.onset, s.label, s.offset) for s in ordered[1:]]


def tally_windows(windows: Iterable[dict], classes, *, hop_s: float | None = None,
                  spans=None, decisions: Iterable[str | None] | None = None) -> Tally:
    """A finished `Tally` of window records (``windows.jsonl`` dicts).

    `decisions`, when given, replaces the records' own decisions (the tuning sweep).

    Parameters
    ----------
    windows : iterable of dict
        Window records in stream order.
    classes : sequence of str
        The model's classes.
    hop_s : float, optional
        Seconds between windows (else from the first two windows).
    spans : list of Span, optional
        The truth as spans, for the latency after each change (else the windows' own truth).
    decisions : iterable of str or None, optional
        Decisions to count instead of the records' own.

    Returns
    -------
    Tally
        The finished tally.
    """
    t = Tally(classes, hop_s=hop_s, changes=changes_from_spans(spans) if spans else None)
    if decisions is None:
        for w in windows:
            t.add(w["t0"], w["t1"], w.get("decision"), w.get("truth"), w.get("gap") or 0)
    else:
        for w, d in zip(windows, decisions):
            t.add(w["t0"], w["t1"], d, w.get("truth"), w.get("gap") or 0)
    return t.finish()


SILENT_BELOW_DBFS = -70.0  # a window quieter than this is silent (a muted input; common practice)
SILENT_FOR_S = 3.0  # silence this long is worth a warning
CLIPPED_ABOVE = 0.001  # share of full-scale samples that makes a window clipped
MAX_STRETCHES = 100


class LevelTally:
    """Stretches of silence and clipping in a window stream, counted as windows arrive.

    A silent stretch is a run of windows below `SILENT_BELOW_DBFS` lasting at least
    `SILENT_FOR_S`; a clipping stretch is a run of windows with more than `CLIPPED_ABOVE`
    of their samples at full scale. Times are the stretch's first ``t0`` and last ``t1``.
    """

    def __init__(self) -> None:
        self.silent: list[tuple[float, float]] = []
        self.clipping: list[tuple[float, float]] = []
        self.silent_windows = 0
        self.clipped_windows = 0
        self._quiet: list[float] | None = None  # [t0, t1] of the open silent run
        self._clip: list[float] | None = None

    def add(self, t0: float, t1: float, level_dbfs: float, clipped: float) -> None:
        """Count one window, in stream order, extending or closing the silent and clipping runs.

        Parameters
        ----------
        t0, t1 : float
            The window's start and end, session seconds.
        level_dbfs : float
            Its level in dBFS.
        clipped : float
            The share of its samples at full scale, in [0, 1].
        """
        if level_dbfs < SILENT_BELOW_DBFS:
            self.silent_windows += 1
            self._quiet = [t0, t1] if self._quiet is None else [self._quiet[0], t1]
        else:
            self._close_quiet()
        if clipped > CLIPPED_ABOVE:
            self.clipped_windows += 1
            self._clip = [t0, t1] if self._clip is None else [self._clip[0], t1]
        elif self._clip is not None:
            self._keep(self.clipping, self._clip)
            self._clip = None

    def _close_quiet(self) -> None:
        if self._quiet is not None and self._quiet[1] - self._quiet[0] >= SILENT_FOR_S - 1e-9:
            self._keep(self.silent, self._quiet)
        self._quiet = None

    @staticmethod
    def _keep(into: list, run: list[float]) -> None:
        if len(into) < MAX_STRETCHES:
            into.append((round(run[0], 3), round(run[1], 3)))

    @property
    def silent_now_s(self) -> float:
        """Length of the silent run still going on (0 when the input is not silent)."""
        return 0.0 if self._quiet is None else self._quiet[1] - self._quiet[0]

    def finish(self) -> LevelTally:
        """End of the stream: close the open runs (a silent one only when long enough); self."""
        self._close_quiet()
        if self._clip is not None:
            self._keep(self.clipping, self._clip)
            self._clip = None
        return self

    def summary(self) -> dict:
        """summary.json's level figures: silent and clipping stretches, their totals.

        At most `MAX_STRETCHES` stretches of each kind are kept; ``silent_s`` adds up those kept.
        """
        return {"silent_stretches": [list(s) for s in self.silent],
                "silent_s": round(sum(b - a for a, b in self.silent), 3),
                "clipping_stretches": [list(s) for s in self.clipping],
                "clipped_windows": self.clipped_windows}


def level_tally(windows) -> LevelTally:
    """A finished `LevelTally` of window records.

    Parameters
    ----------
    windows : iterable of dict
        Window records in stream order.

    Returns
    -------
    LevelTally
        The finished tally of silent and clipping stretches.
    """
    t = LevelTally()
    for w in windows:
        lv, cl = w.get("level_dbfs"), w.get("clipped")
        t.add(w["t0"], w["t1"], lv if isinstance(lv, (int, float)) else 0.0,
              cl if isinstance(cl, (int, float)) else 0.0)
    return t.finish()
