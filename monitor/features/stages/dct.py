"""The dct stage (kind "mfcc"): DCT-II of the log-mel and the lifter."""

from __future__ import annotations

from typing import Any

import numpy as np

from monitor.base.records import record
from monitor.features.dsp import dct_matrix, lifter_weights
from monitor.features.stages.base import FrontendLike, ScalingLike, Stage, blocked_product
from monitor.features.stages.ctext import c_define, c_floats
from monitor.features.stages.framing import FramingStage
from monitor.features.stages.keys import MAX_BANDS, AudioConfig, CardProblem, key


@record
class DctConfig:
    """The dct stage's keys (kind "mfcc"): coefficients kept, DCT-II normalisation, lifter.

    Attributes
    ----------
    mfcc : int
        kind = "mfcc": coefficients kept from the DCT-II of the log-mel.
    dct_norm : str
        "ortho" (scipy.fft.dct norm="ortho") or "uniform" (every row times sqrt(2 /
        mel_bands): TensorFlow, CMSIS-DSP).
    lifter : float
        > 0: coefficient n (from 0) times 1 + (lifter/2) sin(pi (n+1) / lifter).
    """
    mfcc: int = key(int, "kind = \"mfcc\": coefficients kept from the DCT-II of the log-mel",
                    lo=1, hi=MAX_BANDS, off=0)
    # off: "ortho" is what a card written out at the defaults carries beside kind = "logmel"
    dct_norm: str = key(str, "\"ortho\" (scipy.fft.dct norm=\"ortho\") or \"uniform\" (every "
                        "row times sqrt(2 / mel_bands): TensorFlow, CMSIS-DSP)",
                        choices=("ortho", "uniform"), off="ortho")
    lifter: float = key(float, "> 0: coefficient n (from 0) times 1 + (lifter/2) "
                        "sin(pi (n+1) / lifter)", lo=0.0, hi=1e4, default=0.0, off=0.0)

    def check(self, fe: FrontendLike, audio: AudioConfig) -> None:
        """CardProblem when mfcc exceeds mel_bands."""
        if self.mfcc > fe.mel.mel_bands:
            raise CardProblem(f"frontend.mfcc={self.mfcc} must not exceed "
                              f"mel_bands={fe.mel.mel_bands}")


class DctStage(Stage):
    """DCT-II of each log-mel frame, mfcc rows kept, lifter folded in (`monitor.features.dsp.dct_matrix`).

    Parameters
    ----------
    audio : AudioConfig
        The card's ``[audio]`` table.
    fe : FrontendLike
        The card's ``[frontend]`` table.
    scaling : ScalingLike
        The card's ``[scaling]`` table.
    """
    name, config, part = "dct", DctConfig, "features"
    per_frame = True
    band_name = "coefficients"

    def __init__(self, audio: AudioConfig, fe: FrontendLike, scaling: ScalingLike) -> None:
        super().__init__(audio, fe, scaling)
        c = self.cfg
        self.matrix = dct_matrix(c.mfcc, self.fe.mel.mel_bands, norm=c.dct_norm, lifter=c.lifter)
        self.matrix_t = np.ascontiguousarray(self.matrix.T)
        framing = FramingStage(audio, fe, scaling)
        self.block, self.frames = framing.block, framing.frames

    @staticmethod
    def width(cfg: Any, fe: FrontendLike, width: int) -> int:
        """mfcc coefficients per frame."""
        return cfg.mfcc

    def run(self, x: np.ndarray) -> np.ndarray:
        """Frames ``(..., frames, mel_bands)`` times the float32 DCT matrix: ``(..., frames,
        mfcc)``, in blocks of a hop's frames (`base.blocked_product`)."""
        return blocked_product(x, self.matrix_t, self.block)

    def run_frames(self, x: np.ndarray, first: int) -> np.ndarray:
        """Rows of a stream's frames, row 0 frame `first` of a window: as in `run`."""
        return blocked_product(x, self.matrix_t, self.block, first - self.frames)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """scipy.fft.dct type 2 ("uniform": unnormalised / sqrt(2 M)), then the lifter."""
        import scipy.fft  # the reference only: the run is a matrix product

        c = self.cfg
        if c.dct_norm == "ortho":
            y = scipy.fft.dct(x, type=2, norm="ortho", axis=-1)
        else:  # TensorFlow's mfccs_from_log_mel_spectrograms: dct(type 2) * rsqrt(2 M)
            y = scipy.fft.dct(x, type=2, axis=-1) / np.sqrt(2.0 * x.shape[-1])
        y = y[..., : c.mfcc]
        return y * lifter_weights(c.mfcc, c.lifter) if c.lifter > 0 else y

    def c_lines(self) -> list[str]:
        """SM_MFCC and the DCT matrix ``sm_dct`` (mfcc x mel_bands, lifter folded in)."""
        return [c_define("SM_MFCC", self.cfg.mfcc, "DCT-II rows kept (lifter folded in)"),
                c_floats("sm_dct", self.matrix)]

    def c_tables(self) -> dict[str, int]:
        """``sm_dct``: 4 bytes per matrix entry."""
        return {"sm_dct": 4 * self.matrix.size}

    def c_buffers(self) -> dict[str, int]:
        """``sm_row``: one frame's mel_bands floats."""
        return {"sm_row": 4 * self.fe.mel.mel_bands}

    def ops(self, new_frames: int) -> dict[str, int]:
        """mfcc x mel_bands multiply-adds per frame: of the new frames only when the log is
        per frame (the C stream keeps each frame's coefficients), else of the whole window
        (the DCT follows db_ref "max" or top_db, which depend on the whole window)."""
        log = self.fe.log
        if log.db_ref == "max" or log.top_db > 0:
            return {"DCT multiply-adds (whole window)": self.fe.frames(self.audio)
                    * self.matrix.size}
        return {"DCT multiply-adds": new_frames * self.matrix.size}
