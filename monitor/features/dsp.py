"""Pure numpy building blocks of the front end: mel scales, filterbanks, windows, the DCT.

Each is built once per card (by the stages in `monitor.features.stages`), never per window. Nothing
here knows about cards; `monitor.features.frontend` re-exports the public names.

References
----------
.. [1] Young, S. et al. The HTK Book (mel scale ``2595 log10(1 + f/700)``).
.. [2] Slaney, M. (1998). Auditory Toolbox, Interval Research technical report 1998-010.
.. [3] Harris, F. J. (1978). On the use of windows for harmonic analysis with the discrete
       Fourier transform. Proc. IEEE 66(1).
.. [4] Ahmed, N., Natarajan, T. and Rao, K. R. (1974). Discrete cosine transform. IEEE
       Trans. Computers C-23(1) (the DCT-II).
.. [5] Juang, B.-H., Rabiner, L. R. and Wilpon, J. G. (1987). On the use of bandpass
       liftering in speech recognition. IEEE Trans. ASSP 35(7) (the sinusoidal lifter).
"""

from __future__ import annotations

from typing import Literal

import numpy as np

MelScale = Literal["htk", "slaney"]
WindowKind = Literal["hann", "hamming"]
DctNorm = Literal["ortho", "uniform"]

_SLANEY_F_SP = 200.0 / 3.0  # Hz per mel below the break
_SLANEY_MIN_LOG_HZ = 1000.0
_SLANEY_MIN_LOG_MEL = _SLANEY_MIN_LOG_HZ / _SLANEY_F_SP  # 15 mel
_SLANEY_LOGSTEP = np.log(6.4) / 27.0


def hz_to_mel(freq_hz: np.ndarray | float, *, scale: MelScale = "htk") -> np.ndarray:
    """Convert Hz to mel.

    Parameters
    ----------
    freq_hz : float or numpy.ndarray
        Frequencies in Hz, >= 0.
    scale : {"htk", "slaney"}
        "htk": ``2595 log10(1 + f/700)`` [1]_; "slaney": linear below 1 kHz at 200/3 Hz
        per mel, logarithmic above [2]_.

    Returns
    -------
    numpy.ndarray
        Mel values, float64, same shape as `freq_hz`.
    """
    f = np.asarray(freq_hz, dtype=np.float64)
    if scale == "htk":
        return 2595.0 * np.log10(1.0 + f / 700.0)
    lin = f / _SLANEY_F_SP
    with np.errstate(divide="ignore"):
        log = _SLANEY_MIN_LOG_MEL + np.log(np.maximum(f, 1e-12) / _SLANEY_MIN_LOG_HZ) / _SLANEY_LOGSTEP
    return np.where(f >= _SLANEY_MIN_LOG_HZ, log, lin)


def mel_to_hz(mel: np.ndarray | float, *, scale: MelScale = "htk") -> np.ndarray:
    """Inverse of `hz_to_mel`; float64, same shape as `mel`.

    Parameters
    ----------
    mel : numpy.ndarray or float
        Mels.
    scale : {"htk", "slaney"}
        The mel scale.

    Returns
    -------
    numpy.ndarray
        Hz, float64.
    """
    m = np.asarray(mel, dtype=np.float64)
    if scale == "htk":
        return 700.0 * (10.0 ** (m / 2595.0) - 1.0)
    lin = _SLANEY_F_SP * m
    log = _SLANEY_MIN_LOG_HZ * np.exp(_SLANEY_LOGSTEP * (m - _SLANEY_MIN_LOG_MEL))
    return np.where(m >= _SLANEY_MIN_LOG_MEL, log, lin)


def mel_band_edges(*, mel_bands: int, fmin: float, fmax: float,
                   scale: MelScale = "htk") -> np.ndarray:
    """The ``mel_bands + 2`` band edges in Hz, evenly spaced in mel; float64.

    Parameters
    ----------
    mel_bands : int
        Bands.
    fmin, fmax : float
        Hz, the lowest and highest edge.
    scale : {"htk", "slaney"}
        The mel scale.

    Returns
    -------
    numpy.ndarray
        ``(mel_bands + 2,)`` Hz.
    """
    m = np.linspace(hz_to_mel(fmin, scale=scale), hz_to_mel(fmax, scale=scale), mel_bands + 2)
    return mel_to_hz(m, scale=scale)


def mel_filterbank(*, sample_rate: int, fft_length: int, mel_bands: int, fmin: float,
                   fmax: float, scale: MelScale = "htk",
                   norm: Literal["none", "slaney"] = "none",
                   triangles: Literal["hz", "mel"] = "hz", dtype=np.float32) -> np.ndarray:
    """Triangular mel filterbank.

    Parameters
    ----------
    sample_rate : int
        Hz, > 0.
    fft_length : int
        FFT size; the bank covers its ``fft_length // 2 + 1`` bins.
    mel_bands : int
        Number of triangles, >= 1.
    fmin, fmax : float
        Lower and upper edge in Hz, ``0 <= fmin < fmax <= sample_rate / 2``.
    scale : {"htk", "slaney"}
        Mel formula.
    norm : {"none", "slaney"}
        "slaney" scales band i by ``2 / (f[i+2] - f[i])`` (unit area in Hz).
    triangles : {"hz", "mel"}
        "hz": each triangle linear in Hz, evaluated at the FFT bin frequencies (as
        `librosa.filters.mel`); "mel": linear in mel with the DC bin excluded (as
        `tf.signal.linear_to_mel_weight_matrix` and CMSIS-DSP).
    dtype : numpy dtype
        Of the result (float32 unless a float64 reference is wanted).

    Returns
    -------
    numpy.ndarray
        Weights, shape ``(mel_bands, fft_length // 2 + 1)``.
    """
    n_bins = fft_length // 2 + 1
    bin_hz = np.linspace(0.0, sample_rate / 2.0, n_bins)
    edges_hz = mel_band_edges(mel_bands=mel_bands, fmin=fmin, fmax=fmax, scale=scale)
    if triangles == "hz":
        x, edges = bin_hz, edges_hz
    else:
        x, edges = hz_to_mel(bin_hz, scale=scale), hz_to_mel(edges_hz, scale=scale)
    lower, centre, upper = edges[:-2, None], edges[1:-1, None], edges[2:, None]
    rising = (x[None, :] - lower) / (centre - lower)
    falling = (upper - x[None, :]) / (upper - centre)
    weights = np.maximum(0.0, np.minimum(rising, falling))
    if triangles == "mel":
        weights[:, 0] = 0.0
    if norm == "slaney":
        weights *= (2.0 / (edges_hz[2:] - edges_hz[:-2]))[:, None]
    return weights.astype(dtype)


def window_coefficients(length: int, *, kind: WindowKind = "hann",
                        symmetric: bool = False, dtype=np.float32) -> np.ndarray:
    """Hann or Hamming window [3]_, periodic unless `symmetric`; shape ``(length,)``.

    Parameters
    ----------
    length : int
        Samples.
    kind : {"hann", "hamming"}
        The window.
    symmetric : bool
        The symmetric window (``np.hanning``) instead of the periodic one
        (``scipy.signal.get_window``'s default).
    dtype : numpy dtype
        Of the result.

    Returns
    -------
    numpy.ndarray
        ``(length,)``.
    """
    n = np.arange(length, dtype=np.float64)
    denom = max(1, (length - 1) if symmetric else length)
    a0 = 0.5 if kind == "hann" else 0.54
    w = a0 - (1.0 - a0) * np.cos(2.0 * np.pi * n / denom)
    return w.astype(dtype)


def dct_matrix(coefficients: int, bands: int, *, norm: DctNorm = "ortho",
               lifter: float = 0.0, dtype=np.float32) -> np.ndarray:
    """DCT-II [4]_ as a matrix, optionally with the sinusoidal lifter [5]_ folded in.

    Parameters
    ----------
    coefficients : int
        Rows kept, ``1 <= coefficients <= bands``.
    bands : int
        Length of the transformed vector (the mel bands).
    norm : {"ortho", "uniform"}
        "ortho": ``scipy.fft.dct(type=2, norm="ortho")``: row 0 times ``sqrt(1 / bands)``,
        the others ``sqrt(2 / bands)``; "uniform": every row, row 0 included, times
        ``sqrt(2 / bands)`` (the convention of TensorFlow's ``mfccs_from_log_mel_spectrograms``
        and CMSIS-DSP's ``arm_mfcc_f32``).
    lifter : float
        > 0: row n (from 0) times ``1 + (lifter / 2) sin(pi (n + 1) / lifter)``.

    Returns
    -------
    numpy.ndarray
        ``(coefficients, bands)``; ``D @ x`` transforms a vector of `bands` values.
    """
    k = np.arange(coefficients, dtype=np.float64)[:, None]
    n = np.arange(bands, dtype=np.float64)[None, :]
    d = np.sqrt(2.0 / bands) * np.cos(np.pi * k * (2.0 * n + 1.0) / (2.0 * bands))
    if norm == "ortho":
        d[0] *= np.sqrt(0.5)
    if lifter > 0:
        d *= lifter_weights(coefficients, lifter)[:, None]
    return d.astype(dtype)


def lifter_weights(coefficients: int, lifter: float) -> np.ndarray:
    """``1 + (lifter / 2) sin(pi (n + 1) / lifter)`` for n = 0 .. coefficients - 1 [5]_; float64.

    Parameters
    ----------
    coefficients : int
        Coefficients kept.
    lifter : float
        The lifter parameter, > 0 (without a lifter the DCT stage does not call this).

    Returns
    -------
    numpy.ndarray
        ``(coefficients,)`` float64.
    """
    n = np.arange(coefficients, dtype=np.float64)
    return 1.0 + (lifter / 2.0) * np.sin(np.pi * (n + 1.0) / lifter)


__all__ = ["hz_to_mel", "mel_to_hz", "mel_band_edges", "mel_filterbank", "window_coefficients",
           "dct_matrix", "lifter_weights"]
