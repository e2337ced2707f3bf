"""Single-producer / single-consumer float32 ring with overrun and gap accounting.

Threads: the producer (the PortAudio callback or a file source's thread) calls `write`,
which never blocks, never allocates sample memory and takes no lock: it copies into the
preallocated array and then publishes the new write count with one attribute store. The
consumer (the engine's compute thread) calls `read`. When the consumer falls behind by more
than the capacity, the oldest audio has been overwritten: `read` skips it, counts the lost
samples and returns that count as the gap before the returned samples.

Positions are absolute sample counts from the start of the stream, so the consumer always
knows where on the sample clock its samples sit, gaps included.
"""

from __future__ import annotations

import time
from collections import deque

import numpy as np


class RingBuffer:
    """A float32 ring of `capacity` samples (see module docstring).

    Parameters
    ----------
    capacity : int
        Samples the ring holds (at least 1).

    Raises
    ------
    ValueError
        A capacity below 1.
    """

    def __init__(self, capacity: int) -> None:
        if capacity < 1:
            raise ValueError(f"capacity={capacity} must be >= 1")
        self.capacity = int(capacity)
        self._buf = np.zeros(self.capacity, dtype=np.float32)
        self._claimed = 0  # producer: end of the write in progress
        self._written = 0  # producer: end of the last complete write (published)
        self.last_write_t = 0.0  # producer: time.monotonic() of the last write
        self._read = 0  # consumer only
        self.overruns = 0  # consumer: reads that found lost audio
        self.dropped = 0  # consumer: samples lost in total
        self.producer_overflows = 0  # producer: input-overflow flags seen by the source
        self.skipped = 0  # consumer: samples the producer skipped (device gaps), in total
        self._skips: deque[tuple[int, int]] = deque()  # (where, how many): producer appends

    # producer side
    def write(self, block: np.ndarray) -> None:
        """Copy `block` (1-D float32) in; never blocks. Overwrites the oldest audio when full."""
        n = block.shape[0]
        start = self._written
        self._claimed = start + n
        if n > self.capacity:  # only the newest capacity samples can survive
            block = block[n - self.capacity:]
            start += n - self.capacity
            n = self.capacity
        pos = start % self.capacity
        first = min(n, self.capacity - pos)
        self._buf[pos:pos + first] = block[:first]
        if first < n:
            self._buf[:n - first] = block[first:]
        self._written = self._claimed
        self.last_write_t = time.monotonic()

    def skip(self, n: int) -> None:
        """Producer: advance the clock by `n` samples that never arrived (a device gap).

        The consumer's `read` stops before them and reports them as the gap before the
        samples that follow, so no window is cut across them.
        """
        n = int(n)
        if n <= 0:
            return
        self._skips.append((self._written, n))  # before the count is published
        self._claimed = self._written + n
        self._written = self._claimed

    def free(self) -> int:
        """Space the producer may fill without overwriting unread audio."""
        return self.capacity - (self._written - self._read)

    # consumer side
    @property
    def written(self) -> int:
        """The producer's published write count: the absolute end of the stream, skips included."""
        return self._written

    @property
    def read_position(self) -> int:
        """Consumer side: the absolute sample the next `read` starts at (before any skip)."""
        return self._read

    def available(self) -> int:
        """Samples written and not yet read (consumer side).

        Above `capacity` when the producer has overrun the consumer; the next `read` then skips
        the lost ones and reports them as its gap.
        """
        return self._written - self._read

    def _jump_skips(self) -> int:
        """Consumer: move past device gaps that start at or before the read position."""
        skipped = 0
        while self._skips and self._skips[0][0] <= self._read:
            at, k = self._skips.popleft()
            if at + k > self._read:
                skipped += at + k - self._read
                self._read = at + k
        return skipped

    def read(self, max_samples: int | None = None) -> tuple[np.ndarray, int]:
        """Take the unread samples.

        Parameters
        ----------
        max_samples : int, optional
            Take at most this many (the oldest first).

        Returns
        -------
        samples : numpy.ndarray
            1-D float32 copy, starting at the old read position plus `gap`.
        gap : int
            Samples lost just before `samples`: overwritten before they could be read, or
            skipped by the producer (a device gap).
        """
        w = self._written
        lost = 0
        skipped = self._jump_skips()  # a device gap where the reader stands: not an overrun
        if w - self._read > self.capacity:
            lost = w - self.capacity - self._read
            self._read += lost
            skipped += self._jump_skips()  # (a gap the overrun jumped over counts as lost)
        n = w - self._read
        if self._skips:  # stop before the next device gap
            n = min(n, self._skips[0][0] - self._read)
        if max_samples is not None:
            n = min(n, max_samples)
        start = self._read
        pos = start % self.capacity
        first = min(n, self.capacity - pos)
        out = np.empty(n, dtype=np.float32)
        out[:first] = self._buf[pos:pos + first]
        if first < n:
            out[first:] = self._buf[:n - first]
        # The producer may have overwritten the front of what we copied meanwhile.
        torn = self._claimed - self.capacity - start
        if torn > 0:
            torn = min(torn, n)
            out = out[torn:]
            lost += torn
        self._read = start + n
        if lost:
            self.overruns += 1
            self.dropped += lost
        self.skipped += skipped
        return out, lost + skipped
