"""The pre-emphasis stage: y[0] = x[0], y[n] = x[n] - a x[n-1] within each window."""

from __future__ import annotations

import numpy as np

from monitor.base.records import record
from monitor.features.stages.base import Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import key


@record
class PreemphasisConfig:
    """The pre-emphasis stage's key: the coefficient ``preemphasis`` (0: off).

    Attributes
    ----------
    preemphasis : float
        a > 0: y[0] = x[0], y[n] = x[n] - a x[n-1], within each window.
    """
    preemphasis: float = key(float, "a > 0: y[0] = x[0], y[n] = x[n] - a x[n-1], within each "
                             "window", lo=0.0, hi=1.0, default=0.0, off=0.0)


class PreemphasisStage(Stage):
    """Pre-emphasis within each window (off when the coefficient is 0)."""
    name, config, part = "preemphasis", PreemphasisConfig, "samples"

    @property
    def active(self) -> bool:
        """On when preemphasis > 0."""
        return self.cfg.preemphasis > 0

    @property
    def left(self) -> int:  # type: ignore[override]
        """1 when active: a window's first sample has no predecessor inside it."""
        return 1 if self.active else 0

    def run(self, x: np.ndarray) -> np.ndarray:
        """Pre-emphasis y[0] = x[0], y[n] = x[n] - coef * x[n-1] within each window, float32."""
        y = np.empty_like(x)
        y[..., :1] = x[..., :1]
        np.subtract(x[..., 1:], np.float32(self.cfg.preemphasis) * x[..., :-1], out=y[..., 1:])
        return y

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same difference, in the input's precision (float64 in the reference)."""
        y = x.copy()
        y[..., 1:] = x[..., 1:] - self.cfg.preemphasis * x[..., :-1]
        return y

    def c_lines(self) -> list[str]:
        """SM_PREEMPHASIS, the coefficient."""
        return [c_define("SM_PREEMPHASIS", float(self.cfg.preemphasis), "y[n] = x[n] - a x[n-1]")]

    def ops(self, new_frames: int) -> dict[str, int]:
        """One multiply-subtract per new sample of the hop, when active."""
        return {"pre-emphasis": self.audio.hop_samples} if self.active else {}
