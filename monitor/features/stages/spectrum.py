"""The spectrum stage: ``|rfft|^power`` of each windowed frame."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from monitor.base.records import record
from monitor.features.fft import rfft
from monitor.features.stages.base import FrontendLike, Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import key


@record
class SpectrumConfig:
    """The spectrum stage's key: ``power``, 1 for magnitude, 2 for power.

    Attributes
    ----------
    power : float
        1: magnitude |X|, 2: power |X|^2.
    """
    power: float = key(float, "1: magnitude |X|, 2: power |X|^2", choices=(1.0, 2.0))


class SpectrumStage(Stage):
    """``|rfft|`` or ``|rfft|^2`` of each FFT buffer: fft_length // 2 + 1 bins."""
    name, config, part = "spectrum", SpectrumConfig, "frames"
    band_name = "bins"

    @staticmethod
    def width(cfg: Any, fe: FrontendLike, width: int) -> int:
        """fft_length // 2 + 1 bins per frame."""
        return fe.framing.fft_length // 2 + 1

    def run(self, x: np.ndarray) -> np.ndarray:
        """``re^2 + im^2`` (power 2, no square root) or ``|X|`` of the real FFT, float32.

        The FFT is ``scipy.fft.rfft``'s own (`monitor.features.fft`).
        """
        spec = rfft(x)
        if self.cfg.power == 2.0:  # |X|^2 without the square root
            mag = np.square(spec.real)
            mag += np.square(spec.imag)
            return mag
        return np.abs(spec).astype(np.float32)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """``|numpy.fft.rfft(x, n=fft_length)| ** power`` in float64."""
        return np.abs(np.fft.rfft(x, n=self.fe.framing.fft_length, axis=-1)) ** self.cfg.power

    def c_lines(self) -> list[str]:
        """SM_POWER and SM_BINS."""
        return [c_define("SM_POWER", int(self.cfg.power), "1: |X|, 2: |X|^2"),
                c_define("SM_BINS", self.fe.framing.fft_length // 2 + 1)]

    def c_buffers(self) -> dict[str, int]:
        """FFT twiddles (fft_length / 2 floats each), bit reversal (uint16) and work arrays."""
        n = self.fe.framing.fft_length
        return {"sm_cos": 4 * (n // 2), "sm_sin": 4 * (n // 2), "sm_bitrev": 2 * n,
                "sm_re": 4 * n, "sm_im": 4 * n}

    def ops(self, new_frames: int) -> dict[str, int]:
        """Radix-2 butterflies, (n / 2) log2 n, and n // 2 + 1 power values per new frame."""
        n = self.fe.framing.fft_length
        return {"FFT butterflies (radix-2)": new_frames * (n // 2) * int(math.log2(n)),
                "power spectrum": new_frames * (n // 2 + 1)}
