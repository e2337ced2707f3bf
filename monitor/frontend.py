"""The device-faithful front end: framing, window, FFT, mel filterbank, log, scaling, layout.

Pure numpy, float32 throughout (as the device computes it). The window and the mel matrix
are built once per card (`FrontEnd(card)`), never per window. `FrontEnd.batch` computes
many windows at once for fast replay; `FrontEnd.single` is the same computation for one
window and gives the same numbers.

References
----------
.. [1] Young, S. et al. The HTK Book (mel scale ``2595 log10(1 + f/700)``).
.. [2] Slaney, M. (1998). Auditory Toolbox, Interval Research technical report 1998-010.
.. [3] Harris, F. J. (1978). On the use of windows for harmonic analysis with the discrete
       Fourier transform. Proc. IEEE 66(1).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
import scipy.fft

from monitor.card import ModelCard
from monitor.samples import quantise_pcm16

MelScale = Literal["htk", "slaney"]

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
    """Inverse of `hz_to_mel`; float64, same shape as `mel`."""
    m = np.asarray(mel, dtype=np.float64)
    if scale == "htk":
        return 700.0 * (10.0 ** (m / 2595.0) - 1.0)
    lin = _SLANEY_F_SP * m
    log = _SLANEY_MIN_LOG_HZ * np.exp(_SLANEY_LOGSTEP * (m - _SLANEY_MIN_LOG_MEL))
    return np.where(m >= _SLANEY_MIN_LOG_MEL, log, lin)


def mel_band_edges(*, mel_bands: int, fmin: float, fmax: float,
                   scale: MelScale = "htk") -> np.ndarray:
    """The ``mel_bands + 2`` band edges in Hz, evenly spaced in mel; float64."""
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


def window_coefficients(length: int, *, kind: Literal["hann", "hamming"] = "hann",
                        symmetric: bool = False) -> np.ndarray:
    """Hann or Hamming window [3]_, periodic unless `symmetric`; shape (length,), float32."""
    n = np.arange(length, dtype=np.float64)
    denom = (length - 1) if symmetric else length
    a0 = 0.5 if kind == "hann" else 0.54
    w = a0 - (1.0 - a0) * np.cos(2.0 * np.pi * n / denom)
    return w.astype(np.float32)


class FrontEnd:
    """Features exactly as the card says, built once per card.

    Parameters
    ----------
    card : ModelCard
        The model card; its window, mel matrix and scaling arrays are precomputed here.
    """

    def __init__(self, card: ModelCard) -> None:
        self.card = card
        self.shape = card.feature_shape
        if card.kind == "logmel":
            self.window = window_coefficients(card.frame_length, kind=card.window,
                                              symmetric=card.window_symmetric)
            self.mel_t = np.ascontiguousarray(mel_filterbank(
                sample_rate=card.sample_rate, fft_length=card.fft_length,
                mel_bands=card.mel_bands, fmin=card.fmin, fmax=card.fmax,
                scale=card.mel_scale, norm=card.mel_norm, triangles=card.mel_triangles).T)
        self.mean = card.mean.astype(np.float32)
        self.inv_std = (1.0 / card.std).astype(np.float32)

    def _pcm(self, x: np.ndarray) -> np.ndarray:
        return quantise_pcm16(x) if self.card.pcm_bits == 16 else x

    def _power_frames(self, x: np.ndarray, n_frames: int) -> np.ndarray:
        """Power (or magnitude) spectra of `n_frames` frames along the last axis of `x`."""
        c = self.card
        x = self._pcm(np.asarray(x, dtype=np.float32))
        frames = np.lib.stride_tricks.sliding_window_view(x, c.frame_length, axis=-1)
        frames = frames[..., : n_frames * c.frame_step : c.frame_step, :]
        padded = np.zeros((*frames.shape[:-1], c.fft_length), np.float32)  # zero-pad at the end
        np.multiply(frames, self.window, out=padded[..., : c.frame_length])
        spec = scipy.fft.rfft(padded, axis=-1, workers=1, overwrite_x=True)
        if c.power == 2.0:  # |X|^2 without the square root
            mag = np.square(spec.real)
            mag += np.square(spec.imag)
            return mag
        return np.abs(spec).astype(np.float32)

    def _log_mel(self, mag: np.ndarray) -> np.ndarray:
        c = self.card
        # np.matmul on a stack runs one GEMM per window, so batch and single agree exactly.
        mel = np.matmul(mag, self.mel_t)
        mel += np.float32(c.log_offset)
        if c.log == "ln":
            return np.log(mel)
        if c.log == "log10":
            return np.log10(mel)
        return np.float32(10.0 * 2.0 / c.power) * np.log10(mel)

    def logmel(self, windows: np.ndarray) -> np.ndarray:
        """Unscaled log-mel, time-major.

        Parameters
        ----------
        windows : numpy.ndarray
            Shape ``(n, window_samples)``, float32 in [-1, 1].

        Returns
        -------
        numpy.ndarray
            Shape ``(n, frames, mel_bands)``, float32.
        """
        return self._log_mel(self._power_frames(windows, self.card.frames_per_window))

    def logmel_consecutive(self, signal: np.ndarray, n: int) -> np.ndarray:
        """`logmel` of `n` windows one hop apart in `signal`, each frame computed once.

        Overlapping windows share frames when the hop is a whole number of frame steps;
        the numbers equal `logmel` of the windows cut one by one.

        Parameters
        ----------
        signal : numpy.ndarray
            Shape ``((n - 1) * hop_samples + window_samples,)``.
        """
        c = self.card
        step = c.hop_samples // c.frame_step
        if c.hop_samples % c.frame_step or n == 1:
            hop = c.hop_samples
            return self.logmel(np.stack([signal[i * hop:i * hop + c.window_samples]
                                         for i in range(n)]))
        f = c.frames_per_window
        mag = self._power_frames(signal, (n - 1) * step + f)
        stack = np.stack([mag[i * step:i * step + f] for i in range(n)])
        return self._log_mel(stack)

    def unscaled(self, windows: np.ndarray) -> np.ndarray:
        """Features before layout and scaling, time-major ``(n, frames, bands)``."""
        return self.logmel(np.asarray(windows, dtype=np.float32))

    def batch(self, windows: np.ndarray) -> np.ndarray:
        """Scaled model input for many windows.

        Parameters
        ----------
        windows : numpy.ndarray
            Shape ``(n, window_samples)``, float32.

        Returns
        -------
        numpy.ndarray
            Shape ``(n, *card.feature_shape)``, float32, in the card's layout (no channel).
        """
        windows = np.asarray(windows, dtype=np.float32)
        if windows.ndim != 2 or windows.shape[1] != self.card.window_samples:
            raise ValueError(f"windows must have shape (n, {self.card.window_samples}), "
                             f"got {windows.shape}")
        if self.card.kind == "waveform":
            return self._scale(self._pcm(windows))
        return self._scale(self.logmel(windows))

    def _scale(self, feats: np.ndarray) -> np.ndarray:
        if self.card.kind == "logmel" and self.card.layout == "mel_time":
            feats = np.swapaxes(feats, 1, 2)
        out = (feats - self.mean) * self.inv_std
        return np.ascontiguousarray(out, dtype=np.float32)

    def batch_consecutive(self, signal: np.ndarray, n: int) -> np.ndarray:
        """`batch` of `n` windows one hop apart in `signal` (fast replay; same numbers)."""
        c = self.card
        signal = np.asarray(signal, dtype=np.float32)
        if signal.shape != ((n - 1) * c.hop_samples + c.window_samples,):
            raise ValueError(f"signal must hold {n} windows one hop apart, got {signal.shape}")
        if c.kind == "waveform":
            return self.batch(np.stack([signal[i * c.hop_samples:i * c.hop_samples + c.window_samples]
                                        for i in range(n)]))
        return self._scale(self.logmel_consecutive(signal, n))

    def single(self, window: np.ndarray) -> np.ndarray:
        """Scaled model input for one window of shape ``(window_samples,)``."""
        return self.batch(np.asarray(window, dtype=np.float32)[None, :])[0]


def reference_features(card: ModelCard, windows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The same card computed in float64 throughout, the reference for the float32 path.

    Returns
    -------
    unscaled : numpy.ndarray
        ``(n, frames, bands)`` float64, time-major (as `FrontEnd.unscaled`).
    scaled : numpy.ndarray
        ``(n, *card.feature_shape)`` float64, the model input (as `FrontEnd.batch`).
    """
    from monitor.samples import quantise_pcm16

    x = np.asarray(windows, np.float64)
    if card.pcm_bits == 16:
        x = quantise_pcm16(x).astype(np.float64)
    win = window_coefficients(card.frame_length, kind=card.window,
                              symmetric=card.window_symmetric).astype(np.float64)
    n = card.frames_per_window
    idx = np.arange(card.frame_length)[None, :] + card.frame_step * np.arange(n)[:, None]
    spec = np.abs(np.fft.rfft(x[:, idx] * win, n=card.fft_length, axis=-1))
    if card.power == 2.0:
        spec = spec ** 2
    w = mel_filterbank(sample_rate=card.sample_rate, fft_length=card.fft_length,
                       mel_bands=card.mel_bands, fmin=card.fmin, fmax=card.fmax,
                       scale=card.mel_scale, norm=card.mel_norm, triangles=card.mel_triangles,
                       dtype=np.float64)
    mel = spec @ w.T + card.log_offset
    if card.log == "ln":
        out = np.log(mel)
    elif card.log == "log10":
        out = np.log10(mel)
    else:
        out = (20.0 / card.power) * np.log10(mel)
    mean, std = card.mean.astype(np.float64), card.std.astype(np.float64)
    if card.layout == "mel_time":
        scaled = (np.swapaxes(out, 1, 2) - mean) / std
    else:
        scaled = (out - mean) / std
    return out, scaled
