"""Engine observers that print: one JSON object per window, one line per decision change,
and the one-time notice that the session writer has stopped.

They run on the compute thread and write to a stream; a closed pipe (``scenemon ... | head``)
stops the session cleanly instead of raising: the session is closed with its summary, and
the command ends quietly.
"""

from __future__ import annotations

import os
import sys
import threading
from typing import TextIO

from monitor.base.files import terminal_safe
from monitor.decisions.contract import ObserverBase, WindowResult


class _Printer(ObserverBase):
    def __init__(self, stream: TextIO | None = None, stop: threading.Event | None = None) -> None:
        self.stream = stream or sys.stdout
        self.stop = stop
        self.closed = False
        self._pending: list[str] = []

    def _write(self, text: str) -> None:
        if not self.closed:
            self._pending.append(text)

    def on_status(self, status) -> None:
        """After each batch of windows: write its lines at once and push them out (one write
        and one flush per batch, not per line: a fast replay makes thousands of lines a
        second, and an unbuffered stdout would make each its own system call)."""
        if self.closed or not self._pending:
            return
        text, self._pending = "".join(self._pending), []
        try:
            self.stream.write(text)
            self.stream.flush()
        except BrokenPipeError:
            self._broken()

    def _broken(self) -> None:
        self.closed = True
        _silence(self.stream)
        if self.stop is not None:
            self.stop.set()


def _silence(stream: TextIO) -> None:
    """Point a broken stdout at /dev/null, so that the interpreter's last flush is quiet."""
    try:
        fd = stream.fileno()
        null = os.open(os.devnull, os.O_WRONLY)
        os.dup2(null, fd)
        os.close(null)
    except (OSError, ValueError):
        pass


class HeadlessPrinter(_Printer):
    """One JSON object per window on the stream (the ``windows.jsonl`` fields of model A)."""

    def on_window(self, r: WindowResult) -> None:
        """Write the window's JSON line (pushed out once per batch by `on_status`).

        Runs on the compute thread; a closed pipe stops the session instead of raising.
        """
        self._write(r.json_line())


class ChangePrinter(_Printer):
    """One readable line per decision change (the demo without a screen); the undecided
    start is not a change.

    Parameters
    ----------
    stream : TextIO, optional
        Where the lines go (stdout).
    stop : threading.Event, optional
        Set when the stream is closed (a pipe whose reader left).
    """

    def __init__(self, stream: TextIO | None = None, stop: threading.Event | None = None) -> None:
        super().__init__(stream, stop)
        self.last: str | None = None

    def on_window(self, r: WindowResult) -> None:
        """Write one line when the decision differs from the previous window's.

        The line holds the time, the decision, its smoothed probability, model B's decision, the
        truth and "(differs)" when the truth is known and is not the decision. Compute thread.
        """
        if r.decision == self.last:
            return
        self.last = r.decision
        shown = r.decision or "undecided"
        truth = f"   truth {r.truth}" if r.truth else ""
        mark = "" if not r.truth or r.truth == r.decision else "   (differs)"
        conf = "" if r.smoothed is None or r.decision is None else f"p={max(r.smoothed):.2f}"
        b = ""
        if r.others:
            o = r.others[0]
            b = f"   B {o.decision or 'undecided'}"
        line = f"{r.t1:8.1f} s  {shown:<12} {conf:<7}{b}{truth}{mark}"
        self._write(terminal_safe(line, one_line=True) + "\n")  # class names are the card's


class WriteWatch(ObserverBase):
    """Says once, on stderr, when the session writer has stopped (disk full).

    Parameters
    ----------
    writer : SessionWriter
        The session's writer.
    stream : TextIO, optional
        Where the notice goes (stderr).
    """

    def __init__(self, writer, stream: TextIO | None = None) -> None:
        self.writer, self.said = writer, False
        self.stream = stream or sys.stderr

    def on_window(self, r: WindowResult) -> None:
        """Say the writer's error once, on the first window after it appears (compute thread)."""
        if not self.said and self.writer.error_text:
            self.said = True
            self.stream.write(f"scenemon: {self.writer.error_text}; monitoring goes on\n")
            self.stream.flush()


class Collector(ObserverBase):
    """Keeps the window records (``ms`` left out when `timings` is False): `score` and tests.

    Parameters
    ----------
    timings : bool
        Keep each record's ``ms``.
    """

    def __init__(self, *, timings: bool = True) -> None:
        self.records: list[dict] = []
        self.others: list[list[dict]] = []
        self.timings = timings

    def on_window(self, r: WindowResult) -> None:
        """Keep a copy of the window's record, and of model B's in `others`.

        Without `timings` the copy's ``ms`` is None, so results do not depend on where they ran.
        """
        rec = dict(r.record())  # a copy: the record itself is shared
        if not self.timings:
            rec["ms"] = None  # a timing would make results differ run to run: left out
        self.records.append(rec)
        for k, o in enumerate(r.others):
            while len(self.others) <= k:
                self.others.append([])
            orec = dict(o.record())
            if not self.timings:
                orec["ms"] = None
            self.others[k].append(orec)
