"""Metrics of a window stream against its truth, for `report`, `score` and `tune`.

The counting is `monitor.decisions.tally.Tally`'s (the engine and the UI use the same one); this
module turns a finished tally into the `Metrics` record the reports print. Window accuracy
and class-wise accuracy follow Mesaros, Heittola and Virtanen 2016 (see `tally`); the
confusion matrix has truth in rows (scikit-learn's convention) and undecided as its last
column. For two models on the same windows, `paired` gives their agreement and McNemar's
exact test on the windows where exactly one of them is right (McNemar 1947, "Note on the
sampling error of the difference between correlated proportions or percentages",
Psychometrika 12(2); exact binomial form).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from monitor.decisions.tally import (
    UNDECIDED,
    Tally,
    latency_median,
    latency_worst,
    level_tally,
    switches,
    tally_windows,
)

__all__ = ["UNDECIDED", "Metrics", "window_metrics", "metrics_of_tally", "paired",
           "mcnemar_exact"]


@dataclass
class Metrics:
    """The figures of one model's windows (see module docstring).

    Attributes
    ----------
    classes : list of str
        The model's classes.
    windows, with_truth : int
        Windows, and windows with a truth label.
    duration_s : float
        Seconds covered.
    accuracy, balanced_accuracy : float or None
        Overall accuracy (undecided counts as wrong) and the mean of the per-class recalls,
        over windows with truth; None without truth.
    per_class : dict
        Per class: support, precision, recall (class-wise accuracy) and F1.
    confusion : list of list of int
        Rows: truth (classes); columns: decisions (classes, then undecided).
    changes : int
        Decision changes.
    switches_per_min : float or None
        Decision changes per minute.
    decided_s : dict
        Seconds each class was the decision.
    latencies : list of float
        Seconds from each truth change to the decision that reached it.
    never_reached, truth_changes : int
        Truth changes the decision never reached, and all truth changes.
    raw_changes : int or None
        Changes of the raw top class.
    levels : dict
        Silent and clipping stretches.
    unfamiliar : dict or None
        Windows marked unfamiliar, overall and per truth class.
    model_faults, figure_faults : int
        Windows whose model output, or another figure, was not finite.

    References
    ----------
    A. Mesaros, T. Heittola and T. Virtanen, "Metrics for Polyphonic Sound Event Detection",
    Applied Sciences 6(6):162, 2016 (accuracy and class-wise accuracy of scene
    classification).
    """

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
    raw_changes: int | None = None  # changes of the raw top class (before smoothing)
    levels: dict[str, Any] = field(default_factory=dict)
    unfamiliar: dict[str, Any] | None = None
    model_faults: int = 0  # windows whose model output was not finite (flag "fault")
    figure_faults: int = 0  # windows with another non-finite figure (novelty): null, flagged

    latency_median = property(lambda self: latency_median(self.latencies),
                              doc="Median decision latency after a truth change (s), or None.")
    latency_worst = property(lambda self: latency_worst(self.latencies),
                             doc="Longest decision latency after a truth change (s), or None.")

    def to_dict(self) -> dict[str, Any]:
        """The figures as JSON-ready data (``report --json`` and the score aggregate).

        The confusion matrix comes with its row and column names (undecided last) and the
        latencies as their median and worst.
        """
        return {
            "windows": self.windows, "duration_s": self.duration_s,
            "windows_with_truth": self.with_truth, "accuracy": self.accuracy,
            "balanced_accuracy": self.balanced_accuracy, "per_class": self.per_class,
            "confusion": {"rows_truth": self.classes, "columns": self.classes + [UNDECIDED],
                          "counts": self.confusion},
            "decision_changes": self.changes, "switches_per_min": self.switches_per_min,
            "raw_top_changes": self.raw_changes,
            "decided_s": self.decided_s, "truth_changes": self.truth_changes,
            "latency_s_median": self.latency_median, "latency_s_worst": self.latency_worst,
            "latency_never_reached": self.never_reached, "levels": self.levels,
            "unfamiliar": self.unfamiliar, "model_faults": self.model_faults,
            "figure_faults": self.figure_faults,
        }


def metrics_of_tally(t: Tally) -> Metrics:
    """A finished tally as a `Metrics` record.

    Parameters
    ----------
    t : Tally
        A finished tally.

    Returns
    -------
    Metrics
        Its figures.
    """
    return Metrics(
        classes=list(t.classes), windows=t.windows, duration_s=t.duration_s,
        with_truth=t.with_truth, accuracy=t.accuracy, balanced_accuracy=t.balanced_accuracy,
        per_class=t.per_class(), confusion=t.confusion.tolist(), changes=t.changes,
        switches_per_min=t.switches_per_min, decided_s=t.decided_s(),
        latencies=list(t.latencies), never_reached=t.never_reached,
        truth_changes=t.truth_changes)


def window_metrics(windows: list[dict], classes: list[str], hop_s: float | None = None,
                   truth_spans=None) -> Metrics:
    """The metrics of a list of ``windows.jsonl`` records.

    Parameters
    ----------
    windows : list of dict
        Window records in stream order.
    classes : list of str
        The model's classes.
    hop_s : float, optional
        Seconds between windows (from the first two windows when not given).
    truth_spans : list of Span, optional
        The truth as spans (for the latency after each change); else the windows' own truth.

    Returns
    -------
    Metrics
        The figures, with raw changes, levels, unfamiliar windows and faults.

    References
    ----------
    A. Mesaros, T. Heittola and T. Virtanen, "Metrics for Polyphonic Sound Event Detection",
    Applied Sciences 6(6):162, 2016 (accuracy and class-wise accuracy of scene
    classification).
    """
    m = metrics_of_tally(tally_windows(windows, classes, hop_s=hop_s, spans=truth_spans))
    tops = [w.get("top") for w in windows]
    m.raw_changes = switches(tops)  # counted as the decision changes are
    m.levels = level_tally(windows).summary()
    # a model fault leaves the probabilities null; other faults (a non-finite novelty) do not
    m.model_faults = sum(1 for w in windows if w.get("fault") and w.get("probs") is None)
    m.figure_faults = sum(1 for w in windows if w.get("fault") and w.get("probs") is not None)
    if any("novelty" in w for w in windows):
        flagged = [w for w in windows if w.get("unfamiliar")]
        per = {}
        for c in classes:
            with_c = [w for w in windows if w.get("truth") == c]
            if with_c:
                per[c] = sum(1 for w in with_c if w.get("unfamiliar")) / len(with_c)
        m.unfamiliar = {"windows": len(flagged), "share": len(flagged) / len(windows)
                        if windows else 0.0, "share_per_truth_class": per}
    return m


def mcnemar_exact(b: int, c: int) -> float:
    """Two-sided exact McNemar p-value for `b` and `c` discordant pairs: twice the binomial
    tail ``P(X <= min(b, c))`` with ``X ~ Bin(b + c, 1/2)``, capped at 1.

    The terms are summed in log space (``log C(n, i) - n log 2``, from `math.lgamma`), so
    hours of windows (thousands of discordant pairs) neither overflow nor underflow.

    Parameters
    ----------
    b, c : int
        Windows where only A is right, and where only B is.

    Returns
    -------
    float
        The p-value, from 0 to 1.

    References
    ----------
    Q. McNemar, "Note on the sampling error of the difference between correlated proportions
    or percentages", Psychometrika 12(2), 1947.
    """
    n = b + c
    if n == 0:
        return 1.0
    k = min(b, c)
    lg = math.lgamma(n + 1) - n * math.log(2.0)
    logs = [lg - math.lgamma(i + 1) - math.lgamma(n - i + 1) for i in range(k + 1)]
    top = max(logs)
    tail = math.exp(top) * math.fsum(math.exp(x - top) for x in logs)
    return min(1.0, 2.0 * tail)


def pair_counts(wa: list[dict], wb: list[dict]) -> list[int]:
    """Counts of two models' decisions on the same windows, for `paired_summary`.

    Counts of several files add up (element by element) to the counts of all their windows.

    Parameters
    ----------
    wa, wb : list of dict
        Model A's and model B's window records of the same windows.

    Returns
    -------
    list of int
        Windows compared, windows with the same decision, and of the windows with truth:
        both right, neither right, only A right, only B right.
    """
    n = min(len(wa), len(wb))
    same = sum(1 for a, b in zip(wa[:n], wb[:n]) if a.get("decision") == b.get("decision"))
    only_a = only_b = both = neither = 0
    for a, b in zip(wa[:n], wb[:n]):
        t = a.get("truth")
        if t is None:
            continue
        ra, rb = a.get("decision") == t, b.get("decision") == t
        both += ra and rb
        neither += not ra and not rb
        only_a += ra and not rb
        only_b += rb and not ra
    return [n, same, both, neither, only_a, only_b]


def paired(wa: list[dict], wb: list[dict]) -> dict[str, Any]:
    """Agreement of two models' decisions on the same windows, and McNemar's exact test on
    the windows with truth where exactly one of them is right.

    Parameters
    ----------
    wa, wb : list of dict
        Model A's and model B's window records of the same windows.

    Returns
    -------
    dict
        Windows compared, decision agreement, windows both, neither, only A and only B got
        right, McNemar's p-value and a sentence saying it (`paired_summary`).
    """
    return paired_summary(pair_counts(wa, wb))


def paired_summary(counts: list[int]) -> dict[str, Any]:
    """`paired`'s figures from `pair_counts` (of one file, or added up over many).

    Parameters
    ----------
    counts : list of int
        `pair_counts`' six counts.

    Returns
    -------
    dict
        Windows compared, decision agreement, windows both, neither, only A and only B got
        right, McNemar's p-value and a sentence saying it.
    """
    n, same, both, neither, only_a, only_b = counts
    p = mcnemar_exact(only_a, only_b)
    if only_a + only_b:
        sentence = (f"B is right on {only_b} windows where A is wrong, A on {only_a} where B is "
                    f"wrong; p = {p:.2g} (McNemar's exact test; neighbouring windows are not "
                    f"independent, so this p-value is optimistic)")
    else:
        sentence = "A and B are right and wrong on the same windows"
    return {"windows": n, "decision_agreement": same / n if n else None,
            "both_right": both, "neither_right": neither, "only_a_right": only_a,
            "only_b_right": only_b, "mcnemar_p": p, "sentence": sentence}
