"""The layout stage: the model input's axis order."""

from __future__ import annotations

import numpy as np

from monitor.base.records import record
from monitor.features.stages.base import Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import key


@record
class LayoutConfig:
    """The layout stage's key: the model input's axis order.

    Attributes
    ----------
    layout : str
        model input axes after the batch: "time_mel" (frames, bands), "mel_time" (bands,
        frames) or "flat" (frames x bands values, frame after frame); a channel axis of 1 is
        added in front or behind where the model has one.
    """
    layout: str = key(str, "model input axes after the batch: \"time_mel\" (frames, bands), "
                      "\"mel_time\" (bands, frames) or \"flat\" (frames x bands values, "
                      "frame after frame); a channel axis of 1 is added in front or behind "
                      "where the model has one", choices=("time_mel", "mel_time", "flat"))


class LayoutStage(Stage):
    """The model input's axis order: ``(frames, bands)`` as computed, swapped, or flat."""
    name, config, part = "layout", LayoutConfig, "output"

    @property
    def active(self) -> bool:
        """On for layout = "mel_time" or "flat" (time_mel is the computed order)."""
        return self.cfg.layout != "time_mel"

    def run(self, x: np.ndarray) -> np.ndarray:
        """``(..., frames, bands)`` to ``(..., bands, frames)`` ("mel_time", the last two axes
        swapped) or to ``(..., frames * bands)`` ("flat", frame after frame: the same values in
        the same memory order as "time_mel")."""
        if self.cfg.layout == "flat":
            return np.ascontiguousarray(x).reshape(*x.shape[:-2], -1)
        return np.swapaxes(x, -1, -2)

    reference = run

    def c_lines(self) -> list[str]:
        """SM_LAYOUT_MEL_TIME and SM_CHANNELS, the values per frame in the output."""
        return [c_define("SM_LAYOUT_MEL_TIME", self.cfg.layout == "mel_time",
                         "0: out[frame][band] (also flat), 1: out[band][frame]"),
                c_define("SM_CHANNELS", self.fe.bands(), "values per frame in the output")]
