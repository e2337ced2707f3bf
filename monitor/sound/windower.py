"""Cuts windows of `window` samples every `hop` samples out of the stream read from the ring.

Window positions are sample counts from the session start. After a gap (audio lost in the
ring or at the device) no window is built across the missing stretch: the next window starts
at the first hop-grid position after the gap, so window times stay on the same grid as a
replay without loss, and the gap is reported on that window.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Window:
    """One window: its first sample on the session clock, its samples and the gap before it.

    Attributes
    ----------
    start : int
        Index of its first sample on the session clock (model rate).
    samples : numpy.ndarray
        ``(window_samples,)`` float32.
    gap : int
        Samples lost just before it.
    """

    start: int  # first sample, from session start
    samples: np.ndarray  # (window,) float32, read-only: a view of the stream's samples
    gap: int  # samples lost since the previous window


class Windower:
    """Cuts a stream, pushed chunk by chunk, into windows on the hop grid (see module docstring).

    Parameters
    ----------
    window : int
        Samples per window, >= 1.
    hop : int
        Samples between window starts, >= 1.

    Raises
    ------
    ValueError
        `window` or `hop` below 1.
    """

    def __init__(self, window: int, hop: int) -> None:
        if window < 1 or hop < 1:
            raise ValueError(f"window={window} and hop={hop} must be >= 1")
        self.window, self.hop = int(window), int(hop)
        self._buf = np.zeros(0, dtype=np.float32)
        self._buf_start = 0  # absolute index of _buf[0]
        self.next_start = 0
        self._pending_gap = 0
        self.span: np.ndarray | None = None  # the last push's windows' samples, one view

    @property
    def end(self) -> int:
        """Absolute index one past the newest sample seen (gaps included)."""
        return self._buf_start + self._buf.shape[0]

    def push(self, chunk: np.ndarray, gap: int = 0) -> list[Window]:
        """Add the next samples (after `gap` lost ones); return the windows now complete.

        The windows' samples are views of the pushed chunks (no copy): a chunk must not be
        changed after it is pushed (the engine pushes the fresh arrays the ring hands out).
        With overlapping windows, `span` is then their samples as one view (the first
        window's and each later one's last hop), else None.
        """
        if gap:
            resume = self.end + gap
            self._pending_gap += gap
            self._buf = np.zeros(0, dtype=np.float32)
            self._buf_start = resume
            if self.next_start < resume:
                self.next_start = -(-resume // self.hop) * self.hop
        if chunk.size:
            self._buf = np.concatenate((self._buf, chunk)) if self._buf.size else chunk
            self._buf.setflags(write=False)  # the windows are views of it: read-only
        out: list[Window] = []
        while self.next_start + self.window <= self.end:
            if self.next_start >= self._buf_start:
                a = self.next_start - self._buf_start
                # a view, not a copy: the buffer is only ever replaced, never written into
                # (the ring hands out fresh arrays), so the samples stay as they were
                out.append(Window(self.next_start, self._buf[a:a + self.window],
                                  self._pending_gap))
                self._pending_gap = 0
            self.next_start += self.hop
        # one push's windows all lie in this buffer, one hop apart: with overlap, their
        # samples from the first's start to the last's end are one view, no copy
        self.span = None
        if out and self.hop <= self.window:
            a = out[0].start - self._buf_start
            self.span = self._buf[a:out[-1].start - self._buf_start + self.window]
        drop = min(max(0, self.next_start - self._buf_start), self._buf.shape[0])
        if drop:
            self._buf = self._buf[drop:]
            self._buf_start += drop
        return out


def windows_of(x: np.ndarray, window: int, hop: int) -> np.ndarray:
    """Every whole window of `window` samples, one every `hop`, of a signal held in memory.

    The same cut the `Windower` makes of a stream without gaps: window k starts at sample
    ``k * hop``. Returns a read-only strided view of shape ``(n, window)``.

    Parameters
    ----------
    x : numpy.ndarray
        ``(samples,)``.
    window : int
        Samples per window.
    hop : int
        Samples between window starts.

    Returns
    -------
    numpy.ndarray
        ``(n, window)``, a read-only view of `x` (no copy); n is 0 when `x` is shorter than a
        window.
    """
    x = np.asarray(x)
    if x.shape[0] < window:
        return np.zeros((0, window), x.dtype)
    view = np.lib.stride_tricks.sliding_window_view(x, window)
    return view[::hop]
