"""The fixed-point front end (card ``arithmetic = "q15"``): a bit-exact model of
``frontend_q15.c``, the integer front end a board without a floating-point unit runs.

Every step is integer arithmetic on int64 arrays, each the very operation the C does (the
same rounding, the same shifts, the same tables, which this module computes and the C
receives in ``frontend_constants.h``), so the laptop computes what the board computes, bit
for bit. The formats, per frame of ``frame_length`` int16 samples:

1. headroom: the frame is shifted up by ``s`` bits, the most that keeps its largest sample
   within int16 (``s = 0`` for a frame that reaches half of full scale, up to 14), so that a
   quiet room keeps the precision of a loud one; ``s`` is undone in the log;
2. window: ``(x << s) * w >> 16`` rounded, window coefficients in q31: the windowed sample in
   q30 (a q15 product would put a noise floor 96 dB under the frame's peak; q30, not q31,
   because the FFT's complex input, two samples in one value, may reach sqrt(2) of a sample);
3. FFT: the real FFT as a complex FFT of N/2 points (even samples real, odd imaginary) and
   one split step; radix-2 decimation in time on q31 values, twiddles in q31; each stage
   halves: the twiddle product is taken halved and rounded (the high word of the 64-bit
   product plus 2^31), the other input halved with rounding, then added and subtracted in
   32 bits; the split halves twice the same way: the spectrum is ``X / N`` in q30, bins
   0 .. N/2 (no stage can overflow: no value exceeds sqrt(2) times the frame's largest
   sample, below 2^31);
4. spectrum: ``re^2 + im^2`` in int64 (q60), to q46 with rounding for power 2; the integer
   square root (floor) in q30, then ``<< 11`` (q41), for magnitude;
5. mel: band weights in unsigned q15, each band scaled to a peak of 1 (its gain ``g`` is added
   back as ``log2 g`` in the log), summed in int64 (a band's sum stays below 2^61: Parseval);
6. log: the offset (and floor) converted to the sum's units for this frame's shift, added
   (the sum shifted right by ``d`` bits first where the shifted offset would pass 2^62);
   ``log2`` from the bit length and a table of 257 q24 values of ``log2(1 + i/256)`` with
   linear interpolation (error below 3e-6 in log2 units); the constants ``log2 g``,
   ``-E + power * log2(N)``, ``-power * s`` and ``d`` added in q24; times ln 2, log10 2 or the dB
   factor times log10 2 (q28) to the feature's units in q16 (int32);
7. per window: dB reference ("max") and ``top_db`` on the q16 values; the DCT (mfcc) with q30
   coefficients (the lifter folded in), rounded to q16;
8. scaling folded into one integer multiply: ``((u - mean_q16) * A + 2^(a-1)) >> a`` with
   ``A = round(2^a / std)``, saturated to int32, q16; the model input is that integer times
   2^-16 (float32, exact below 256 in magnitude).

Where precision goes: the window's q31 coefficients, the FFT's
rounding (about half a q31 step per stage, relative to a frame that headroom keeps near full
scale), q46 power (bins 138 dB below full scale), the q15 mel weights relative to each band's
peak (2^-16), the log table (3e-6 log2), and the q16 output (1.5e-5 in feature units).

References
----------
.. [1] Oppenheim, A. V. and Schafer, R. W. Discrete-Time Signal Processing, 3rd ed., 9.3
       (decimation-in-time FFT) and 6.9 (scaling against overflow in fixed-point FFTs).
.. [2] Arm Ltd. CMSIS-DSP, ``arm_mfcc_q15`` (q15 samples, q15 mel and DCT coefficients,
       q8.7 output): the library the tests compare with.
"""

from __future__ import annotations

import math

import numpy as np

from monitor.features.stages.keys import CardProblem
from monitor.features.stages.pcm import MEL_SUM_BITS, NO_PER_WINDOW

FEATURE_Q = 16  # fraction bits of a feature value (int32)
LOG_Q = 24  # fraction bits of a log2 value
LOG_TABLE_BITS = 8  # 256 segments of the log2 table
FACTOR_Q = 28  # fraction bits of the log2 -> feature units factor
DCT_Q = 30
SUM_LIMIT_BITS = 62  # the offset's shifted value stays below 2^62


def log2_table() -> np.ndarray:
    """The log2 table: ``round(log2(1 + i / 256) * 2^24)`` for i = 0 .. 256.

    Returns
    -------
    numpy.ndarray
        ``(257,)`` int64, q24.
    """
    i = np.arange((1 << LOG_TABLE_BITS) + 1, dtype=np.float64)
    return np.round(np.log2(1.0 + i / (1 << LOG_TABLE_BITS)) * (1 << LOG_Q)).astype(np.int64)


def bit_length(v: np.ndarray) -> np.ndarray:
    """Bits of each positive int64 (``int.bit_length``), exactly (float64 only as a guess).

    Parameters
    ----------
    v : numpy.ndarray
        int64 values >= 1.

    Returns
    -------
    numpy.ndarray
        int64, the same shape.
    """
    v = np.asarray(v, np.int64)
    e = np.frexp(v.astype(np.float64))[1].astype(np.int64)  # rounding may say one too many
    e -= (np.right_shift(v, np.maximum(e - 1, 0)) == 0).astype(np.int64)
    e += (np.right_shift(v, np.minimum(e, 63)) > 0).astype(np.int64)
    return e


def log2_q24(v: np.ndarray, table: np.ndarray) -> np.ndarray:
    """``log2(v)`` in q24 for int64 ``v >= 1``: the bit length and the interpolated table.

    Parameters
    ----------
    v : numpy.ndarray
        int64, every value >= 1.
    table : numpy.ndarray
        `log2_table()`.

    Returns
    -------
    numpy.ndarray
        int64, q24.
    """
    e = bit_length(v) - 1
    mant = np.where(e >= 30, np.right_shift(v, np.maximum(e - 30, 0)),
                    np.left_shift(v, np.maximum(30 - e, 0)))  # q30 in [1, 2)
    low = 30 - LOG_TABLE_BITS
    i = np.right_shift(mant, low) - (1 << LOG_TABLE_BITS)
    frac = mant & ((1 << low) - 1)
    t0, t1 = table[i], table[i + 1]
    return (e << LOG_Q) + t0 + np.right_shift((t1 - t0) * frac + (1 << (low - 1)), low)


def isqrt64(v: np.ndarray) -> np.ndarray:
    """``floor(sqrt(v))`` of int64 values ``0 <= v <= 2^62`` (a q62 power), exactly.

    Parameters
    ----------
    v : numpy.ndarray
        int64 values from 0 to 2^62.

    Returns
    -------
    numpy.ndarray
        int64, the same shape.
    """
    r = np.floor(np.sqrt(v.astype(np.float64))).astype(np.int64)
    r -= (r * r > v).astype(np.int64)  # float64 may round up near a square
    r -= (r * r > v).astype(np.int64)
    r += ((r + 1) * (r + 1) <= v).astype(np.int64)
    return r


def q_round(x: np.ndarray, bits: int, *, limit: int | None = None) -> np.ndarray:
    """``round(x * 2^bits)`` as int64 (numpy's rounding, half to even), clipped to
    ``[-limit - 1, limit]`` when given: how every table of the q15 front end is made.

    Parameters
    ----------
    x : array_like
        float64 values.
    bits : int
        Fraction bits.
    limit : int, optional
        The largest value kept.

    Returns
    -------
    numpy.ndarray
        int64.
    """
    q = np.round(np.asarray(x, np.float64) * (1 << bits)).astype(np.int64)
    return q if limit is None else np.clip(q, -limit - 1, limit)


def headroom(frames: np.ndarray) -> np.ndarray:
    """Bits each int16 frame can be shifted up by with its largest magnitude staying within
    32767 (0 for an all-zero frame or one at half scale or more; at most 14).

    Parameters
    ----------
    frames : numpy.ndarray
        ``(..., n)`` int16 samples (any integer type).

    Returns
    -------
    numpy.ndarray
        ``(...)`` int64 shifts.
    """
    m = np.max(np.abs(frames.astype(np.int64)), axis=-1)
    s = np.zeros(m.shape, np.int64)
    for k in range(1, 15):
        s += ((m > 0) & (np.left_shift(m, k) <= 32767)).astype(np.int64)
    return s


class FixedFrontEnd:
    """The q15 front end of one card: tables built once, windows computed in integers.

    Parameters
    ----------
    card : ModelCard
        A card with ``arithmetic = "q15"`` (kind "logmel" or "mfcc").

    Attributes
    ----------
    window, tw_re, tw_im, mel, offset_q, floor_q, log_const, table, dct, mean_q, mul_q :
        numpy.ndarray
        The integer tables the C receives (`monitor.device.constants.fixed_tables`).

    Raises
    ------
    CardProblem
        The card standardises each window (the q15 front end does not).
    """

    def __init__(self, card) -> None:
        self.card = card
        fe = card.frontend
        by = {s.name: s for s in card.stages()}
        self.framing, self.centre, self.layout = by["framing"], by["centre"], by["layout"]
        f = fe.framing
        self.n, self.length, self.offset, self.step = (f.fft_length, f.frame_length,
                                                       f.offset, f.frame_step)
        self.frames = self.framing.frames
        self.power = int(fe.spectrum.power)
        self.bits = int(math.log2(self.n))
        from monitor.features.dsp import window_coefficients

        w = window_coefficients(f.frame_length, kind=fe.window.window,
                                symmetric=fe.window.window_symmetric, dtype=np.float64)
        self.window = q_round(w, 31, limit=(1 << 31) - 1)
        k = np.arange(self.n // 2 + 1)  # e^(-2 pi i k / N), k = 0 .. N/2 (-1 exact in q31)
        self.tw_re = q_round(np.cos(2 * np.pi * k / self.n), 31, limit=(1 << 31) - 1)
        self.tw_im = q_round(-np.sin(2 * np.pi * k / self.n), 31, limit=(1 << 31) - 1)
        half = self.n // 2  # the real FFT: a complex FFT of N/2 points, then one split step
        rev = np.zeros(half, np.int64)
        for b in range(self.bits - 1):
            rev |= ((np.arange(half) >> b) & 1) << (self.bits - 2 - b)
        self.bitrev = rev
        weights = np.asarray(by["mel"].weights, np.float64)  # (bands, bins)
        gain = weights.max(axis=1)
        gain[gain <= 0] = 1.0
        self.gain = gain
        self.mel = np.round(weights / gain[:, None] * 32768.0).astype(np.int64)  # uint16 in C
        self.bands = weights.shape[0]
        log = fe.log
        self.sum_bits = MEL_SUM_BITS[self.power]  # the mel sum's fraction bits E
        units = (1 << self.sum_bits) / float(self.n) ** self.power
        self.offset_q = np.round(log.log_offset * units / gain).astype(np.int64)
        self.floor_q = np.round(log.log_floor * units / gain).astype(np.int64)
        big = np.maximum(self.offset_q, self.floor_q)
        self.offset_bits = np.where(big > 0, bit_length(np.maximum(big, 1)), 0)
        self.log_const = (q_round(np.log2(gain), LOG_Q)
                          - ((self.sum_bits - self.power * self.bits) << LOG_Q))
        self.table = log2_table()
        per_log2 = {"ln": math.log(2.0), "log10": math.log10(2.0)}.get(
            log.log, log.factor(fe) * math.log10(2.0))
        self.factor = int(round(per_log2 * (1 << FACTOR_Q)))
        self.db_max = log.log == "db" and log.db_ref == "max"
        self.top_db = (int(q_round(log.top_db, FEATURE_Q)) if log.log == "db" and log.top_db > 0
                       else 0)
        self.dct, self.dct_bits = None, DCT_Q
        if fe.kind == "mfcc":  # q30, fewer bits where a lifter makes coefficients above 1
            big = float(np.max(np.abs(by["dct"].matrix)))
            self.dct_bits = DCT_Q - max(0, math.ceil(math.log2(big)) if big > 0 else 0)
            self.dct = q_round(by["dct"].matrix, self.dct_bits, limit=(1 << 31) - 1)
        sc = by["scaling"]
        if sc.cfg.per_window != "none":
            raise CardProblem(NO_PER_WINDOW)
        mean = np.asarray(sc.cfg.mean, np.float64)
        inv = 1.0 / np.asarray(sc.cfg.std, np.float64)
        self.scale_bits = int(min(40, max(8, 30 - math.ceil(math.log2(max(float(inv.max()),
                                                                               1e-9))))))
        self.mean_q = q_round(mean, FEATURE_Q)
        self.mul_q = np.round(inv * (1 << self.scale_bits)).astype(np.int64)

    @property
    def used_bins(self) -> tuple[int, int]:
        """The first and last FFT bin any mel band weights (0, 0 when none does): the bins
        whose power the C computes."""
        used = np.flatnonzero(self.mel.any(axis=0))
        return (int(used[0]), int(used[-1])) if used.size else (0, 0)

    # --- per frame --------------------------------------------------------------------
    def fft(self, re: np.ndarray, im: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Radix-2 decimation-in-time FFT of q31 rows ``(..., M)``, M = N / 2, halved each
        stage: ``Z / M`` (twiddles ``e^(-2 pi i k / M)``, every second of the N-point table)."""
        m = self.n // 2
        re, im = re[..., self.bitrev], im[..., self.bitrev]
        lead = re.shape[:-1]
        size = 2
        while size <= m:
            half, stride = size // 2, self.n // size
            wr, wi = self.tw_re[::stride][:half], self.tw_im[::stride][:half]
            r = re.reshape(*lead, m // size, size)
            i = im.reshape(*lead, m // size, size)
            ar, ai, br, bi = r[..., :half], i[..., :half], r[..., half:], i[..., half:]
            # the product halved and rounded: the high word of a 64-bit sum (SMULL, SMLAL)
            tr = np.right_shift(br * wr - bi * wi + (1 << 31), 32)
            ti = np.right_shift(br * wi + bi * wr + (1 << 31), 32)
            ar, ai = np.right_shift(ar + 1, 1), np.right_shift(ai + 1, 1)
            re = np.concatenate([ar + tr, ar - tr], axis=-1).reshape(*lead, m)
            im = np.concatenate([ai + ti, ai - ti], axis=-1).reshape(*lead, m)
            size *= 2
        return re, im

    def rfft(self, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``X / N`` of real q31 rows ``(..., N)``, bins 0 .. N/2: the even samples as real and
        the odd as imaginary parts of an N/2-point FFT (`fft`), then the split
        ``X[k] = (A + W^k B / i) / 4`` with ``A = Z[k] + conj(Z[M - k])``,
        ``B = Z[k] - conj(Z[M - k])``, halved twice with rounding (Oppenheim and Schafer,
        Discrete-Time Signal Processing, 9.x: two real sequences in one complex FFT)."""
        m = self.n // 2
        zr, zi = self.fft(y[..., 0::2], y[..., 1::2])
        k = np.arange(m + 1)
        a, b = k % m, (m - k) % m
        yr, yi, cr, ci = zr[..., a], zi[..., a], zr[..., b], -zi[..., b]
        sr, si = np.right_shift(yr + cr + 1, 1), np.right_shift(yi + ci + 1, 1)  # A / 2
        dr, di = np.right_shift(yr - cr + 1, 1), np.right_shift(yi - ci + 1, 1)  # B / 2
        wr, wi = self.tw_re, self.tw_im
        tr = np.right_shift(di * wr + dr * wi + (1 << 31), 32)  # W (B / 2) / i, halved
        ti = np.right_shift(di * wi - dr * wr + (1 << 31), 32)
        return np.right_shift(sr + 1, 1) + tr, np.right_shift(si + 1, 1) + ti

    def frame_values(self, frames: np.ndarray) -> np.ndarray:
        """Log values in q16 of int16 frames ``(..., frame_length)``: ``(..., bands)`` int64."""
        x = np.asarray(frames, np.int64)
        s = headroom(x)
        y = np.right_shift(np.left_shift(x, s[..., None]) * self.window + (1 << 15), 16)  # q30
        buf = np.zeros((*x.shape[:-1], self.n), np.int64)
        buf[..., self.offset:self.offset + self.length] = y
        re, im = self.rfft(buf)
        p = re * re + im * im  # q60
        if self.power == 2:
            p = np.right_shift(p + (1 << 13), 14)  # q46
        else:
            p = np.left_shift(isqrt64(p), 11)  # q30 -> q41
        acc = p @ self.mel.T  # (..., bands), below 2^61
        ps = (self.power * s)[..., None]
        d = np.maximum(self.offset_bits + ps - SUM_LIMIT_BITS, 0)
        v = np.right_shift(acc, d) + np.left_shift(self.offset_q, ps - d)
        v = np.maximum(v, np.left_shift(self.floor_q, ps - d))
        v = np.maximum(v, 1)
        l2 = log2_q24(v, self.table) + self.log_const + np.left_shift(d - ps, LOG_Q)
        return np.right_shift(l2 * self.factor + (1 << (LOG_Q + FACTOR_Q - FEATURE_Q - 1)),
                              LOG_Q + FACTOR_Q - FEATURE_Q)

    # --- per window -------------------------------------------------------------------
    def window_frames(self, pcm: np.ndarray) -> np.ndarray:
        """The int16 frames ``(n, frames, frame_length)`` of int16 windows ``(n, W)``."""
        x = self.centre.run(pcm) if self.centre.active else pcm
        return np.asarray(self.framing.run(x))

    def finish(self, u: np.ndarray) -> np.ndarray:
        """Per-window steps of q16 frame values ``(n, frames, bands)``: dB reference,
        ``top_db``, DCT; time-major q16 int64."""
        if self.db_max or self.top_db:
            peak = u.max(axis=(-2, -1), keepdims=True)
            if self.db_max:
                u = u - peak
                peak = np.zeros_like(peak)
            if self.top_db:
                u = np.maximum(u, peak - self.top_db)
        if self.dct is not None:
            u = np.right_shift(u @ self.dct.T + (1 << (self.dct_bits - 1)), self.dct_bits)
        return u

    def scaled_q(self, u: np.ndarray) -> np.ndarray:
        """The model input in q16 (int64 values of int32 range) from time-major q16 features:
        layout, then the folded scaling, saturated to int32 (a tiny std can take a value
        beyond it)."""
        x = self.layout.run(u) if self.layout.active else u
        a = self.scale_bits
        y = np.right_shift((x - self.mean_q) * self.mul_q + (1 << (a - 1)), a)
        return np.clip(y, -(1 << 31), (1 << 31) - 1)  # saturated to int32, as the C stores it

    def unscaled_q(self, pcm: np.ndarray) -> np.ndarray:
        """Time-major q16 features ``(n, frames, values)`` of int16 windows ``(n, W)``."""
        return self.finish(self.frame_values(self.window_frames(pcm)))

    def stream_q(self, signal: np.ndarray, n: int) -> np.ndarray:
        """`unscaled_q` of `n` windows one hop apart in int16 `signal`, each frame computed
        once (integers: the same numbers as window by window)."""
        hop, step = self.card.hop_samples, self.step
        if self.centre.active or hop % step:
            w = np.lib.stride_tricks.sliding_window_view(signal, self.card.window_samples)
            return self.unscaled_q(w[::hop][:n])
        r = hop // step
        total = (n - 1) * r + self.frames
        view = np.lib.stride_tricks.sliding_window_view(signal, self.length)
        frames = view[self.offset_in_window()::step][:total]
        vals = np.concatenate([self.frame_values(frames[a:a + 512])
                               for a in range(0, total, 512)])
        idx = (np.arange(n) * r)[:, None] + np.arange(self.frames)[None, :]
        return self.finish(vals[idx])

    def offset_in_window(self) -> int:
        """The window sample where frame 0's samples start (no centre padding)."""
        return self.framing.cfg.offset if self.framing.cfg.window_in_frame == "centre" else 0


def to_pcm16(windows: np.ndarray) -> np.ndarray:
    """float32 samples to int16 steps (``pcm_bits = 16``'s rounding: half to even, clipped),
    the fixed front end's input.

    Parameters
    ----------
    windows : numpy.ndarray
        Float samples in [-1, 1].

    Returns
    -------
    numpy.ndarray
        int64 values of int16 range, the same shape.
    """
    from monitor.sound.samples import to_pcm16 as pcm

    return pcm(np.asarray(windows, np.float32)).astype(np.int64)


def as_float(q: np.ndarray) -> np.ndarray:
    """q16 integers as float32: rounded once to float32 (exact below 2^24 in magnitude; through
    float64, which holds every int32 exactly), times 2^-16 (exact): the C's
    ``(float)q * (1.0f / 65536)``.

    Parameters
    ----------
    q : numpy.ndarray
        q16 integers.

    Returns
    -------
    numpy.ndarray
        float32, the same shape.
    """
    return np.asarray(q).astype(np.float64).astype(np.float32) * np.float32(2.0 ** -FEATURE_Q)
