"""The signal-operator front end (card ``arithmetic = "micro-signal"``): the spectrum, the mel
filter bank and the log computed by a small ``.tflite`` graph of the tflite-micro signal
library's operators, run in the microcontroller interpreter the firmware links.

A firmware may compute its front end with those operators instead of its own C: the same
interpreter that runs the model runs a second graph, frame by frame. This module writes that
graph for a card (`graph_bytes`) and runs it in the ``tflite-micro`` package's interpreter
(`SignalGraph`), so that the laptop sees the numbers the board's graph gives.

The graph, one frame of ``frame_length`` int16 samples per ``invoke``:

0. ``MAXIMUM`` (a builtin operator) with -32767: a sample of -32768 becomes -32767, whose
   magnitude fits int16 (the auto scale's ``MaxAbs16`` cannot represent 32768, and a frame
   holding it would be shifted into overflow);
1. ``SignalFftAutoScale``: the frame shifted up by ``s1`` bits, the most that keeps it within
   int16 (``s1`` is the graph's second output), so that a quiet frame keeps its precision
   through the window;
2. ``SignalWindow``: times the card's window in q14 (``shift`` 14), int16; then
   ``SignalFftAutoScale`` again (``s2``, the third output): a frame loud only at its edges,
   where the window is near 0, would otherwise reach the FFT with a few bits;
3. ``SignalRfft`` (int16): the real FFT of ``fft_length`` points, zero-padded; the fixed-point
   kiss FFT scales it by ``1 / fft_length``;
4. ``SignalEnergy``: ``re^2 + im^2`` of the bins the filter bank reads, uint32;
5. ``SignalFilterBank``: the card's own mel matrix in q14 relative to its largest weight (the
   operator's weight / unweight form: each bin feeds at most two adjacent bands), uint64 sums;
6. ``SignalFilterBankSquareRoot`` (scale bits 0): the integer square root, uint32;
7. ``SignalFilterBankLog``: ``output_scale * ln(x << correction_bits)`` (0 for x = 0), int16.

What the graph gives is ``q`` (int16, per band) and ``s = s1 + s2``; outside it the band's mel power in
the card's units (samples in [-1, 1)) is `power_from_graph`:
``P = exp(2 q / output_scale) N^2 / (2^(2 c + 2 s + 30) G)`` with ``G`` the weights'
gain, ``c`` the correction bits and ``N`` the FFT length (``P = 0`` where ``q = 0``), and the
card's log (its ``log_offset``, ``log_floor``, kind and dB reference), layout and scaling
follow in float32 as on the float path: a few lines of firmware after the graph.

References
----------
.. [1] TensorFlow Lite for Microcontrollers, the signal library (``signal/src`` and
       ``signal/micro/kernels``): ``ApplyWindow``, ``FftAutoScale``, ``SpectrumToEnergy``,
       ``FilterbankAccumulateChannels``, ``Sqrt64``, ``FilterbankLog`` / ``Log32``; each
       operator's inputs and its flexbuffer options (a map, its values read in the order of
       their sorted keys).
"""

from __future__ import annotations

import math
from collections import OrderedDict
from dataclasses import dataclass
from typing import Any

import numpy as np

from monitor.base.errors import ModelError
from monitor.features.dsp import mel_filterbank, window_coefficients

ARITHMETIC = "micro-signal"
WINDOW_BITS = 14   # the window in q14: 1.0 is 16384, within int16
WEIGHT_BITS = 14   # the mel weights in q14 of the largest weight
OUTPUT_SCALE = 1024  # FilterBankLog: ln units times 1024 (the largest ln, of 2^32, is 22.2)
GRAPH_FILE = "frontend_signal.tflite"
INSTALL_HINT = ('arithmetic = "micro-signal" runs the front end in the microcontroller '
                "interpreter: .venv/bin/pip install 'scenemon[micro]' (or pip install "
                "tflite-micro)")
_CACHE = 8192  # frames whose graph output is kept (a stream's shared frames are found there)

# TensorType values of the TensorFlow Lite schema
_INT16, _INT32, _UINT32, _UINT64 = 7, 2, 15, 12
_CUSTOM = 32  # BuiltinOperator.CUSTOM
_MAXIMUM = 55  # BuiltinOperator.MAXIMUM
OPERATORS = ["SignalFftAutoScale", "SignalWindow", "SignalRfft", "SignalEnergy",
             "SignalFilterBank", "SignalFilterBankSquareRoot", "SignalFilterBankLog"]


@dataclass(frozen=True)
class BankTables:
    """The filter bank of a mel matrix in the signal library's weight / unweight form.

    Range ``r`` (0 .. bands) is a run of consecutive bins: each adds ``weights`` times its
    energy to band ``r - 1`` and ``unweights`` times it to band ``r``
    (``FilterbankAccumulateChannels``: channel 0 of its work area is scratch, and what the
    last range gives a band after the last is dropped). A bin that feeds one band goes to
    the first range, in bin order, that gives it to that band.

    Attributes
    ----------
    weights, unweights : numpy.ndarray
        int16, one per bin of each range, in q14 of the matrix's largest weight.
    freq_starts, weight_starts, widths : numpy.ndarray
        int16 per range (``bands + 1``): its first bin, its first entry in the weights, its bins.
    start, end : int
        The bins the energy operator computes, ``[start, end)``.
    gain : float
        ``2^14 / max weight``: the integer weights are the matrix times this.
    """
    weights: np.ndarray
    unweights: np.ndarray
    freq_starts: np.ndarray
    weight_starts: np.ndarray
    widths: np.ndarray
    start: int
    end: int
    gain: float


def bank_tables(*, mel: np.ndarray) -> BankTables:
    """The weight / unweight tables of a mel matrix ``(bands, bins)``, or ValueError.

    Parameters
    ----------
    mel : numpy.ndarray
        The float64 mel matrix, bands in increasing order of frequency.

    Returns
    -------
    BankTables
        Tables that give ``mel`` (in q14) when the operator accumulates them.

    Raises
    ------
    ValueError
        A bin feeds two bands that are not neighbours, or more than two bands, or a band is
        empty: the operator cannot compute the matrix (the sentence says which).
    """
    mel = np.asarray(mel, np.float64)
    bands, bins = mel.shape
    if not np.all(mel.max(axis=1) > 0):
        raise ValueError("a mel band has no weight at any FFT bin")
    gain = float(2 ** WEIGHT_BITS / mel.max())
    used = np.flatnonzero(mel.max(axis=0) > 0)
    lo, hi = int(used[0]), int(used[-1]) + 1
    # each bin goes to a range r: band r - 1 takes it with `weights`, band r with `unweights`;
    # the ranges follow one another in bin order
    where = np.full(hi - lo, -1)
    cur = 0
    for j in range(lo, hi):
        nz = np.flatnonzero(mel[:, j] > 0)
        if len(nz) == 2 and nz[1] == nz[0] + 1 and nz[1] >= cur:
            cur = int(nz[1])
        elif len(nz) == 1 and nz[0] + 1 >= cur:
            cur = max(cur, int(nz[0]))
        elif len(nz) != 0:
            raise ValueError(f"FFT bin {j} feeds mel bands that are not two neighbours in order "
                             f"(the operator adds each bin to two adjacent bands at most)")
        where[j - lo] = cur
    w, u, fs, ws, wd = [], [], [], [], []
    for r in range(bands + 1):
        idx = np.flatnonzero(where == r) + lo
        a = int(idx[0]) if len(idx) else (fs[-1] + wd[-1] if fs else lo)
        fs.append(a), ws.append(len(w)), wd.append(len(idx))
        for j in idx:
            w.append(mel[r - 1, j] if r > 0 else 0.0)
            u.append(mel[r, j] if r < bands else 0.0)
    built = np.zeros_like(mel)
    for r in range(bands + 1):
        for k in range(wd[r]):
            j = fs[r] + k
            if r > 0:
                built[r - 1, j] += w[ws[r] + k]
            if r < bands:
                built[r, j] += u[ws[r] + k]
    if not np.allclose(built, mel, rtol=0, atol=1e-12 * mel.max()):
        raise ValueError("the weight and unweight tables do not give the matrix back")
    def q14(v: list[float]) -> np.ndarray:
        return np.round(np.asarray(v, np.float64) * gain).astype(np.int16)

    return BankTables(weights=q14(w), unweights=q14(u), freq_starts=np.asarray(fs, np.int16),
                      weight_starts=np.asarray(ws, np.int16), widths=np.asarray(wd, np.int16),
                      start=lo, end=hi, gain=gain)


def window_q14(window: np.ndarray) -> np.ndarray:
    """The window in q14, int16: ``round(w * 2^14)``.

    Parameters
    ----------
    window : numpy.ndarray
        float64 coefficients in [0, 1].

    Returns
    -------
    numpy.ndarray
        int16.
    """
    return np.round(np.asarray(window, np.float64) * (1 << WINDOW_BITS)).astype(np.int16)


def correction_bits(*, frame_length: int, fft_length: int) -> int:
    """The largest left shift before the log that cannot overflow 32 bits.

    After the auto scale no sample exceeds 2^15 in magnitude; the FFT divides by ``N``, so by
    Parseval a frame's energies sum to at most ``frame_length * 2^30 / N``; a band's sum of
    q14 weights times energies is below ``2^14`` times that, and its square root below
    ``sqrt(2^44 * frame_length / N)``.

    Parameters
    ----------
    frame_length, fft_length : int
        The frame and the FFT.

    Returns
    -------
    int
        ``c`` such that the square root times ``2^c`` stays below ``2^32``.
    """
    top = 0.5 * (44 + math.log2(frame_length / fft_length))
    return max(0, min(15, int(math.floor(31.9 - top))))


def _flex(options: dict[str, int]) -> list[int]:
    from flatbuffers import flexbuffers

    return list(flexbuffers.Dumps(options))


def graph_bytes(*, window: np.ndarray, mel: np.ndarray, fft_length: int) -> bytes:
    """The ``.tflite`` flatbuffer of the front-end graph for one frame.

    Parameters
    ----------
    window : numpy.ndarray
        The card's window, float64, ``frame_length`` coefficients.
    mel : numpy.ndarray
        The card's mel matrix ``(bands, fft_length // 2 + 1)``, float64.
    fft_length : int
        The FFT's length, a power of two.

    Returns
    -------
    bytes
        The model: input 0 the frame (int16 ``(frame_length,)``), output 0 the log bands (int16
        ``(bands,)``), outputs 1 and 2 the two auto scales' shifts (int32 scalars).

    Raises
    ------
    ValueError
        The mel matrix does not fit the filter-bank operator (`bank_tables`).
    """
    import flatbuffers
    from tflite_micro.tensorflow.lite.micro.python import schema_py_generated as fb

    t = bank_tables(mel=mel)
    length, bands = len(window), mel.shape[0]
    bins = fft_length // 2 + 1
    buffers = [fb.BufferT()]
    tensors: list[Any] = []

    def tensor(name: str, shape: list[int], kind: int, data: np.ndarray | None = None) -> int:
        x = fb.TensorT()
        x.name, x.shape, x.type = name, shape, kind
        x.buffer = 0
        if data is not None:
            b = fb.BufferT()
            b.data = list(np.ascontiguousarray(data).view(np.uint8).reshape(-1))
            buffers.append(b)
            x.buffer = len(buffers) - 1
        tensors.append(x)
        return len(tensors) - 1

    pcm = tensor("pcm", [length], _INT16)
    floor = tensor("int16_floor", [1], _INT16, np.array([-32767], np.int16))
    clipped = tensor("pcm_clipped", [length], _INT16)
    scaled = tensor("scaled", [length], _INT16)
    shift = tensor("shift", [], _INT32)
    win = tensor("window_q14", [length], _INT16, window_q14(window))
    windowed = tensor("windowed", [length], _INT16)
    rescaled = tensor("windowed_scaled", [length], _INT16)
    shift2 = tensor("shift_windowed", [], _INT32)
    spectrum = tensor("spectrum", [2 * bins], _INT16)
    energy = tensor("energy", [bins], _UINT32)
    w = tensor("weights", [len(t.weights)], _INT16, t.weights)
    u = tensor("unweights", [len(t.unweights)], _INT16, t.unweights)
    fs = tensor("channel_frequency_starts", [bands + 1], _INT16, t.freq_starts)
    ws = tensor("channel_weight_starts", [bands + 1], _INT16, t.weight_starts)
    wd = tensor("channel_widths", [bands + 1], _INT16, t.widths)
    sums = tensor("filter_bank", [bands], _UINT64)
    zero = tensor("sqrt_scale_bits", [], _INT32, np.zeros((), np.int32))
    roots = tensor("filter_bank_sqrt", [bands], _UINT32)
    logs = tensor("log_bands", [bands], _INT16)

    names = OPERATORS
    codes = []
    for name in names:
        c = fb.OperatorCodeT()
        c.builtinCode, c.deprecatedBuiltinCode, c.customCode, c.version = \
            _CUSTOM, _CUSTOM, name, 1
        codes.append(c)
    c = fb.OperatorCodeT()
    c.builtinCode, c.deprecatedBuiltinCode, c.version = _MAXIMUM, _MAXIMUM, 1
    codes.append(c)
    c_bits = correction_bits(frame_length=length, fft_length=fft_length)
    plan = [
        (len(names), [pcm, floor], [clipped], None),
        (0, [clipped], [scaled, shift], None),
        (1, [scaled, win], [windowed], {"shift": WINDOW_BITS}),
        (0, [windowed], [rescaled, shift2], None),
        (2, [rescaled], [spectrum], {"T": _INT16, "fft_length": fft_length}),
        (3, [spectrum], [energy], {"end_index": t.end, "start_index": t.start}),
        (4, [energy, w, u, fs, ws, wd], [sums], {"num_channels": bands}),
        (5, [sums, zero], [roots], None),
        (6, [roots], [logs], {"input_correction_bits": c_bits, "output_scale": OUTPUT_SCALE}),
    ]
    ops = []
    for code, ins, outs, options in plan:
        op = fb.OperatorT()
        op.opcodeIndex, op.inputs, op.outputs = code, ins, outs
        if options is not None:
            op.customOptions = _flex(options)
            op.customOptionsFormat = 0  # FLEXBUFFERS
        ops.append(op)
    sub = fb.SubGraphT()
    sub.tensors, sub.inputs, sub.outputs, sub.operators = tensors, [pcm], [logs, shift, shift2], ops
    sub.name = "scenemon_signal_frontend"
    model = fb.ModelT()
    model.version, model.operatorCodes, model.subgraphs, model.buffers = 3, codes, [sub], buffers
    model.description = "scenemon front end: signal-library operators, one frame per invoke"
    builder = flatbuffers.Builder(4096)
    builder.Finish(model.Pack(builder), file_identifier=b"TFL3")
    return bytes(builder.Output())


def power_from_graph(q: np.ndarray, shift: np.ndarray, *, frame_length: int, fft_length: int,
                     gain: float) -> np.ndarray:
    """The mel power in the card's units from the graph's outputs, float64.

    Parameters
    ----------
    q : numpy.ndarray
        The graph's log bands, int16 ``(..., bands)``.
    shift : numpy.ndarray
        The auto scale's shift of each frame ``(...)``.
    frame_length, fft_length : int
        The frame and the FFT.
    gain : float
        `BankTables.gain`.

    Returns
    -------
    numpy.ndarray
        ``exp(2 q / 1024) N^2 / (2^(2 c + 2 s + 30) gain)``, 0 where ``q = 0``.
    """
    c = correction_bits(frame_length=frame_length, fft_length=fft_length)
    q = np.asarray(q, np.float64)
    s = np.asarray(shift, np.float64)[..., None]
    e = (2.0 * q / OUTPUT_SCALE - (2.0 * (c + s) + 30) * math.log(2) + 2 * math.log(fft_length)
         - math.log(gain))
    return np.where(q > 0, np.exp(e), 0.0)


class SignalGraph:
    """The front-end graph of a card in the microcontroller interpreter.

    Parameters
    ----------
    window : numpy.ndarray
        The card's window (float64, ``frame_length``).
    mel : numpy.ndarray
        The card's mel matrix (float64, ``(bands, fft_length // 2 + 1)``).
    fft_length : int
        The FFT's length.

    Raises
    ------
    ModelError
        The ``tflite-micro`` package is not installed, or its interpreter refuses the graph.
    """

    def __init__(self, *, window: np.ndarray, mel: np.ndarray, fft_length: int) -> None:
        try:
            from tflite_micro import runtime
        except ImportError:
            raise ModelError(INSTALL_HINT) from None
        self.frame_length, self.fft_length = len(window), fft_length
        self.bands = mel.shape[0]
        self.tables = bank_tables(mel=mel)
        self.model = graph_bytes(window=window, mel=mel, fft_length=fft_length)
        arena = 64 * 1024 + 64 * (self.frame_length + fft_length + len(self.tables.weights))
        try:
            self.interp = runtime.Interpreter.from_bytes(self.model, arena_size=arena)
        except (RuntimeError, ValueError) as e:
            raise ModelError(f"the microcontroller interpreter refused the front-end graph: "
                             f"{e}") from None
        self._cache: OrderedDict[bytes, tuple[np.ndarray, int]] = OrderedDict()

    def run_frame(self, frame: np.ndarray) -> tuple[np.ndarray, int]:
        """One ``invoke``: the log bands (int16) and the shift of one int16 frame.

        Parameters
        ----------
        frame : numpy.ndarray
            int16, ``(frame_length,)``.

        Returns
        -------
        tuple of (numpy.ndarray, int)
            ``q`` (int16 ``(bands,)``) and ``s``, the sum of the two shifts.
        """
        key = frame.tobytes()
        hit = self._cache.get(key)
        if hit is not None:
            self._cache.move_to_end(key)
            return hit
        self.interp.set_input(np.ascontiguousarray(frame, np.int16), 0)
        self.interp.invoke()
        out = (self.interp.get_output(0).astype(np.int16).reshape(-1).copy(),
               int(np.asarray(self.interp.get_output(1)).reshape(-1)[0])
               + int(np.asarray(self.interp.get_output(2)).reshape(-1)[0]))
        self._cache[key] = out
        if len(self._cache) > _CACHE:
            self._cache.popitem(last=False)
        return out

    def run_frames(self, frames: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The graph's outputs for int16 frames ``(..., frame_length)``.

        Parameters
        ----------
        frames : numpy.ndarray
            int16 frames.

        Returns
        -------
        tuple of numpy.ndarray
            ``q`` int16 ``(..., bands)`` and ``s`` int32 ``(...)``.
        """
        flat = np.ascontiguousarray(frames, np.int16).reshape(-1, self.frame_length)
        q = np.empty((len(flat), self.bands), np.int16)
        s = np.empty(len(flat), np.int32)
        for i, f in enumerate(flat):
            q[i], s[i] = self.run_frame(f)
        return q.reshape(*frames.shape[:-1], self.bands), s.reshape(frames.shape[:-1])

    def mel_power(self, frames: np.ndarray) -> np.ndarray:
        """The mel power of float frames on int16 steps ``(..., frame_length)``, float32.

        Parameters
        ----------
        frames : numpy.ndarray
            Samples in [-1, 1) that are whole int16 steps (``pcm_bits = 16``).

        Returns
        -------
        numpy.ndarray
            float32 ``(..., bands)``: `power_from_graph` of the graph's outputs.
        """
        frames = np.asarray(frames)
        flat = frames.reshape(-1, self.frame_length)
        out = np.empty((len(flat), self.bands), np.float32)
        for a in range(0, len(flat), 1024):  # a few MB at a time
            pcm = np.clip(np.round(flat[a:a + 1024].astype(np.float64) * 32768), -32768, 32767)
            q, s = self.run_frames(pcm.astype(np.int16))
            out[a:a + 1024] = power_from_graph(q, s, frame_length=self.frame_length,
                                               fft_length=self.fft_length, gain=self.tables.gain)
        return out.reshape(*frames.shape[:-1], self.bands)


def card_graph(card: Any) -> SignalGraph:
    """The front-end graph of a card (its window and mel matrix in float64).

    Parameters
    ----------
    card : ModelCard
        A card with ``arithmetic = "micro-signal"`` (checked when it was loaded).

    Returns
    -------
    SignalGraph
        Loaded in the microcontroller interpreter.

    Raises
    ------
    ModelError
        The ``tflite-micro`` package is missing, or its interpreter refuses the graph.
    """
    fe = card.frontend
    f, m, w = fe.framing, fe.mel, fe.window
    window = window_coefficients(f.frame_length, kind=w.window, symmetric=w.window_symmetric,
                                 dtype=np.float64)
    mel = mel_filterbank(sample_rate=card.sample_rate, fft_length=f.fft_length,
                         mel_bands=m.mel_bands, fmin=m.fmin, fmax=m.fmax, scale=m.mel_scale,
                         norm=m.mel_norm, triangles=m.mel_triangles, dtype=np.float64)
    return SignalGraph(window=window, mel=mel, fft_length=f.fft_length)
