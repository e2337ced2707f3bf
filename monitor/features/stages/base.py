"""`Stage`: one step of the front end, built once from the audio, front-end and scaling configs."""

from __future__ import annotations

from typing import Any, ClassVar, Literal, Protocol

import numpy as np

from monitor.features.stages.keys import AudioConfig

Kind = Literal["waveform", "spectrogram", "logmel", "mfcc"]
Part = Literal["samples", "frames", "features", "output"]


class FrontendLike(Protocol):
    """What a stage reads of the ``[frontend]`` table (`registry.FrontendConfig` is one).

    Declared here, below the stage modules, so that a stage names the front end's type
    without importing the registry that imports it. Each stage config is the stage's own
    config class, or None when the kind does not run it.
    """

    kind: str
    pcm: Any
    preemphasis: Any
    centre: Any
    framing: Any
    window: Any
    spectrum: Any
    mel: Any
    log: Any
    dct: Any
    layout: Any

    def pad(self) -> int:
        """Samples of centre padding on each side of a window."""
        ...

    def frames(self, audio: AudioConfig) -> int:
        """Frames per window."""
        ...

    def bands(self) -> int:
        """Values per frame of the features."""
        ...

    def shape(self, audio: AudioConfig) -> tuple[int, ...]:
        """One window's model input, without batch or channel axis."""
        ...


class ScalingLike(Protocol):
    """What a stage reads of the ``[scaling]`` table (`scaling.ScalingConfig` is one)."""

    mean: np.ndarray
    std: np.ndarray
    per_window: str


class Stage:
    """One step of the front end, built once per card (matrices and windows here).

    Subclasses set `name` (their field of `FrontendConfig`), `config` (their config class),
    `part`, and override what they do. `active` is False for a switch that is off: the
    stage is then left out of the computation (and its C flag is 0).

    Parameters
    ----------
    audio : AudioConfig
        The card's ``[audio]`` table.
    fe : FrontendLike
        The card's ``[frontend]`` table.
    scaling : ScalingLike
        The card's ``[scaling]`` table.
    """

    name: ClassVar[str]
    config: ClassVar[type | None]
    part: ClassVar[Part]
    left: ClassVar[int] = 0  # samples at a window's start that differ from the stream's
    band_name: ClassVar[str | None] = None  # what its output values per frame are called
    per_frame: bool = False  # a "features" stage whose values of a frame depend on it alone

    def __init__(self, audio: AudioConfig, fe: FrontendLike, scaling: ScalingLike) -> None:
        self.audio, self.fe, self.scaling = audio, fe, scaling
        self.cfg = getattr(fe, self.name)

    @property
    def active(self) -> bool:
        """False when the card switches the stage off (it is then skipped); True here."""
        return True

    @staticmethod
    def width(cfg: Any, fe: FrontendLike, width: int) -> int:
        """Values per frame after this stage, given `width` before it."""
        return width

    def run(self, x: np.ndarray) -> np.ndarray:
        """The float32 computation."""
        return x

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same in float64, built independently where it can be."""
        return x

    def run_frames(self, x: np.ndarray, first: int) -> np.ndarray:
        """A `per_frame` stage on rows of frames ``(rows, values)`` of a stream; row 0 is
        frame `first` of a window (or of one hop further on), so that each frame goes
        through the very operations it meets in `run` of a whole window."""
        return self.run(x)

    def stream(self, x: np.ndarray) -> np.ndarray:
        """A "samples" stage applied to a stream of consecutive windows (1-D)."""
        return self.run(x[None])[0]

    def c_lines(self) -> list[str]:
        """``#define``s and constant tables for ``frontend_constants.h``."""
        return []

    def c_tables(self) -> dict[str, int]:
        """Bytes of each constant table it writes (flash)."""
        return {}

    def c_buffers(self) -> dict[str, int]:
        """Bytes of each static array ``frontend.c`` keeps for it (RAM)."""
        return {}

    def ops(self, new_frames: int) -> dict[str, int]:
        """Operations per hop when `new_frames` frames are new (the streaming C call)."""
        return {}


def blocked_product(x: np.ndarray, matrix_t: np.ndarray, block: int, place: int | None = None,
                    ) -> np.ndarray:
    """``x @ matrix_t`` over the frames axis in blocks of `block` frames, one GEMM each.

    A BLAS matrix product's rounding of a row depends on the matrix's size and on where the
    row sits in it (the kernels for the edges differ), so a frame computed with a different
    number of other frames would differ in its last bits. Here every frame's row is computed
    in a product of exactly `block` rows, at a fixed place: the blocks are laid from a
    window's end backwards (its last frame ends a block; a first block that is short is
    padded with zeros in front). With `block` the frames a hop moves on, a frame has the
    same place in every window that holds it, and a hop's new frames are one block: computed
    once for a stream of windows, a frame's values are those of each whole window, byte for
    byte.

    Parameters
    ----------
    x : numpy.ndarray
        ``(..., rows, k)`` float32: frames.
    matrix_t : numpy.ndarray
        ``(k, m)`` float32.
    block : int
        Rows per product (> 0).
    place : int, optional
        The place of row 0 of `x` in its block; by default that of a whole window's first
        frame, ``-rows % block``.

    Returns
    -------
    numpy.ndarray
        ``(..., rows, m)`` float32.
    """
    rows, k = x.shape[-2], x.shape[-1]
    front = (-rows if place is None else place) % block
    lead = x.shape[:-2]
    head = min(rows, block - front) if front else 0  # rows in a first block that is short
    body = (rows - head) // block * block  # then whole blocks
    parts = []
    if head:
        padded = np.zeros((*lead, block, k), x.dtype)
        padded[..., front:front + head, :] = x[..., :head, :]
        parts.append(np.matmul(padded, matrix_t)[..., front:front + head, :])
    if body:
        y = np.matmul(x[..., head:head + body, :].reshape(*lead, body // block, block, k),
                      matrix_t)  # one GEMM per block
        parts.append(y.reshape(*lead, body, matrix_t.shape[1]))
    if head + body < rows:  # a last block that is short (only where rows end mid-block)
        tail = rows - head - body
        padded = np.zeros((*lead, block, k), x.dtype)
        padded[..., :tail, :] = x[..., head + body:, :]
        parts.append(np.matmul(padded, matrix_t)[..., :tail, :])
    return parts[0] if len(parts) == 1 else np.concatenate(parts, axis=-2)
