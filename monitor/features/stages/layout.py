"""The layout stage: the model input's axis order."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.features.stages.base import Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import key


@dataclass(frozen=True)
class LayoutConfig:
    """The layout stage's key: the model input's axis order, "time_mel" or "mel_time".

    Attributes
    ----------
    layout : str
        model input axes after the batch: "time_mel" (frames, bands) or "mel_time" (bands,
        frames); a channel axis is added if the model has one.
    """
    layout: str = key(str, "model input axes after the batch: \"time_mel\" (frames, bands) or "
                      "\"mel_time\" (bands, frames); a channel axis is added if the model has "
                      "one", choices=("time_mel", "mel_time"))


class LayoutStage(Stage):
    """The model input's axis order: ``(frames, bands)`` as computed, or swapped."""
    name, config, part = "layout", LayoutConfig, "output"

    @property
    def active(self) -> bool:
        """On for layout = "mel_time" (time_mel is the computed order)."""
        return self.cfg.layout == "mel_time"

    def run(self, x: np.ndarray) -> np.ndarray:
        """The last two axes swapped: ``(..., frames, bands)`` to ``(..., bands, frames)``."""
        return np.swapaxes(x, -1, -2)

    reference = run

    def c_lines(self) -> list[str]:
        """SM_LAYOUT_MEL_TIME and SM_CHANNELS, the values per frame in the output."""
        return [c_define("SM_LAYOUT_MEL_TIME", self.cfg.layout == "mel_time",
                         "0: out[frame][band], 1: out[band][frame]"),
                c_define("SM_CHANNELS", self.fe.bands(), "values per frame in the output")]
