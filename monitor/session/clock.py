"""A session's clocks: the wall clock, the monotonic clock and the boot they belong to.

Here, not in `runfolder`, so that a session records its clocks without importing the run
folder's module (a replay is no field run).
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any


def boot_id() -> str | None:
    """The kernel's id of this boot (``/proc/sys/kernel/random/boot_id``, proc(5)), or None.

    Monotonic times are comparable only within one boot; the id says which one.

    Returns
    -------
    str or None
        The id, or None where the kernel does not give one.
    """
    try:
        return Path("/proc/sys/kernel/random/boot_id").read_text().strip() or None
    except OSError:
        return None


def clock_now() -> dict[str, Any]:
    """Both clocks now: ``wall`` (seconds since the epoch), ``mono`` (CLOCK_MONOTONIC) and ``boot``.

    Returns
    -------
    dict
        The three values.
    """
    return {"wall": round(time.time(), 3), "mono": round(time.monotonic(), 3), "boot": boot_id()}


def iso_utc(wall: float) -> str:
    """A wall-clock time as ISO 8601 in UTC (``2026-12-04T06:00:00Z``).

    Parameters
    ----------
    wall : float
        Seconds since the epoch.

    Returns
    -------
    str
        The time.

    Raises
    ------
    OverflowError, ValueError, OSError
        A time beyond what the C library's calendar holds.
    """
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(wall))
