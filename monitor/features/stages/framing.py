"""The framing stage: frames of a (padded) window, and which of them a stream shares."""

from __future__ import annotations

from typing import Any

import numpy as np

from monitor.base.records import record
from monitor.features.stages.base import FrontendLike, ScalingLike, Stage
from monitor.features.stages.ctext import c_define
from monitor.features.stages.keys import (
    MAX_FFT,
    MAX_SAMPLES,
    MAX_WORK,
    AudioConfig,
    CardProblem,
    key,
)
from monitor.features.stages.preemphasis import PreemphasisStage


@record
class FramingConfig:
    """The framing stage's keys: frame length, step and FFT size in samples, window place.

    Attributes
    ----------
    frame_length : int
        samples per frame (the window's length).
    frame_step : int
        samples between frames.
    fft_length : int
        FFT size, a power of two >= frame_length (the C front end's radix-2 FFT).
    window_in_frame : str
        "start": frame_length samples, zero-padded at the end to fft_length; "centre":
        fft_length samples, the window centred in them.
    """
    frame_length: int = key(int, "samples per frame (the window's length)", lo=2, hi=MAX_FFT)
    frame_step: int = key(int, "samples between frames", lo=1, hi=MAX_SAMPLES)
    fft_length: int = key(int, "FFT size, a power of two >= frame_length (the C front end's "
                          "radix-2 FFT)", lo=16, hi=MAX_FFT)
    window_in_frame: str = key(str, "\"start\": frame_length samples, zero-padded at the end "
                               "to fft_length; \"centre\": fft_length samples, the window "
                               "centred in them", choices=("start", "centre"), default="start")

    @property
    def span(self) -> int:
        """Samples one frame covers: frame_length ("start") or fft_length ("centre")."""
        return self.fft_length if self.window_in_frame == "centre" else self.frame_length

    @property
    def offset(self) -> int:
        """Where the window sits in the frame (and in the FFT buffer)."""
        return (self.fft_length - self.frame_length) // 2 if self.window_in_frame == "centre" else 0

    def frames(self, padded: int) -> int:
        """``1 + (L - n) // frame_step`` for a (padded) window of L samples; 0 if it is shorter."""
        return 1 + (padded - self.span) // self.frame_step if padded >= self.span else 0

    def check(self, fe: FrontendLike, audio: AudioConfig) -> None:
        """CardProblem unless fft_length is a power of two >= frame_length, a frame fits
        in the (padded) window and frames x fft_length stays within MAX_WORK.
        """
        n = self.fft_length
        if n & (n - 1):
            raise CardProblem(f"frontend.fft_length={n} must be a power of two from 16 to "
                              f"{MAX_FFT} (the C front end's radix-2 FFT)")
        if self.frame_length > n:
            raise CardProblem(f"frontend.frame_length={self.frame_length} must not exceed "
                              f"fft_length={n}")
        padded = audio.window_samples + 2 * fe.centre.pad(fe)
        if self.span > padded:
            what = "fft_length" if self.window_in_frame == "centre" else "frame_length"
            raise CardProblem(f"frontend.{what}={self.span} is longer than the window "
                              f"({padded} samples{' with the centre padding' if padded > audio.window_samples else ''})")
        if self.frames(padded) * n > MAX_WORK:
            raise CardProblem(f"frontend.frame_step={self.frame_step} gives "
                              f"{self.frames(padded)} frames of {n} points per window, more "
                              f"than {MAX_WORK} values; use a larger frame_step or a shorter "
                              f"window")


class FramingStage(Stage):
    """Frames of a (padded) window, and which of them a stream shares between windows.

    Parameters
    ----------
    audio : AudioConfig
        The card's ``[audio]`` table.
    fe : FrontendLike
        The card's ``[frontend]`` table.
    scaling : ScalingLike
        The card's ``[scaling]`` table.
    """
    name, config, part = "framing", FramingConfig, "frames"

    def __init__(self, audio: AudioConfig, fe: FrontendLike, scaling: ScalingLike) -> None:
        super().__init__(audio, fe, scaling)
        c, a = self.cfg, audio
        self.frames = self.fe.frames(a)
        pad = self.fe.pad()
        left = PreemphasisStage(audio, fe, scaling).left
        # frame t uses window samples u_t = t * step + offset - pad .. u_t + frame_length: the
        # frames that lie inside the window (past the pre-emphasis start) are the same for
        # every window that holds those samples, so a stream computes them once
        base = c.offset - pad
        lo = max(0, -(-(left - base) // c.frame_step))
        hi = min(self.frames - 1, (a.window_samples - c.frame_length - base) // c.frame_step)
        self.shared = (lo, hi)  # first and last shared frame; hi < lo: none
        self.first_sample = lo * c.frame_step + base  # window sample of the first shared frame
        hop = a.hop_samples
        self.share_step = (hop // c.frame_step
                           if hop % c.frame_step == 0 and hop // c.frame_step <= hi - lo else 0)
        self.edges = np.array([t for t in range(self.frames) if not lo <= t <= hi], np.intp)
        # frames per block of the per-frame products (mel, DCT; `base.blocked_product`): the
        # frames a hop moves on, so that a frame has the same place in every window and a
        # hop's new frames are one block
        self.block = self.share_step or self.frames

    @staticmethod
    def width(cfg: Any, fe: FrontendLike, width: int) -> int:
        """frame_length values per frame."""
        return cfg.frame_length

    def run(self, x: np.ndarray, which: np.ndarray | None = None) -> np.ndarray:
        """Frames ``(n, frames, frame_length)`` of padded windows ``(n, L)`` (a view; a copy
        of the frames `which` when given): the samples the window multiplies."""
        c = self.cfg
        view = np.lib.stride_tricks.sliding_window_view(x, c.frame_length, axis=-1)
        view = view[..., c.offset::c.frame_step, :][..., : self.frames, :]
        return view if which is None else view[..., which, :]

    def reference(self, x: np.ndarray) -> np.ndarray:
        """Frames ``(n, frames, span)``: all the samples each frame covers, as the card says."""
        c = self.cfg
        idx = np.arange(c.span)[None, :] + c.frame_step * np.arange(self.frames)[:, None]
        return x[..., idx]

    def c_lines(self) -> list[str]:
        """The frame sizes, SM_FRAMES and the shared frames a stream reuses."""
        c = self.cfg
        lo, hi = self.shared
        return [c_define("SM_FRAME_LENGTH", c.frame_length),
                c_define("SM_FRAME_STEP", c.frame_step),
                c_define("SM_FFT_LENGTH", c.fft_length),
                c_define("SM_FRAME_SPAN", c.span, "samples a frame covers"),
                c_define("SM_FRAME_OFFSET", c.offset, "where the window sits in the frame"),
                c_define("SM_FRAMES", self.frames),
                c_define("SM_SHARED_FIRST", lo, "frames lo..hi lie inside the window"),
                c_define("SM_SHARED_LAST", hi),
                c_define("SM_SHARE_STEP", self.share_step,
                         "frames per hop a stream reuses (0: recompute all)")]
