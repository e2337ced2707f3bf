"""The log stage: offset, floor, natural log, log10 or decibels with reference and top_db."""

from __future__ import annotations

import numpy as np

from monitor.base.records import record
from monitor.features.stages.base import FrontendLike, ScalingLike, Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import AudioConfig, CardProblem, key


@record
class LogConfig:
    """The log stage's keys: which log, its offset and floor, for dB its reference and top_db.

    Attributes
    ----------
    log : str
        "ln", "log10" or "db" (10 log10 of power, 20 log10 of magnitude).
    log_offset : float
        added before the log (0 with a log_floor).
    log_floor : float
        values below it are raised to it before the log (after log_offset; librosa's amin).
    db_ref : str
        log = "db": "one" (10 log10(x / 1)) or "max" (minus the window's own maximum;
        librosa's ref=np.max).
    top_db : float
        log = "db", > 0: values below the window's maximum minus top_db are raised to it.
    """
    log: str = key(str, "\"ln\", \"log10\" or \"db\" (10 log10 of power, 20 log10 of "
                   "magnitude)", choices=("ln", "log10", "db"))
    log_offset: float = key(float, "added before the log (0 with a log_floor)", lo=0.0, hi=1e6)
    log_floor: float = key(float, "values below it are raised to it before the log (after "
                           "log_offset; librosa's amin)", lo=0.0, hi=1e6, default=0.0, off=0.0)
    db_ref: str = key(str, "log = \"db\": \"one\" (10 log10(x / 1)) or \"max\" (minus the "
                      "window's own maximum; librosa's ref=np.max)", choices=("one", "max"),
                      default="one", off="one")
    top_db: float = key(float, "log = \"db\", > 0: values below the window's maximum minus "
                        "top_db are raised to it", lo=0.0, hi=1000.0, default=0.0, off=0.0)

    def check(self, fe: FrontendLike, audio: AudioConfig) -> None:
        """CardProblem when log_offset and log_floor are both 0, or top_db or db_ref "max"
        is given without log = "db".
        """
        tiny = float(np.finfo(np.float32).tiny)  # IEEE 754 binary32's smallest normal
        for name in ("log_offset", "log_floor"):
            v = getattr(self, name)
            if 0 < v < tiny:
                raise CardProblem(f"frontend.{name}={v!r} is below the smallest float32 value "
                                  f"({tiny:.4g}): the front end computes in float32, where it "
                                  f"is 0 and silence gives log(0); give {tiny:.2g} or more")
        if self.log_offset == 0 and self.log_floor == 0:
            raise CardProblem("frontend.log_offset=0.0 needs a log_floor > 0 (silence would "
                              "give log(0)); give log_offset > 0 or log_floor > 0")
        if self.top_db > 0 and self.log != "db":
            raise CardProblem(f"frontend.top_db={self.top_db} needs log = \"db\" (it floors "
                              f"decibels), not log = \"{self.log}\"")
        if self.db_ref != "one" and self.log != "db":
            raise CardProblem(f"frontend.db_ref=\"{self.db_ref}\" needs log = \"db\", not "
                              f"log = \"{self.log}\"")

    def factor(self, fe: FrontendLike) -> float:
        """dB units: 10 for power, 20 for magnitude (1 for ln and log10)."""
        return 10.0 * 2.0 / fe.spectrum.power if self.log == "db" else 1.0


class LogStage(Stage):
    """The log of each value (offset, floor, ln, log10 or dB), then dB reference and top_db.

    Parameters
    ----------
    audio : AudioConfig
        The card's ``[audio]`` table.
    fe : FrontendLike
        The card's ``[frontend]`` table.
    scaling : ScalingLike
        The card's ``[scaling]`` table.
    """
    name, config, part = "log", LogConfig, "features"

    def __init__(self, audio: AudioConfig, fe: FrontendLike, scaling: ScalingLike) -> None:
        super().__init__(audio, fe, scaling)
        self.factor = self.cfg.factor(self.fe)
        self.per_window = self.cfg.db_ref == "max" or self.cfg.top_db > 0
        self.per_frame = not self.per_window

    def run(self, x: np.ndarray) -> np.ndarray:
        """float32 log of max(x + log_offset, log_floor); db_ref and top_db over each window."""
        c = self.cfg
        y = np.add(x, np.float32(c.log_offset))
        if c.log_floor > 0:
            np.maximum(y, np.float32(c.log_floor), out=y)
        if c.log == "ln":
            np.log(y, out=y)
        else:
            np.log10(y, out=y)
            if c.log == "db":
                y *= np.float32(self.factor)
        if self.per_window:
            axes = (-2, -1)
            if c.db_ref == "max":
                y -= y.max(axis=axes, keepdims=True)
            if c.top_db > 0:
                np.maximum(y, y.max(axis=axes, keepdims=True) - np.float32(c.top_db), out=y)
        return y

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same in float64, the window's maximum taken over its last two axes."""
        c = self.cfg
        y = np.maximum(x + c.log_offset, c.log_floor)
        y = np.log(y) if c.log == "ln" else self.factor * np.log10(y)
        if c.db_ref == "max":
            y = y - y.max(axis=(-2, -1), keepdims=True)
        if c.top_db > 0:
            y = np.maximum(y, y.max(axis=(-2, -1), keepdims=True) - c.top_db)
        return y

    def c_lines(self) -> list[str]:
        """The log kind, offset, floor, dB factor, reference and top_db, SM_FRAME_FEATURES."""
        c = self.cfg
        width = self._width()
        return [c_define("SM_LOG_KIND", {"ln": 0, "log10": 1, "db": 2}[c.log],
                         "0 ln, 1 log10, 2 dB"),
                c_define("SM_LOG_OFFSET", float(c.log_offset)),
                c_define("SM_HAS_LOG_FLOOR", c.log_floor > 0),
                c_define("SM_LOG_FLOOR", float(c.log_floor)),
                c_define("SM_DB_FACTOR", float(self.factor), "10 for power, 20 for magnitude"),
                c_define("SM_DB_REF_MAX", c.db_ref == "max", "1: minus the window's maximum"),
                c_define("SM_HAS_TOP_DB", c.top_db > 0),
                c_define("SM_TOP_DB", float(c.top_db)),
                c_define("SM_FRAME_FEATURES", width, "values per frame kept in sm_frames")]

    def _width(self) -> int:
        return self.fe.mel.mel_bands if self.fe.mel is not None else \
            self.fe.framing.fft_length // 2 + 1

    def c_buffers(self) -> dict[str, int]:
        """``sm_frames``: one window's log values, frames x values per frame floats."""
        return {"sm_frames": 4 * self.fe.frames(self.audio) * self._width()}

    def ops(self, new_frames: int) -> dict[str, int]:
        """One log per new value, plus a pass over the whole window for db_ref or top_db."""
        out = {"logs": new_frames * self._width()}
        if self.per_window:
            out["dB reference (whole window)"] = self.fe.frames(self.audio) * self._width()
        return out
