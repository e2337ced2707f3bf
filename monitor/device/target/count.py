"""Instructions the C front end executes on a Cortex-M core, counted in emulation.

QEMU here has no plugins, so the count rests on its instruction counter: with ``-icount
shift=0`` the emulated clock advances exactly one nanosecond per executed instruction
(QEMU's documentation of ``-icount``), and the core's SysTick, clocked from that emulated
time by the board's processor clock, reads it. ``count.c`` (beside this module; its output
lines are read here, their one owner) measures how many instructions a tick is on a loop of
known length (two instructions a turn) and checks it on another (four a turn): a count is
good to one tick (31 to 50 instructions on these boards), and a board where the second loop
does not come out within a tick is refused. Every count is of instructions, not cycles.

What is counted: `sm_frontend_init`, `sm_features_i16` on whole windows, and `sm_push_hop`
one hop at a time; the steady hop is the mean over the hops after the first complete window
(those reuse the frames a hop shares). The samples are the rows of ``pcm.csv``: a vectors
folder's, or for a card alone seeded noise with a tone (`signal_rows`), because the counts
depend a little on the data (soft float, the log's branches).
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from monitor.device.target.cores import Core
from monitor.device.target.cross import COUNT_SOURCE, EmulationFailed, Toolchain, build, run
from monitor.features.card import ModelCard

__all__ = ["Counts", "count_folder", "count_card", "signal_rows", "parse_counts", "ROWS"]

ROWS = 4  # windows of samples the count runs through (the stream: their hops in turn)


@dataclass(frozen=True, kw_only=True)
class Counts:
    """Instructions counted on one core (each good to about `per_tick` instructions).

    Attributes
    ----------
    core : str
        The core's name.
    per_tick : float
        Instructions per SysTick tick, measured on the two-instruction loop.
    check_expected : int
        Instructions of the four-instruction loop, known from its code.
    check_counted : float
        What the count made of it.
    init : float
        `sm_frontend_init`.
    windows : tuple of float
        `sm_features_i16`, one per row.
    hops : tuple of (bool, float)
        `sm_push_hop` in turn: whether it completed a window, and its instructions.
    """

    core: str
    per_tick: float
    check_expected: int
    check_counted: float
    init: float
    windows: tuple[float, ...]
    hops: tuple[tuple[bool, float], ...]

    @property
    def window(self) -> float:
        """Mean instructions of one whole window (`sm_features_i16`)."""
        return float(np.mean(self.windows))

    @property
    def steady_hops(self) -> tuple[float, ...]:
        """The hops after the first complete window that completed one (the steady state)."""
        ready = [n for ok, n in self.hops if ok]
        return tuple(ready[1:])

    @property
    def hop(self) -> float | None:
        """Mean instructions of a steady hop, or None without two complete windows."""
        steady = self.steady_hops
        return float(np.mean(steady)) if steady else None


def parse_counts(core: str, text: str) -> Counts:
    """`Counts` from the lines ``count.c`` prints (its format is described there).

    Parameters
    ----------
    core : str
        The core's name.
    text : str
        The program's standard output.

    Returns
    -------
    Counts
        The counts, in instructions.

    Raises
    ------
    EmulationFailed
        A line is missing, or the check loop does not come out within one tick of its
        known instructions (the count cannot be trusted on that board).
    """
    cal = chk = init = None
    windows: list[int] = []
    hops: list[tuple[bool, int]] = []
    for line in text.splitlines():
        f = line.split()
        if f[:1] == ["calibration"] and len(f) == 3:
            cal = (int(f[1]), int(f[2]))
        elif f[:1] == ["check"] and len(f) == 3:
            chk = (int(f[1]), int(f[2]))
        elif f[:1] == ["init"] and len(f) == 2:
            init = int(f[1])
        elif f[:1] == ["window"] and len(f) == 3:
            windows.append(int(f[2]))
        elif f[:1] == ["hop"] and len(f) == 4:
            hops.append((f[2] == "1", int(f[3])))
    if cal is None or chk is None or init is None or not windows or cal[1] <= 0:
        raise EmulationFailed(f"the instruction count on {core} printed no complete result")
    per_tick = cal[0] / cal[1]
    counted = chk[1] * per_tick
    if abs(counted - chk[0]) > per_tick:
        raise EmulationFailed(f"the instruction count on {core} is off: a loop of {chk[0]} "
                              f"instructions counted {counted:.0f}")
    return Counts(core=core, per_tick=per_tick, check_expected=chk[0], check_counted=counted,
                  init=init * per_tick, windows=tuple(w * per_tick for w in windows),
                  hops=tuple((ok, n * per_tick) for ok, n in hops))


def signal_rows(card: ModelCard, rows: int = ROWS, *, seed: int = 0) -> np.ndarray:
    """`rows` windows of int16 samples: seeded white noise at -30 dBFS RMS and a 1 kHz tone
    at -20 dBFS (AES17 levels), one recording cut into windows.

    Parameters
    ----------
    card : ModelCard
        Its sample rate and window length.
    rows : int
        Windows.
    seed : int
        The noise's seed.

    Returns
    -------
    numpy.ndarray
        ``(rows, window_samples)`` int16.
    """
    n = rows * card.window_samples
    t = np.arange(n) / card.sample_rate
    x = np.random.default_rng(seed).normal(0.0, 10 ** (-30 / 20), n)
    x += 10 ** (-20 / 20) * np.sin(2 * np.pi * 1000.0 * t)
    return np.clip(np.round(x * 32768), -32768, 32767).astype(np.int16).reshape(rows, -1)


def count_folder(folder: Path, core: Core, *, work: Path, toolchain: Toolchain,
                 timeout: float = 900) -> Counts:
    """Count the front end of `folder` (its ``frontend_constants.h`` and ``pcm.csv``) on `core`.

    The front end's source is the package's own ``frontend.c``, or ``frontend_q15.c`` for a
    q15 card's header.

    Parameters
    ----------
    folder : Path
        Holds ``frontend_constants.h`` and ``pcm.csv`` (a vectors folder does).
    core : Core
        The core.
    work : Path
        A folder for the build.
    toolchain : Toolchain
        Compiler and emulator.
    timeout : float
        Seconds for the run.

    Returns
    -------
    Counts
        The counts.

    Raises
    ------
    EmulationFailed
        It did not build, run or count (see `parse_counts`).
    """
    from monitor.device import source_for_header

    source = source_for_header((folder / "frontend_constants.h").read_text())
    elf = build(core=core, sources=[source, COUNT_SOURCE],
                include=[folder, source.parent],
                out=work / f"count-{core.name}.elf", toolchain=toolchain,
                defines=(f"SM_COUNT_ROWS={ROWS}",))
    r = run(elf=elf, core=core, cwd=folder, toolchain=toolchain, timeout=timeout, icount=True)
    if r.returncode != 0:
        raise EmulationFailed(f"the instruction count on {core.name} failed (exit "
                              f"{r.returncode}): {(r.stderr or r.stdout).strip()[-200:]}")
    return parse_counts(core.name, r.stdout)


def count_card(card: ModelCard, core: Core, *, work: Path, toolchain: Toolchain) -> Counts:
    """Count `card`'s front end on `core` over `signal_rows` (written into `work`).

    Parameters
    ----------
    card : ModelCard
        The card.
    core : Core
        The core.
    work : Path
        A folder for the header, the samples and the build.
    toolchain : Toolchain
        Compiler and emulator.

    Returns
    -------
    Counts
        The counts.
    """
    from monitor.device.constants import header

    work.mkdir(parents=True, exist_ok=True)
    (work / "frontend_constants.h").write_text(header(card))
    buf = io.BytesIO()
    np.savetxt(buf, signal_rows(card), fmt="%d", delimiter=",")
    (work / "pcm.csv").write_bytes(buf.getvalue())
    return count_folder(work, core, work=work, toolchain=toolchain)
