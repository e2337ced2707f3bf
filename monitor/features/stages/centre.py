"""The centre stage: each window padded by fft_length // 2 samples on both sides."""

from __future__ import annotations

import numpy as np

from monitor.base.records import record
from monitor.features.stages.base import FrontendLike, Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import AudioConfig, CardProblem, key


@record
class CentreConfig:
    """The centre stage's keys: padding by fft_length // 2 samples, and with what.

    Attributes
    ----------
    center : bool
        true: pad each window by fft_length // 2 on both sides first.
    pad_mode : str
        with center: "constant" (zeros) or "reflect".
    """
    center: bool = key(bool, "true: pad each window by fft_length // 2 on both sides first",
                       default=False, off=False)
    pad_mode: str = key(str, "with center: \"constant\" (zeros) or \"reflect\"",
                        choices=("constant", "reflect"), default="constant", off="constant",
                        needs="center")

    def pad(self, fe: FrontendLike) -> int:
        """Samples padded on each side of a window: fft_length // 2 with center, else 0."""
        return fe.framing.fft_length // 2 if self.center else 0

    def check(self, fe: FrontendLike, audio: AudioConfig) -> None:
        """CardProblem for pad_mode "reflect" when the padding is not shorter than the window."""
        if self.center and self.pad_mode == "reflect" and self.pad(fe) >= audio.window_samples:
            raise CardProblem(f"frontend.pad_mode=\"reflect\" needs a window longer than the "
                              f"padding: fft_length // 2 = {self.pad(fe)} samples against "
                              f"{audio.window_samples} (use pad_mode = \"constant\")")


class CentreStage(Stage):
    """Centre padding: fft_length // 2 samples on each side of a window, zeros or reflected."""
    name, config, part = "centre", CentreConfig, "samples"

    @property
    def active(self) -> bool:
        """On when center = true."""
        return self.cfg.center

    @property
    def pad(self) -> int:
        """Samples padded on each side: fft_length // 2 with center, else 0."""
        return self.cfg.pad(self.fe)

    def run(self, x: np.ndarray) -> np.ndarray:
        """Windows padded by `pad` samples at both ends of the last axis (np.pad, pad_mode)."""
        p = self.pad
        return np.pad(x, [(0, 0)] * (x.ndim - 1) + [(p, p)], mode=self.cfg.pad_mode)

    reference = run

    def stream(self, x: np.ndarray) -> np.ndarray:
        """The stream unchanged."""
        return x  # the stream is not padded: only the frames at a window's edges see padding

    def c_lines(self) -> list[str]:
        """SM_PAD (0 when off) and SM_PAD_REFLECT."""
        return [c_define("SM_PAD", self.pad if self.active else 0, "samples padded on each side"),
                c_define("SM_PAD_REFLECT", self.active and self.cfg.pad_mode == "reflect",
                         "1: reflect, 0: zeros")]
