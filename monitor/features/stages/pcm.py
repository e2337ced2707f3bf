"""The pcm stage: the input quantised to int16 steps (``pcm_bits = 16``)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.features.stages.base import Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import key
from monitor.sound.samples import quantise_pcm16


@dataclass(frozen=True)
class PcmConfig:
    """The pcm stage's key: ``pcm_bits``, 16 to quantise the input to int16, 0 to keep it.

    Attributes
    ----------
    pcm_bits : int
        16: quantise the input to int16 first, as the device's microphone path does; 0: keep
        float.
    """
    pcm_bits: int = key(int, "16: quantise the input to int16 first, as the device's "
                        "microphone path does; 0: keep float", choices=(0, 16), default=0, off=0)


class PcmStage(Stage):
    """Quantisation of the input samples to int16 steps (``pcm_bits = 16``)."""
    name, config, part = "pcm", PcmConfig, "samples"

    @property
    def active(self) -> bool:
        """On when pcm_bits = 16."""
        return self.cfg.pcm_bits == 16

    @property
    def history(self) -> int:
        """Samples the C stream keeps: the window rounded up to whole hops."""
        a = self.audio
        return -(-a.window_samples // a.hop_samples) * a.hop_samples

    def run(self, x: np.ndarray) -> np.ndarray:
        """Samples rounded to int16 steps (x 32768, clipped to int16, / 32768), float32."""
        return quantise_pcm16(x)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same quantisation, returned as float64."""
        return quantise_pcm16(x).astype(np.float64)

    def c_lines(self) -> list[str]:
        """SM_PCM_BITS and SM_HIST_SAMPLES, the stream's history length."""
        return [c_define("SM_PCM_BITS", self.cfg.pcm_bits, "16: float input quantised to int16"),
                c_define("SM_HIST_SAMPLES", self.history,
                         "the stream's history: the window rounded up to whole hops")]

    def c_buffers(self) -> dict[str, int]:
        """The stream's history ``sm_hist`` (float32) and its int32 fill count ``sm_filled``."""
        return {"sm_hist": 4 * self.history, "sm_filled": 4}
