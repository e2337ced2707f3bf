"""The scaling stage: the ``[scaling]`` table, per-window standardisation, then (x - mean) / std."""

from __future__ import annotations

from dataclasses import field

import numpy as np

from monitor.base.records import record
from monitor.features.stages.base import FrontendLike, Stage
from monitor.features.stages.ctext import c_define, c_floats
from monitor.features.stages.keys import PER_WINDOW_EPS, AudioConfig, key


@record
class ScalingConfig:
    """The ``[scaling]`` table: standardisation learned in training, and per window.

    Attributes
    ----------
    mean, std : numpy.ndarray
        float32, one value, one per band, or the full feature shape.
    per_window : {"none", "standardise"}
        Standardise each window first.
    """

    mean: np.ndarray = field(default_factory=lambda: np.zeros((), np.float32), compare=False)
    std: np.ndarray = field(default_factory=lambda: np.ones((), np.float32), compare=False)
    per_window: str = key(str, "\"standardise\": minus the window's mean of all its feature "
                          "values, over their population std + 1e-8, before mean / std",
                          choices=("none", "standardise"), default="none", off="none")

    def same(self, other: ScalingConfig) -> bool:
        """True when per_window, mean and std are equal (``==`` leaves the arrays out)."""
        return (self.per_window == other.per_window and np.array_equal(self.mean, other.mean)
                and np.array_equal(self.std, other.std))


class ScalingStage(Stage):
    """The ``[scaling]`` table: optional per-window standardisation, then (x - mean) / std.

    Parameters
    ----------
    audio : AudioConfig
        The card's ``[audio]`` table.
    fe : FrontendLike
        The card's ``[frontend]`` table.
    scaling : ScalingConfig
        The card's ``[scaling]`` table.
    """
    name, config, part = "scaling", ScalingConfig, "output"

    def __init__(self, audio: AudioConfig, fe: FrontendLike, scaling: ScalingConfig) -> None:
        self.audio, self.fe, self.scaling, self.cfg = audio, fe, scaling, scaling
        self.mean = self.cfg.mean.astype(np.float32)
        self.inv_std = (1.0 / self.cfg.std).astype(np.float32)

    def run(self, x: np.ndarray) -> np.ndarray:
        """float32: each window standardised if asked, then (x - mean) times 1 / std."""
        if self.cfg.per_window == "standardise":
            axes = tuple(range(1, x.ndim))
            x = (x - x.mean(axis=axes, keepdims=True)) / (
                x.std(axis=axes, keepdims=True) + np.float32(PER_WINDOW_EPS))
        out = (x - self.mean) * self.inv_std
        return np.ascontiguousarray(out, dtype=np.float32)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same in float64, dividing by std."""
        if self.cfg.per_window == "standardise":
            axes = tuple(range(1, x.ndim))
            x = (x - x.mean(axis=axes, keepdims=True)) / (x.std(axis=axes, keepdims=True)
                                                          + PER_WINDOW_EPS)
        return (x - self.cfg.mean.astype(np.float64)) / self.cfg.std.astype(np.float64)

    def tables(self) -> tuple[int, np.ndarray, np.ndarray]:
        """(mode, mean, 1 / std) as the C code stores them: mode 0 one value, 1 one per band,
        2 the full feature shape in the model's input order."""
        mean = np.asarray(self.cfg.mean, np.float32)
        std = np.asarray(self.cfg.std, np.float32)
        shape = self.fe.shape(self.audio)
        bands = self.fe.bands()
        if mean.size == 1 and std.size == 1:
            return 0, mean.reshape(1), (1.0 / std).reshape(1)
        if (mean.size == bands and std.size == bands and mean.size != np.prod(shape)
                and len(shape) == 2):
            return 1, mean.reshape(-1), (1.0 / std).reshape(-1)
        full_m = np.broadcast_to(mean, shape).reshape(-1)
        full_s = np.broadcast_to(std, shape).reshape(-1)
        return 2, full_m, (1.0 / full_s)

    def c_lines(self) -> list[str]:
        """SM_PER_WINDOW, its epsilon, SM_SCALE_MODE and the mean and 1 / std tables."""
        mode, mean, inv_std = self.tables()
        return [c_define("SM_PER_WINDOW", self.cfg.per_window == "standardise",
                         "1: standardise each window first"),
                c_define("SM_PER_WINDOW_EPS", PER_WINDOW_EPS),
                c_define("SM_SCALE_MODE", mode, "0 one value, 1 per band, 2 full shape"),
                c_floats("sm_scale_mean", mean), c_floats("sm_scale_inv_std", inv_std)]

    def c_tables(self) -> dict[str, int]:
        """``sm_scale_mean`` and ``sm_scale_inv_std``: 4 bytes per value."""
        _, mean, inv_std = self.tables()
        return {"sm_scale_mean": 4 * mean.size, "sm_scale_inv_std": 4 * inv_std.size}

    def ops(self, new_frames: int) -> dict[str, int]:
        """One scaling per value of the window per hop, 3 more per value to standardise it."""
        n = int(np.prod(self.fe.shape(self.audio)))
        out = {"scaling (whole window)": n}
        if self.cfg.per_window == "standardise":
            out["per-window standardisation"] = 3 * n
        return out
