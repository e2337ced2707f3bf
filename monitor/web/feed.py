"""From the compute thread to the browsers: one small message per window, never a wait.

`StageFeed.on_window` runs on the engine's compute thread. It makes a dict of a few numbers
(`window_message`) and keeps it; `on_status`, after each batch of windows, hands the batch
to the server's event loop with `post` (the server's ``loop.call_soon_threadsafe``: it
appends to the loop's queue and writes one byte to its wake-up pipe, ignoring a full pipe;
once per batch, so a fast replay's thousands of windows a second are a few calls), so the
compute thread never waits for a browser, a socket or the loop. Everything else (the JSON
text, each viewer's bounded queue, dropping a stuck viewer) happens on the server's thread.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

from monitor.decisions.contract import ObserverBase, WindowResult


def _num(v: float | None, digits: int) -> float | None:
    return None if v is None or not math.isfinite(v) else round(float(v), digits)


def _lane(r: WindowResult) -> dict[str, Any]:
    """The figures of one model's result the stage view draws."""
    return {
        "d": r.decision,
        "top": r.top,
        "p": None if r.smoothed is None else [_num(v, 3) for v in r.smoothed.tolist()],
        "unf": None if r.novelty is None else bool(r.unfamiliar),
        "fault": r.fault is not None,
    }


def window_message(r: WindowResult) -> dict[str, Any]:
    """The message the browsers get for one window (model A's result, model B's inside).

    Parameters
    ----------
    r : WindowResult
        Model A's result of the window (model B's in ``r.others``).

    Returns
    -------
    dict
        ``i`` (the window's index), ``t`` (its end, seconds on the session clock), ``truth``,
        ``lvl`` (level in dBFS, AES17), ``clip`` (some samples at full scale), ``gap``
        (samples lost before it), ``a`` (model A: decision ``d``, raw top class ``top``,
        smoothed probabilities ``p`` in class order, unfamiliar ``unf`` or None without a
        profile, ``fault``) and ``b`` (the same for model B, or None). Nothing of the audio.
    """
    return {
        "i": r.i,
        "t": _num(r.t1, 3),
        "truth": r.truth,
        "lvl": _num(r.level_dbfs, 1),
        "clip": bool(r.clipped > 0.0),
        "gap": int(r.gap),
        "a": _lane(r),
        "b": _lane(r.others[0]) if r.others else None,
    }


class StageFeed(ObserverBase):
    """The engine observer of the stage server (see the module docstring).

    Parameters
    ----------
    post : callable
        Called on the compute thread with a list of window messages after each batch; it
        must never block (the server passes a function that schedules them on its own event
        loop).
    """

    def __init__(self, post: Callable[[list[dict[str, Any]]], None]) -> None:
        self._post = post
        self._batch: list[dict[str, Any]] = []
        self.posted = 0  # windows handed on (read by tests)

    def on_window(self, result: WindowResult) -> None:
        """Keep the window's message for the end of the batch; compute thread, never blocks."""
        self._batch.append(window_message(result))

    def on_status(self, status) -> None:
        """After each batch: hand its messages to the server at once; compute thread, never blocks."""
        if self._batch:
            batch, self._batch = self._batch, []
            self._post(batch)
            self.posted += len(batch)
