"""The device-faithful front end: the card's stages run in order, float32 throughout.

`FrontEnd(card)` builds the stages once per card (`monitor.features.stages`: window, mel matrix, DCT
matrix, scaling), never per window. `batch` computes whole windows; `single` is the same
computation for one window; `batch_consecutive` and `stream` compute each frame once for
windows that overlap, and give the very same numbers, byte for byte:

- the frames that lie inside a window (past the pre-emphasis start, clear of the centre
  padding) are the same samples through the same float32 operations in every window that
  holds them, so they are framed, windowed and transformed once and shared;
- the frames at a window's edges (centre padding, the pre-emphasis start) and everything
  after the spectrum (mel, log, dB reference, top_db, DCT, layout, scaling) are computed per
  window, on the window's stack of frames, exactly as the whole-window computation does
  (one matrix product per window, so a window's numbers never depend on how many windows
  were computed with it).

`reference_features(card, windows)` is the same card in float64 through each stage's own
reference, the check on the float32 path.

References
----------
.. [1] Young, S. et al. The HTK Book (mel scale ``2595 log10(1 + f/700)``).
.. [2] Slaney, M. (1998). Auditory Toolbox, Interval Research technical report 1998-010.
.. [3] Harris, F. J. (1978). On the use of windows for harmonic analysis with the discrete
       Fourier transform. Proc. IEEE 66(1).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from monitor.features.card import ModelCard
from monitor.features.dsp import (
    dct_matrix,
    hz_to_mel,
    lifter_weights,
    mel_band_edges,
    mel_filterbank,
    mel_to_hz,
    window_coefficients,
)
from monitor.features.stages import Stage
from monitor.features.stages.framing import FramingStage
from monitor.sound.windower import windows_of

FRAME_CHUNK = 512  # frames windowed and transformed at a time in a long run


class FrontEnd:
    """Features exactly as the card says, built once per card.

    Parameters
    ----------
    card : ModelCard
        The model card; its stages (window, mel matrix, DCT matrix, scaling arrays) are
        built here.

    Attributes
    ----------
    stages : list of Stage
        The kind's stages that change the numbers (switches that are off are left out).
    stream : FrameStream
        The live path's frame cache (see `FrameStream`).
    """

    def __init__(self, card: ModelCard) -> None:
        self.card = card
        self.shape = card.feature_shape
        self.all_stages = card.stages()
        self.stages = [s for s in self.all_stages if s.active]
        by = {s.name: s for s in self.all_stages}
        self._samples = [s for s in self.stages if s.part == "samples"]
        self._frames = [s for s in self.stages if s.part == "frames"]
        self._features = [s for s in self.stages if s.part == "features"]
        self.signal = None  # the signal operators' graph (`monitor.features.signalgraph`): it
        if card.frontend.pcm.arithmetic == "micro-signal":  # gives the mel power of each frame
            from monitor.features.signalgraph import card_graph

            self.signal = card_graph(card)
            self._features = [s for s in self._features if s.name != "mel"]
        # the leading features stages that work frame by frame run once per frame in a stream
        k = 0
        while k < len(self._features) and self._features[k].per_frame:
            k += 1
        self._frame_features, self._window_features = self._features[:k], self._features[k:]
        self._output = [s for s in self.stages if s.part == "output"]
        self.framing: FramingStage | None = by.get("framing")  # type: ignore[assignment]
        scaling = by["scaling"]
        self.mean, self.inv_std = scaling.mean, scaling.inv_std  # type: ignore[attr-defined]
        self.stream = FrameStream(self)
        self.fixed = None  # the q15 front end (`monitor.features.fixedpoint`) when the card says
        if card.frontend.pcm.arithmetic == "q15":
            from monitor.features.fixedpoint import FixedFrontEnd

            self.fixed = FixedFrontEnd(card)

    # --- the parts ----------------------------------------------------------------------
    def _run(self, stages: Sequence[Stage], x: np.ndarray) -> np.ndarray:
        for s in stages:
            x = s.run(x)
        return x

    def _spectra(self, windows: np.ndarray, which: np.ndarray | None = None) -> np.ndarray:
        """The frames part of whole windows ``(n, W)``: ``(n, frames, values)`` (only the
        frames `which` when given)."""
        x = self._run(self._samples, windows)
        x = self.framing.run(x, which)
        if self.signal is not None:
            return self.signal.mel_power(x)
        return self._run(self._frames[1:], x)

    def _stream_frames(self, signal: np.ndarray, first: int, count: int) -> np.ndarray:
        """Shared frames of a stream of windows one hop apart: frame j starts at sample
        ``first_sample + j * frame_step`` of `signal`; frames first .. first + count - 1."""
        f = self.framing
        step, length = f.cfg.frame_step, f.cfg.frame_length
        a = f.first_sample + first * step
        left = sum(s.left for s in self._samples)  # samples the stages look back
        y = signal[a - left:a + (count - 1) * step + length]
        for s in self._samples:
            y = s.stream(y)
        y = np.ascontiguousarray(y[left:])
        item = y.strides[0]
        view = np.lib.stride_tricks.as_strided(y, (count, length), (step * item, item),
                                               writeable=False)
        if count <= FRAME_CHUNK:
            return self._run(self._frames[1:], view)
        # a long run in pieces: the windowed frames and the complex spectra of a piece are
        # a few MB at most, not those of every frame of the batch at once (the same numbers:
        # each frame's FFT is its own)
        first = self._run(self._frames[1:], view[:FRAME_CHUNK])
        out = np.empty((count, *first.shape[1:]), first.dtype)
        out[:FRAME_CHUNK] = first
        for a in range(FRAME_CHUNK, count, FRAME_CHUNK):
            out[a:a + FRAME_CHUNK] = self._run(self._frames[1:], view[a:a + FRAME_CHUNK])
        return out

    def _finish(self, spectra: np.ndarray) -> np.ndarray:
        return self._run(self._output, self._run(self._features, spectra))

    def _check(self, windows: np.ndarray) -> np.ndarray:
        windows = np.asarray(windows, dtype=np.float32)
        if windows.ndim != 2 or windows.shape[1] != self.card.window_samples:
            raise ValueError(f"windows must have shape (n, {self.card.window_samples}), "
                             f"got {windows.shape}")
        return windows

    # --- the public calls ---------------------------------------------------------------
    def unscaled(self, windows: np.ndarray, *, model_order: bool = False) -> np.ndarray:
        """Features before scaling of whole windows ``(n, window_samples)``.

        Returns
        -------
        numpy.ndarray
            float32; time-major ``(n, frames, bands)`` (``(n, samples)`` for a kind without
            frames), or with `model_order` in the card's layout (the model's input order).
        """
        windows = self._check(windows)
        if self.fixed is not None:
            from monitor.features.fixedpoint import as_float, to_pcm16

            u = self.fixed.unscaled_q(to_pcm16(windows))
            if model_order and self.fixed.layout.active:
                u = self.fixed.layout.run(u)
            return np.ascontiguousarray(as_float(u))
        if self.framing is None:
            x = self._run(self._samples, windows)
        else:
            x = self._run(self._features, self._spectra(windows))
        if model_order:
            x = self._run([s for s in self._output if s.name != "scaling"], x)
        return np.ascontiguousarray(x, dtype=np.float32)

    def logmel(self, windows: np.ndarray) -> np.ndarray:
        """Unscaled time-major features ``(n, frames, bands)`` (the old name of `unscaled`)."""
        return self.unscaled(windows)

    def scale(self, unscaled: np.ndarray) -> np.ndarray:
        """Layout and scaling of time-major unscaled features: the model input."""
        if self.fixed is not None:  # q16 values as floats: exact, so back to the integers
            from monitor.features.fixedpoint import FEATURE_Q, as_float

            u = np.round(np.asarray(unscaled, np.float64) * (1 << FEATURE_Q)).astype(np.int64)
            return as_float(self.fixed.scaled_q(u))
        return self._run(self._output, np.asarray(unscaled, np.float32))

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
        windows = self._check(windows)
        if self.fixed is not None:
            from monitor.features.fixedpoint import as_float, to_pcm16

            return as_float(self.fixed.scaled_q(self.fixed.unscaled_q(to_pcm16(windows))))
        if self.framing is None:
            return self._run(self._output, self._run(self._samples, windows))
        return self._finish(self._spectra(windows))

    def single(self, window: np.ndarray) -> np.ndarray:
        """Scaled model input for one window of shape ``(window_samples,)``."""
        return self.batch(np.asarray(window, dtype=np.float32)[None, :])[0]

    def batch_consecutive(self, signal: np.ndarray, n: int) -> np.ndarray:
        """`batch` of `n` windows one hop apart in `signal` (fast replay), each shared frame
        computed once; the same numbers.

        Parameters
        ----------
        signal : numpy.ndarray
            Shape ``((n - 1) * hop_samples + window_samples,)``.
        """
        c = self.card
        signal = np.asarray(signal, dtype=np.float32)
        if signal.shape != ((n - 1) * c.hop_samples + c.window_samples,):
            raise ValueError(f"signal must hold {n} windows one hop apart, got {signal.shape}")
        if self.fixed is not None:
            return self._fixed_stream(signal, n)
        if self.signal is not None:  # the graph keeps each frame's result: shared frames once
            return self.batch(windows_of(signal, c.window_samples, c.hop_samples)[:n])
        return self._consecutive(signal, n, None)[0]

    def _fixed_stream(self, signal: np.ndarray, n: int) -> np.ndarray:
        from monitor.features.fixedpoint import as_float, to_pcm16

        return as_float(self.fixed.scaled_q(self.fixed.stream_q(to_pcm16(signal), n)))

    def batch_of_stream(self, windows: np.ndarray) -> np.ndarray:
        """`batch` of windows that follow one another a hop apart (every window of a
        recording, as `assemble.file_windows` gives them), each frame computed once; the same
        numbers, byte for byte.

        Parameters
        ----------
        windows : numpy.ndarray
            ``(n, window_samples)``, window k starting k hops after window 0.

        Returns
        -------
        numpy.ndarray
            ``(n, *card.feature_shape)`` float32.
        """
        windows = self._check(windows)
        hop = self.card.hop_samples
        if self.fixed is not None and len(windows) > 1 and hop <= self.card.window_samples:
            signal = np.concatenate([windows[0], windows[1:, -hop:].reshape(-1)])
            return np.concatenate([self._fixed_stream(signal[a * hop:(b - 1) * hop + windows.shape[1]], b - a)
                                   for a, b in _blocks(len(windows), 256)])
        if not self._shares(len(windows)):
            return self.batch(windows)
        stream = FrameStream(self)
        hop, block = self.card.hop_samples, 64  # a few MB of arrays at a time
        return np.concatenate([
            stream.features([k * hop for k in range(a, min(a + block, len(windows)))],
                            list(windows[a:a + block]))
            for a in range(0, len(windows), block)])

    def _shares(self, n: int = 2) -> bool:
        return (self.fixed is None and self.signal is None and self.framing is not None
                and self.framing.share_step > 0 and n > 1)

    def _consecutive(self, signal: np.ndarray, n: int,
                     known: tuple[int, np.ndarray] | None) -> tuple[np.ndarray, np.ndarray | None]:
        """Scaled features of `n` windows one hop apart, and the last window's shared rows.

        `known` is ``(q, rows)``: the shared rows of an earlier window whose shared frame
        ``q + j`` is this run's shared frame j. When every frame of a window is shared, the
        rows are the frames after the per-frame features stages (mel, and the log and DCT
        when they work frame by frame): each is computed once, in the block it has in every
        window (`stages.base.blocked_product`). Otherwise they are spectra, and the features
        stages run per window.
        """
        c = self.card
        f = self.framing
        if f is None or f.share_step == 0:
            return self.batch(windows_of(signal, c.window_samples, c.hop_samples)[:n]), None
        lo, hi = f.shared
        cnt, r = hi - lo + 1, f.share_step
        total = (n - 1) * r + cnt
        whole = cnt == f.frames  # every frame shared: each window is a block of rows
        have = 0
        if known is not None and 0 < known[0] < cnt and (not whole or known[0] % f.block == 0):
            have = cnt - known[0]
        spectra = self._stream_frames(signal, have, total - have)
        if whole:
            rows = spectra
            for s in self._frame_features:  # row k is frame have + k of the first window
                rows = s.run_frames(rows, have)
            shared = np.empty((total, *rows.shape[1:]), np.float32)
            if have:
                shared[:have] = known[1][known[0]:]
            shared[have:] = rows
            item = shared.strides[0]
            frames = np.lib.stride_tricks.as_strided(
                shared, (n, cnt, *shared.shape[1:]), (r * item, *shared.strides),
                writeable=False)
            last = shared if n == 1 else shared[(n - 1) * r:].copy()
            x = self._run(self._window_features, frames)
            return self._run(self._output, x), last
        shared = np.empty((total, *self._frame_shape()), np.float32)
        if have:
            shared[:have] = known[1][known[0]:]
        shared[have:] = spectra
        frames = np.empty((n, f.frames, *shared.shape[1:]), np.float32)
        idx = (np.arange(n) * r)[:, None] + np.arange(cnt)[None, :]
        frames[:, lo:hi + 1] = shared[idx]
        if f.edges.size:
            windows = windows_of(signal, c.window_samples, c.hop_samples)[:n]
            frames[:, f.edges] = self._spectra(windows, f.edges)
        last = shared if n == 1 else shared[(n - 1) * r:].copy()
        return self._finish(frames), last

    def _frame_shape(self) -> tuple[int, ...]:
        fe = self.card.frontend
        return (fe.framing.fft_length // 2 + 1,)


def _blocks(n: int, size: int) -> list[tuple[int, int]]:
    """``(a, b)`` pieces of ``range(n)`` of at most `size`."""
    return [(a, min(a + size, n)) for a in range(0, n, size)]


class FrameStream:
    """The live path: windows as they arrive, each shared frame computed once.

    It keeps the shared frames of the newest window it computed; a later window one or more
    frame steps further on reuses those it holds. `features` gives the same numbers as
    `FrontEnd.batch` of the same windows, byte for byte. One caller thread (the engine's).

    Parameters
    ----------
    frontend : FrontEnd
        The front end whose stages it runs.
    """

    def __init__(self, frontend: FrontEnd) -> None:
        self.fe = frontend
        self.reset()

    def reset(self) -> None:
        self._start: int | None = None
        self._shared: np.ndarray | None = None

    def features(self, starts: Sequence[int], windows: Sequence[np.ndarray],
                 span: np.ndarray | None = None) -> np.ndarray:
        """Scaled model input of windows that start at the given sample positions.

        Parameters
        ----------
        starts : sequence of int
            Each window's first sample on the session clock, in increasing order.
        windows : sequence of numpy.ndarray
            Each ``(window_samples,)`` float32.
        span : numpy.ndarray, optional
            The windows' samples as one array when they are one hop apart (the first
            window, then each later one's last hop: `Windower.span`), saving the copy that
            joins them.

        Returns
        -------
        numpy.ndarray
            ``(n, *card.feature_shape)`` float32.
        """
        fe, c = self.fe, self.fe.card
        if not fe._shares(2) and (fe.fixed is None or c.hop_samples > c.window_samples):
            return fe.batch(np.stack(windows))
        hop = c.hop_samples
        out = []
        i = 0
        while i < len(windows):  # runs of windows one hop apart
            j = i + 1
            while j < len(windows) and starts[j] - starts[j - 1] == hop:
                j += 1
            if span is not None and i == 0 and j == len(windows):
                signal = span
            elif j - i > 1:
                signal = np.concatenate([windows[i]] + [w[-hop:] for w in windows[i + 1:j]])
            else:
                signal = np.asarray(windows[i], np.float32)
            if fe.fixed is not None:  # integers: frames shared within a run, none kept
                out.append(fe._fixed_stream(np.asarray(signal, np.float32), j - i))
                i = j
                continue
            step = fe.framing.cfg.frame_step
            known = None
            if self._start is not None:
                d = starts[i] - self._start
                if d > 0 and d % step == 0:
                    known = (d // step, self._shared)
            feats, shared = fe._consecutive(np.asarray(signal, np.float32), j - i, known)
            out.append(feats)
            if shared is None:
                self.reset()
            else:
                self._start, self._shared = starts[j - 1], shared
            i = j
        return out[0] if len(out) == 1 else np.concatenate(out)


def reference_features(card: ModelCard, windows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The same card computed in float64 throughout, the reference for the float32 path.

    Returns
    -------
    unscaled : numpy.ndarray
        float64, time-major ``(n, frames, bands)`` (``(n, samples)`` without frames), as
        `FrontEnd.unscaled`.
    scaled : numpy.ndarray
        ``(n, *card.feature_shape)`` float64, the model input (as `FrontEnd.batch`).

    Parameters
    ----------
    card : ModelCard
        The card.
    windows : numpy.ndarray
        ``(n, window_samples)`` samples.
    """
    x = np.asarray(windows, np.float64)
    out = None
    for s in card.stages():
        if not s.active:
            continue
        if s.part == "output" and out is None:
            out = x
        x = s.reference(x)
    return (x if out is None else out), x


__all__ = ["FrontEnd", "FrameStream", "reference_features", "hz_to_mel", "mel_to_hz",
           "mel_band_edges", "mel_filterbank", "window_coefficients", "dct_matrix",
           "lifter_weights"]
