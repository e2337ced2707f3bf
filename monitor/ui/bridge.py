"""From the compute thread to the UI: an observer that never blocks.

`UIBridge.on_window` (compute thread) appends the result to a deque and posts one small
`NewWindows` message; messages of that kind replace each other in the UI's queue, so a slow
UI drops stale notifications, never results: the handler drains the deque (UI thread).
"""

from __future__ import annotations

import collections
import threading

from textual.message import Message


class NewWindows(Message):
    """Results are waiting in the bridge (many notifications collapse into one)."""

    def can_replace(self, message: Message) -> bool:
        return isinstance(message, NewWindows)


class UIBridge:
    def __init__(self, app) -> None:
        self.app = app
        self._q: collections.deque = collections.deque(maxlen=5000)
        self.lock = threading.Lock()

    def on_window(self, result) -> None:
        self._q.append(result)
        self.app.post_message(NewWindows())

    def drain(self) -> list:
        out = []
        while True:
            try:
                out.append(self._q.popleft())
            except IndexError:
                return out
