"""Scores of a window stream against its truth.

Window accuracy and class-wise accuracy (recall per class, and their mean) follow the
acoustic scene metrics of Mesaros, Heittola and Virtanen 2016, "Metrics for Polyphonic
Sound Event Detection" (Applied Sciences 6(6):162) as the `sed_eval` package implements
them; the confusion matrix has truth in rows (scikit-learn's convention). Undecided windows
count as wrong for accuracy and appear as their own column in the confusion matrix.

Decision latency after a truth change has no standard definition for scene streams; ours:
the time from the change (the onset of the new truth span) to the end ``t1`` of the first
window whose decision equals the new truth. A change whose span ends first is "never
reached".
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

UNDECIDED = "(undecided)"


@dataclass
class Scores:
    classes: list[str]
    windows: int
    duration_s: float
    with_truth: int
    accuracy: float | None
    balanced_accuracy: float | None
    per_class: dict[str, dict[str, float | int | None]]
    confusion: list[list[int]]  # rows: truth (classes), columns: classes + undecided
    changes: int
    switches_per_min: float | None
    decided_s: dict[str, float]
    latencies: list[float] = field(default_factory=list)
    never_reached: int = 0
    truth_changes: int = 0

    @property
    def latency_median(self) -> float | None:
        return float(np.median(self.latencies)) if self.latencies else None

    @property
    def latency_worst(self) -> float | None:
        return float(max(self.latencies)) if self.latencies else None

    def to_dict(self) -> dict[str, Any]:
        return {
            "windows": self.windows, "duration_s": self.duration_s,
            "windows_with_truth": self.with_truth, "accuracy": self.accuracy,
            "balanced_accuracy": self.balanced_accuracy, "per_class": self.per_class,
            "confusion": {"rows_truth": self.classes, "columns": self.classes + [UNDECIDED],
                          "counts": self.confusion},
            "decision_changes": self.changes, "switches_per_min": self.switches_per_min,
            "decided_s": self.decided_s, "truth_changes": self.truth_changes,
            "latency_s_median": self.latency_median, "latency_s_worst": self.latency_worst,
            "latency_never_reached": self.never_reached,
        }


def switch_count(decisions: list[str | None]) -> int:
    """Decision changes (undecided counts as a state)."""
    return sum(1 for a, b in zip(decisions, decisions[1:]) if a != b)


def truth_changes(windows: list[dict], truth_spans=None) -> list[tuple[float, str, float]]:
    """(onset, label, offset) of every truth span after the first: the scene changes."""
    if truth_spans:
        spans = sorted(truth_spans, key=lambda s: s.onset)
        return [(s.onset, s.label, s.offset) for s in spans[1:]]
    out, prev = [], None
    for w in windows:  # fall back to the per-window truth
        t = w.get("truth")
        if t is not None and prev is not None and t != prev:
            out.append((w["t0"], t, float("inf")))
        if t is not None:
            prev = t
    return out


def latencies(windows: list[dict], changes) -> tuple[list[float], int]:
    """Seconds from each change to the end of the first window deciding the new truth."""
    lat, never = [], 0
    for onset, label, offset in changes:
        hit = next((w for w in windows if w["t1"] > onset and w["t0"] < offset
                    and w.get("decision") == label), None)
        if hit is None:
            never += 1
        else:
            lat.append(round(hit["t1"] - onset, 6))
    return lat, never


def score(windows: list[dict], classes: list[str], hop_s: float | None = None,
          truth_spans=None) -> Scores:
    """Score a list of `windows.jsonl` records (see module docstring)."""
    n = len(windows)
    decisions = [w.get("decision") for w in windows]
    duration = windows[-1]["t1"] if windows else 0.0
    if hop_s is None:
        hop_s = (windows[1]["t0"] - windows[0]["t0"]) if n > 1 else 0.0
    changes = switch_count(decisions)
    minutes = duration / 60.0
    decided = {c: 0.0 for c in classes}
    for d in decisions:
        if d in decided:
            decided[d] += hop_s
    idx = {c: i for i, c in enumerate(classes)}
    cm = np.zeros((len(classes), len(classes) + 1), dtype=int)
    scored = [w for w in windows if w.get("truth") in idx]
    for w in scored:
        d = w.get("decision")
        cm[idx[w["truth"]], idx.get(d, len(classes)) if d is not None else len(classes)] += 1
    correct = int(np.trace(cm[:, :len(classes)]))
    per_class, recalls = {}, []
    for c, i in idx.items():
        support = int(cm[i].sum())
        predicted = int(cm[:, i].sum())
        tp = int(cm[i, i])
        p = tp / predicted if predicted else None
        r = tp / support if support else None
        f1 = (2 * p * r / (p + r) if p and r else 0.0) if p is not None and r is not None else None
        per_class[c] = {"support": support, "precision": p, "recall": r, "f1": f1}
        if r is not None:
            recalls.append(r)
    chg = truth_changes(windows, truth_spans)
    lat, never = latencies(windows, chg)
    return Scores(
        classes=list(classes), windows=n, duration_s=duration, with_truth=len(scored),
        accuracy=correct / len(scored) if scored else None,
        balanced_accuracy=float(np.mean(recalls)) if recalls else None,
        per_class=per_class, confusion=cm.tolist(), changes=changes,
        switches_per_min=changes / minutes if minutes > 0 else None, decided_s=decided,
        latencies=lat, never_reached=never, truth_changes=len(chg))
