"""The window stage: each frame times a Hann or Hamming window (Harris 1978)."""

from __future__ import annotations

from typing import Any

import numpy as np

from monitor.base.records import record
from monitor.features.dsp import window_coefficients
from monitor.features.stages.base import FrontendLike, ScalingLike, Stage
from monitor.features.stages.ctext import c_floats
from monitor.features.stages.keys import AudioConfig, key


@record
class WindowConfig:
    """The window stage's keys: Hann or Hamming, periodic or symmetric.

    Attributes
    ----------
    window : str
        "hann" or "hamming" (Harris 1978); periodic unless window_symmetric.
    window_symmetric : bool
        true: the symmetric window (np.hanning) instead of the periodic one.
    """
    window: str = key(str, "\"hann\" or \"hamming\" (Harris 1978); periodic unless "
                      "window_symmetric", choices=("hann", "hamming"))
    window_symmetric: bool = key(bool, "true: the symmetric window (np.hanning) instead of the "
                                 "periodic one", default=False, off=False)


class WindowStage(Stage):
    """Each frame times the Hann or Hamming window, placed in a zero-filled FFT buffer.

    Parameters
    ----------
    audio : AudioConfig
        The card's ``[audio]`` table.
    fe : FrontendLike
        The card's ``[frontend]`` table.
    scaling : ScalingLike
        The card's ``[scaling]`` table.
    """
    name, config, part = "window", WindowConfig, "frames"

    def __init__(self, audio: AudioConfig, fe: FrontendLike, scaling: ScalingLike) -> None:
        super().__init__(audio, fe, scaling)
        f = self.fe.framing
        self.window = window_coefficients(f.frame_length, kind=self.cfg.window,
                                          symmetric=self.cfg.window_symmetric)
        self.fft_length, self.offset = f.fft_length, f.offset

    @staticmethod
    def width(cfg: Any, fe: FrontendLike, width: int) -> int:
        """fft_length values per frame (the FFT buffer)."""
        return fe.framing.fft_length

    def run(self, x: np.ndarray) -> np.ndarray:
        """Windowed frames placed in zero-filled FFT buffers ``(..., fft_length)``."""
        out = np.zeros((*x.shape[:-1], self.fft_length), np.float32)
        np.multiply(x, self.window, out=out[..., self.offset: self.offset + x.shape[-1]])
        return out

    def reference(self, x: np.ndarray) -> np.ndarray:
        """Frames of `span` samples times the float64 window at `offset` (zeros elsewhere)."""
        f = self.fe.framing
        w = np.zeros(f.span)
        w[f.offset: f.offset + f.frame_length] = window_coefficients(
            f.frame_length, kind=self.cfg.window, symmetric=self.cfg.window_symmetric,
            dtype=np.float64)
        return x * w

    def c_lines(self) -> list[str]:
        """The window table ``sm_window`` (frame_length float32 coefficients)."""
        return [c_floats("sm_window", self.window)]

    def c_tables(self) -> dict[str, int]:
        """``sm_window``: 4 bytes per coefficient."""
        return {"sm_window": 4 * self.window.size}

    def ops(self, new_frames: int) -> dict[str, int]:
        """frame_length multiplies per new frame."""
        return {"window multiply": new_frames * self.window.size}
