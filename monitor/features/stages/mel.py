"""The mel stage: the spectrum weighted by triangular mel bands (HTK or Slaney 1998)."""

from __future__ import annotations

from typing import Any

import numpy as np

from monitor.base.records import record
from monitor.features.dsp import mel_filterbank
from monitor.features.stages.base import FrontendLike, ScalingLike, Stage, blocked_product
from monitor.features.stages.ctext import c_define, c_floats, c_ints, sparse_bank
from monitor.features.stages.framing import FramingStage
from monitor.features.stages.keys import MAX_BANDS, AudioConfig, CardProblem, key


@record
class MelConfig:
    """The mel stage's keys: band count, edges in Hz, mel scale, normalisation, triangles.

    Attributes
    ----------
    mel_bands : int
        triangular mel bands.
    fmin : float
        Hz, lower edge of the lowest band.
    fmax : float
        Hz, upper edge of the highest band, at most sample_rate / 2.
    mel_scale : str
        "htk" (2595 log10(1 + f/700)) or "slaney".
    mel_norm : str
        "none" or "slaney" (each band scaled to unit area in Hz).
    mel_triangles : str
        "hz": triangles linear in Hz at the FFT bins (librosa); "mel": linear in mel
        (TensorFlow, CMSIS-DSP).
    """
    mel_bands: int = key(int, "triangular mel bands", lo=1, hi=MAX_BANDS)
    fmin: float = key(float, "Hz, lower edge of the lowest band", lo=0.0)
    fmax: float = key(float, "Hz, upper edge of the highest band, at most sample_rate / 2",
                      lo=0.0, above=True)
    mel_scale: str = key(str, "\"htk\" (2595 log10(1 + f/700)) or \"slaney\"",
                         choices=("htk", "slaney"))
    mel_norm: str = key(str, "\"none\" or \"slaney\" (each band scaled to unit area in Hz)",
                        choices=("none", "slaney"))
    mel_triangles: str = key(str, "\"hz\": triangles linear in Hz at the FFT bins (librosa); "
                             "\"mel\": linear in mel (TensorFlow, CMSIS-DSP)",
                             choices=("hz", "mel"))

    def check(self, fe: FrontendLike, audio: AudioConfig) -> None:
        """CardProblem unless fmin < fmax <= sample_rate / 2 and mel_bands <= the FFT bins."""
        nyq = audio.sample_rate / 2
        if not self.fmin < self.fmax:
            raise CardProblem(f"frontend.fmin={self.fmin} must be >= 0 and below "
                              f"fmax={self.fmax}")
        if self.fmax > nyq:
            raise CardProblem(f"frontend.fmax={self.fmax} is above the Nyquist frequency "
                              f"{nyq:g} Hz of sample_rate={audio.sample_rate}")
        bins = fe.framing.fft_length // 2 + 1
        if self.mel_bands > bins:
            raise CardProblem(f"frontend.mel_bands={self.mel_bands} must not exceed the "
                              f"{bins} FFT bins of fft_length={fe.framing.fft_length}")


class MelStage(Stage):
    """The triangular mel filterbank (`monitor.features.dsp.mel_filterbank`) applied to each frame.

    Parameters
    ----------
    audio : AudioConfig
        The card's ``[audio]`` table.
    fe : FrontendLike
        The card's ``[frontend]`` table.
    scaling : ScalingLike
        The card's ``[scaling]`` table.
    """
    name, config, part = "mel", MelConfig, "features"
    band_name = "bands"
    per_frame = True

    def __init__(self, audio: AudioConfig, fe: FrontendLike, scaling: ScalingLike) -> None:
        super().__init__(audio, fe, scaling)
        kw = self._bank_args()
        self.weights = mel_filterbank(**kw)
        self.mel_t = np.ascontiguousarray(self.weights.T)
        self.first, self.length, self.packed = sparse_bank(self.weights)
        framing = FramingStage(audio, fe, scaling)
        self.block, self.frames = framing.block, framing.frames

    def _bank_args(self) -> dict[str, Any]:
        c = self.cfg
        return dict(sample_rate=self.audio.sample_rate,
                    fft_length=self.fe.framing.fft_length, mel_bands=c.mel_bands, fmin=c.fmin,
                    fmax=c.fmax, scale=c.mel_scale, norm=c.mel_norm, triangles=c.mel_triangles)

    @staticmethod
    def width(cfg: Any, fe: FrontendLike, width: int) -> int:
        """mel_bands values per frame."""
        return cfg.mel_bands

    def run(self, x: np.ndarray) -> np.ndarray:
        """Spectra ``(..., frames, bins)`` times the float32 filterbank: ``(..., frames,
        mel_bands)``, in blocks of a hop's frames (`base.blocked_product`), so that a frame's
        numbers never depend on how many frames or windows were computed with it."""
        return blocked_product(x, self.mel_t, self.block)

    def run_frames(self, x: np.ndarray, first: int) -> np.ndarray:
        """Rows of a stream's frames, row 0 frame `first` of a window: as in `run`."""
        return blocked_product(x, self.mel_t, self.block, first - self.frames)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same product with the filterbank built in float64."""
        return x @ mel_filterbank(**self._bank_args(), dtype=np.float64).T

    def c_lines(self) -> list[str]:
        """SM_MEL_BANDS and the filterbank in sparse form (see `sparse_bank`)."""
        return [c_define("SM_MEL_BANDS", self.cfg.mel_bands),
                c_define("SM_MEL_COEFFS", self.packed.size, "weights in the sparse table"),
                c_ints("sm_mel_first_bin", "int16_t", self.first),
                c_ints("sm_mel_length", "int16_t", self.length),
                c_floats("sm_mel_weights", self.packed)]

    def c_tables(self) -> dict[str, int]:
        """The sparse filterbank: 2 bytes per band for first bin and length, 4 per weight."""
        return {"sm_mel_first_bin": 2 * len(self.first), "sm_mel_length": 2 * len(self.length),
                "sm_mel_weights": 4 * self.packed.size}

    def c_buffers(self) -> dict[str, int]:
        """``sm_power``: one frame's spectrum, fft_length // 2 + 1 floats."""
        return {"sm_power": 4 * (self.fe.framing.fft_length // 2 + 1)}

    def ops(self, new_frames: int) -> dict[str, int]:
        """One multiply-add per stored (non-zero) weight per new frame."""
        return {"mel weights": new_frames * int(self.packed.size)}
