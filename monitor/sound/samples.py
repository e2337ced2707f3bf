"""Sample-level helpers every stage shares: 16-bit PCM, levels, clipping, down-mix.

One definition each, used by the front end, the session writer, the device tools and the
sources, so that "quantise to int16" means the same rounding everywhere.

References
----------
.. [1] AES17-2015, AES standard method for digital audio engineering: measurement of
       digital audio equipment (0 dB FS is the RMS level of a full-scale sine).
"""

from __future__ import annotations

import numpy as np

PCM16_SCALE = 32768.0
SILENCE_FLOOR_DBFS = -160.0  # the level of digital silence (JSON has no -inf)
FULL_SCALE = 0.999  # |x| at or above this counts as clipped


def to_pcm16(x: np.ndarray) -> np.ndarray:
    """Float samples in [-1, 1] to int16: ``clip(round(x * 32768), -32768, 32767)``.

    Rounding is numpy's (half to even), which the C front end reproduces.

    Parameters
    ----------
    x : numpy.ndarray
        Float samples, any shape.

    Returns
    -------
    numpy.ndarray
        int16, same shape.
    """
    return np.clip(np.round(np.asarray(x, np.float32) * np.float32(PCM16_SCALE)),
                   -32768, 32767).astype(np.int16)


def from_pcm16(q: np.ndarray) -> np.ndarray:
    """int16 samples to float32 in [-1, 1): ``q / 32768``.

    Parameters
    ----------
    q : numpy.ndarray
        int16 samples, any shape.

    Returns
    -------
    numpy.ndarray
        float32, the same shape.
    """
    return np.asarray(q).astype(np.float32) / np.float32(PCM16_SCALE)


def quantise_pcm16(x: np.ndarray) -> np.ndarray:
    """Float samples through int16 and back (what a 16-bit microphone path delivers); float32.

    Parameters
    ----------
    x : numpy.ndarray
        Float samples in [-1, 1], any shape; beyond it they are clipped to int16's range.

    Returns
    -------
    numpy.ndarray
        float32, the same shape, on int16 steps (multiples of 1 / 32768).
    """
    x = np.asarray(x, np.float32)
    q = np.clip(np.round(x * np.float32(PCM16_SCALE)), -32768, 32767)
    return (q / np.float32(PCM16_SCALE)).astype(np.float32)


def level_dbfs(x: np.ndarray) -> float:
    """Level after AES17 [1]_: ``20 log10(sqrt(2) * rms)``, so a full-scale sine reads 0.0.

    Digital silence reads `SILENCE_FLOOR_DBFS` (-160) so the value stays finite; every
    display and report uses the same floor.

    Parameters
    ----------
    x : numpy.ndarray
        Float samples, full scale 1.0.

    Returns
    -------
    float
        dBFS, at least -160.
    """
    rms = float(np.sqrt(np.mean(np.square(x, dtype=np.float64)))) if x.size else 0.0
    return max(SILENCE_FLOOR_DBFS, 20.0 * np.log10(max(np.sqrt(2.0) * rms, 1e-300)))


def clipped_fraction(x: np.ndarray) -> float:
    """Share of samples at ``|x| >= 0.999`` (full scale).

    Parameters
    ----------
    x : numpy.ndarray
        Float samples, full scale 1.0.

    Returns
    -------
    float
        From 0 to 1 (0 for no samples).
    """
    return float(np.count_nonzero(np.abs(x) >= FULL_SCALE)) / x.size if x.size else 0.0


def downmix(block: np.ndarray) -> np.ndarray:
    """Mean of the channels; `block` is ``(frames,)`` or ``(frames, channels)``; float32.

    Parameters
    ----------
    block : numpy.ndarray
        ``(frames,)`` or ``(frames, channels)``.

    Returns
    -------
    numpy.ndarray
        ``(frames,)`` float32.
    """
    if block.ndim == 1:
        return block.astype(np.float32, copy=False)
    if block.shape[1] == 1:
        return block[:, 0].astype(np.float32, copy=False)
    return block.mean(axis=1, dtype=np.float32)


def piece_sums(x: np.ndarray, piece: int) -> tuple[np.ndarray, np.ndarray]:
    """Sum of squares (float64) and count of full-scale samples of each `piece`-long piece
    of `x` (the last piece may be shorter).

    Parameters
    ----------
    x : numpy.ndarray
        Float samples.
    piece : int
        Samples per piece (a hop).

    Returns
    -------
    sums : numpy.ndarray
        Sum of squares of each piece, float64.
    clipped : numpy.ndarray
        Full-scale samples in each piece.
    """
    n = x.shape[0]
    whole = n - n % piece
    body = x[:whole].reshape(-1, piece)
    ss = np.square(body, dtype=np.float64).sum(axis=1)
    if whole < n:
        ss = np.append(ss, np.square(x[whole:], dtype=np.float64).sum())
    if n == 0 or (x.max() < FULL_SCALE and -x.min() < FULL_SCALE):
        # most audio never reaches full scale, and its extremes (no temporary arrays) say so
        # at a sixth of the cost of counting; a NaN fails the comparisons and is counted
        return ss, np.zeros(ss.shape[0], np.intp)
    cl = np.count_nonzero(np.abs(body) >= FULL_SCALE, axis=1)
    if whole < n:
        cl = np.append(cl, np.count_nonzero(np.abs(x[whole:]) >= FULL_SCALE))
    return ss, cl


def window_levels(x: np.ndarray, starts: np.ndarray, window: int,
                  piece: int) -> tuple[np.ndarray, np.ndarray]:
    """Level (dBFS, AES17) and clipped share of windows of `x`, all starting at multiples of
    `piece` (a hop), computed from hop-long pieces shared by overlapping windows.

    A window's mean square is the sum of its pieces' sums of squares over its length, so a
    window gives the same numbers alone (`x` one window, `starts` [0]) as among many.

    Parameters
    ----------
    x : numpy.ndarray
        Float samples holding every window.
    starts : numpy.ndarray
        Each window's first sample in `x`, a multiple of `piece`.
    window : int
        Samples per window.
    piece : int
        The hop, in samples.

    Returns
    -------
    levels : numpy.ndarray
        dBFS of each window (AES17), at least -160.
    clipped : numpy.ndarray
        Share of full-scale samples in each window.

    References
    ----------
    AES17-2015, "AES standard method for digital audio engineering - Measurement of digital
    audio equipment": 0 dBFS is the RMS of a full-scale sine.
    """
    ss, cl = piece_sums(x, piece)
    per = -(-window // piece)
    first = np.asarray(starts) // piece
    idx = first[:, None] + np.arange(per)[None, :]
    total = ss[idx[:, 0]].copy()
    clip = cl[idx[:, 0]].copy()
    for k in range(1, per):  # in piece order: the same additions for every window
        total += ss[idx[:, k]]
        clip += cl[idx[:, k]]
    rms = np.sqrt(total / window)
    with np.errstate(divide="ignore"):
        db = 20.0 * np.log10(np.maximum(np.sqrt(2.0) * rms, 1e-300))
    return np.maximum(db, SILENCE_FLOOR_DBFS), clip / window
