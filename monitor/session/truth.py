"""Truth annotations: ``onset<TAB>offset<TAB>label`` lines, seconds, ``#`` comments allowed."""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass
from pathlib import Path

from monitor.base.errors import TruthError


@dataclass(frozen=True)
class Span:
    """One labelled stretch of truth, from `onset` to `offset` in seconds.

    Attributes
    ----------
    onset, offset : float
        Seconds from the session start.
    label : str
        The truth.
    """

    onset: float
    offset: float
    label: str


class TruthTrack:
    """Non-overlapping labelled spans; `label_for(t0, t1)` gives the label covering at least
    half of the window, else None.

    Parameters
    ----------
    spans : list of Span
        Non-overlapping spans (sorted here).
    """

    def __init__(self, spans: list[Span]) -> None:
        self.spans = sorted(spans, key=lambda s: s.onset)

    def label_for(self, t0: float, t1: float) -> str | None:
        """The label covering most of ``[t0, t1]``, if it covers at least half of it; else None."""
        half = (t1 - t0) / 2.0
        cover: dict[str, float] = {}
        for s in self.spans:
            if s.offset <= t0:
                continue
            if s.onset >= t1:
                break
            cover[s.label] = cover.get(s.label, 0.0) + min(s.offset, t1) - max(s.onset, t0)
        best = max(cover.items(), key=lambda kv: kv[1], default=None)
        return best[0] if best and best[1] >= half - 1e-9 else None


def parse_truth(text: str, *, where: str, classes: tuple[str, ...] | None = None) -> TruthTrack:
    """Parse truth lines (see module docstring).

    Parameters
    ----------
    text : str
        The file's text.
    where : str
        The file name, for messages.
    classes : tuple of str, optional
        When given, every label must be one of them.

    Returns
    -------
    TruthTrack
        The spans.

    Raises
    ------
    TruthError
        A malformed line, a time that is not a finite number >= 0, a span that does not end
        after it starts, a label not in `classes`, lines out of time order, or overlapping
        spans; naming the file (and the line, but for an overlap).
    """
    spans = []
    last_onset, last_line = -math.inf, 0
    for n, line in enumerate(text.splitlines(), 1):
        body = line.split("#", 1)[0].strip()
        if not body:
            continue
        parts = body.split("\t") if "\t" in body else body.split()
        if len(parts) != 3:
            raise TruthError(f"{where}: line {n} must be onset<TAB>offset<TAB>label, got {line!r}")
        try:
            onset, offset = float(parts[0]), float(parts[1])
        except ValueError:
            raise TruthError(f"{where}: line {n} has a time that is not a number: {line!r}") from None
        label = parts[2].strip()
        if not (math.isfinite(onset) and math.isfinite(offset)):
            raise TruthError(f"{where}: line {n} has a time that is not finite: {line!r}")
        if onset < 0 or offset < 0:
            raise TruthError(f"{where}: line {n} has a negative time ({onset:g}, {offset:g})")
        if offset <= onset:
            raise TruthError(f"{where}: line {n} ends at {offset:g} s, not after its onset {onset:g} s")
        if classes is not None and label not in classes:
            raise TruthError(f"{where}: line {n} has label {label!r}, which is not one of the "
                             f"model's classes ({', '.join(classes)})")
        if onset < last_onset:
            raise TruthError(f"{where}: line {n} starts at {onset:g} s, before line {last_line} "
                             f"({last_onset:g} s): lines must be in time order")
        last_onset, last_line = onset, n
        spans.append(Span(onset, offset, label))
    for a, b in zip(spans, spans[1:]):
        if b.onset < a.offset - 1e-9:
            raise TruthError(f"{where}: spans overlap ({a.onset:g}-{a.offset:g} {a.label} and "
                             f"{b.onset:g}-{b.offset:g} {b.label})")
    return TruthTrack(spans)


def load_truth(path: str | Path, *, classes: tuple[str, ...] | None = None) -> TruthTrack:
    """Read a truth file (see `parse_truth`).

    Parameters
    ----------
    path : str or Path
        The file, UTF-8 text (with or without a byte-order mark).
    classes : tuple of str, optional
        When given, every label must be one of them.

    Returns
    -------
    TruthTrack
        The spans.

    Raises
    ------
    TruthError
        The file is missing, not a regular file, not UTF-8 text, or not valid truth lines
        (`parse_truth`).
    """
    path = Path(path)
    if not path.exists():
        raise TruthError(f"{path}: truth file not found")
    if not path.is_file():  # a FIFO or a device would block or never end
        raise TruthError(f"{path}: not a regular file")
    try:
        text = path.read_text(encoding="utf-8-sig")  # a byte-order mark is read as none
    except UnicodeDecodeError:
        raise TruthError(f"{path}: truth file is not UTF-8 text") from None
    return parse_truth(text, where=str(path), classes=classes)


def format_truth(spans: list[Span]) -> str:
    """Spans as truth lines, times to the millisecond (the text of truth.tsv).

    Parameters
    ----------
    spans : list of Span
        The spans.

    Returns
    -------
    str
        ``onset<TAB>offset<TAB>label`` lines.
    """
    return "".join(f"{s.onset:.3f}\t{s.offset:.3f}\t{s.label}\n" for s in spans)


class LiveTruth:
    """Truth told live (key presses): spans opened and closed at session times.

    `set` is called from the UI thread, `label_for` from the compute thread; a lock guards
    the short list operations.

    Parameters
    ----------
    classes : tuple of str
        The labels the keys may set.
    """

    def __init__(self, classes: tuple[str, ...]) -> None:
        self.classes = classes
        self._lock = threading.Lock()
        self._closed: list[Span] = []
        self._open: tuple[float, str] | None = None

    @property
    def current(self) -> str | None:
        """The label set now, or None while the truth is unknown (any thread)."""
        with self._lock:
            return self._open[1] if self._open else None

    def set(self, label: str | None, t: float) -> None:
        """From session time `t` on the truth is `label` (None: unknown)."""
        if label is not None and label not in self.classes:
            raise ValueError(f"{label!r} is not one of {self.classes}")
        with self._lock:
            if self._open is not None:
                onset, old = self._open
                if label == old:
                    return
                if t > onset:
                    self._closed.append(Span(onset, t, old))
            self._open = (t, label) if label is not None else None

    def spans(self, end_t: float | None = None) -> list[Span]:
        """Every span so far; the open one closed at `end_t` (or left out without it)."""
        with self._lock:
            out = list(self._closed)
            if self._open is not None and end_t is not None and end_t > self._open[0]:
                out.append(Span(self._open[0], end_t, self._open[1]))
        return out

    def label_for(self, t0: float, t1: float) -> str | None:
        """The truth of one window from the spans told so far, the open one up to `t1`.

        Called on the compute thread; the rule is `TruthTrack.label_for`'s. Nothing told yet
        (a headless run: no keys) is None at once, without a track made for every window.
        """
        if self._open is None and not self._closed:  # one attribute read each: no lock needed
            return None
        return TruthTrack(self.spans(end_t=t1)).label_for(t0, t1)
