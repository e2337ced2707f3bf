"""From the compute thread to the UI: an observer that never blocks and drops no result the UI
can still take.

`UIBridge.on_window` (compute thread) appends each result to a deque (bounded at
`QUEUE_KEEP`, more than a day of windows, so a days-long run cannot grow it) and posts a
`NewWindows` notification; `on_status` posts one `Status` snapshot per batch. Notifications
of one kind replace each other in the UI's message queue (`can_replace`), so a slow UI skips
stale redraw requests, never results: the UI thread drains the whole deque when it handles
one. The deque's ``append`` and ``popleft`` are atomic, so no lock is needed.
"""

from __future__ import annotations

import collections
from dataclasses import dataclass

from textual.message import Message

from monitor.decisions.contract import EngineStatus, ObserverBase, WindowResult


class NewWindows(Message):
    """Results are waiting in the bridge (many notifications collapse into one)."""

    def can_replace(self, message: Message) -> bool:
        """True for another `NewWindows`: one waiting notification is enough to drain them all."""
        return isinstance(message, NewWindows)


@dataclass(frozen=True)
class SessionStatus:
    """What the health panel shows: the engine's snapshot plus the writer's and the capture
    policy's counts, read on the compute thread where they are owned or published.

    Attributes
    ----------
    engine : EngineStatus
        The engine's snapshot.
    snippets : int
        Snippets captured.
    write_error : str or None
        The writer's failure.
    """

    engine: EngineStatus
    snippets: int
    write_error: str | None


class Status(Message):
    """The newest `SessionStatus` (a newer one replaces an unhandled older one).

    Parameters
    ----------
    status : SessionStatus
        The figures.
    """

    def __init__(self, status: SessionStatus) -> None:
        super().__init__()
        self.status = status

    def can_replace(self, message: Message) -> bool:
        """True for another `Status`: only the newest snapshot matters."""
        return isinstance(message, Status)


QUEUE_KEEP = 200_000  # results waiting for the UI at most: more than a day at a 0.5 s hop


class UIBridge(ObserverBase):
    """The engine observer that hands results and status to the UI (see module docstring).

    Parameters
    ----------
    app : textual.app.App
        Receives the messages through ``post_message``, which never blocks.
    """

    def __init__(self, app) -> None:
        self.app = app
        # bounded for days-long runs: a UI that took no results for a whole day (it drains
        # them every frame) would lose the oldest from the screen, never from the session
        self._q: collections.deque[WindowResult] = collections.deque(maxlen=QUEUE_KEEP)
        self.handle = None  # the session's handle, attached before the first window

    def attach(self, handle) -> None:
        """Keep the session's handle, for each status's snippet count and writer error."""
        self.handle = handle

    def on_window(self, result: WindowResult) -> None:
        """Queue the result and post a `NewWindows` notification; compute thread, never blocks."""
        self._q.append(result)
        self.app.post_message(NewWindows())

    def on_status(self, status: EngineStatus) -> None:
        """Post the engine's snapshot with the snippet count and the writer's error as a `Status`.

        Runs on the compute thread and never blocks.
        """
        h = self.handle
        snippets = h.snippet_count() if h is not None else 0
        error = h.write_error() if h is not None else None
        self.app.post_message(Status(SessionStatus(status, snippets, error)))

    def drain(self) -> list[WindowResult]:
        """Every result queued so far, oldest first (UI thread)."""
        out = []
        while True:
            try:
                out.append(self._q.popleft())
            except IndexError:
                return out
