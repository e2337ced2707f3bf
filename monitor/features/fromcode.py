"""A model card written from the training code's own feature calls (``scenemon card write``).

The user pastes the calls their training code makes, as they are written there, for
example ``librosa.feature.melspectrogram(y=y, sr=16000, n_fft=512, hop_length=160,
n_mels=40)`` and ``librosa.power_to_db(S, ref=np.max, top_db=80)``. Each call is parsed
(Python's own parser; nothing is run), its keyword arguments are read as literals, the
library's documented defaults fill in what the call leaves out, and the card keys follow.
A value that is not a literal (``sr=sr``) is refused in one sentence that says what to
write instead.

Known calls, by the function's own name (whatever module prefix it carries):

- librosa 0.10-0.11: ``melspectrogram``, ``power_to_db``, ``amplitude_to_db``, ``mfcc``;
- torchaudio: ``MelSpectrogram``, ``AmplitudeToDB``, ``MFCC`` (its ``melkwargs``);
- TensorFlow's ``tf.signal``: ``stft``, ``linear_to_mel_weight_matrix``,
  ``mfccs_from_log_mel_spectrograms``, with ``abs`` / ``square`` of the STFT for the
  magnitude or the power, and ``log(x + offset)``.

References
----------
librosa 0.11 API documentation (``librosa.feature.melspectrogram``, ``librosa.filters.mel``,
``librosa.power_to_db``, ``librosa.feature.mfcc``); torchaudio documentation
(``torchaudio.transforms.MelSpectrogram``, ``AmplitudeToDB``, ``MFCC``,
``torchaudio.functional.melscale_fbanks``); TensorFlow documentation (``tf.signal.stft``,
``tf.signal.linear_to_mel_weight_matrix``, ``tf.signal.mfccs_from_log_mel_spectrograms``).
"""

from __future__ import annotations

import ast
from dataclasses import dataclass, field
from typing import Any

from monitor.base.errors import ScenemonError


@dataclass
class Call:
    """One parsed call: the function's own name and its literal keyword arguments.

    Attributes
    ----------
    name : str
        The function's name without its module (``melspectrogram``).
    kwargs : dict
        Keyword arguments read as literals (names of known functions as their words).
    inner : list of Call
        Calls among its arguments (``abs`` inside ``square``).
    offset : float or None
        ``c`` of an argument written ``x + c`` (``log(mel + 1e-6)``).
    text : str
        The call as given, for messages.
    """

    name: str
    kwargs: dict[str, Any] = field(default_factory=dict)
    inner: list[Call] = field(default_factory=list)
    offset: float | None = None
    text: str = ""


_DATA = {"y", "S", "signals", "signal", "waveform", "x", "specgram", "input", "spectrogram",
         "stfts", "log_mel_spectrograms", "data", "tensor"}  # the data a call is given
_RATES = ("sr", "sample_rate")  # a rate written as a name is taken from --sample-rate
BY_NAME = object()  # the value of a rate written as a name
_NAMED = {"max": "max", "amax": "max", "hann_window": "hann", "hamming_window": "hamming",
          "hann": "hann", "hamming": "hamming"}  # function names a keyword may carry


def _value(node: ast.AST, call: str, key: str) -> Any:
    try:
        return ast.literal_eval(node)
    except ValueError:
        pass
    name = node.attr if isinstance(node, ast.Attribute) else \
        node.id if isinstance(node, ast.Name) else None
    if isinstance(node, ast.Call):  # window_fn=tf.signal.hann_window(...) or a partial
        inner = node.func
        name = inner.attr if isinstance(inner, ast.Attribute) else \
            inner.id if isinstance(inner, ast.Name) else None
    if name in _NAMED:
        return _NAMED[name]
    raise ScenemonError(f"{call}: {key}={ast.unparse(node)} is not a value scenemon can read; "
                        f"write the number or text itself (for example n_mels=40)")


def parse_call(text: str) -> Call:
    """Parse one call as the training code writes it (nothing is run).

    Parameters
    ----------
    text : str
        A Python call expression.

    Returns
    -------
    Call
        Its name, literal keyword arguments, inner calls and an added offset.

    Raises
    ------
    ScenemonError
        The text is not one call, or a keyword's value is not a literal.
    """
    try:
        tree = ast.parse(text.strip(), mode="eval").body
    except SyntaxError:
        raise ScenemonError(f"{text!r} is not a Python call (paste it as the training code "
                            f"writes it)") from None
    if not isinstance(tree, ast.Call):
        raise ScenemonError(f"{text!r} is not a call (name(arguments...))")
    return _call(tree, text.strip())


def _call(node: ast.Call, text: str) -> Call:
    f = node.func
    name = f.attr if isinstance(f, ast.Attribute) else f.id if isinstance(f, ast.Name) else ""
    out = Call(name=name, text=text)
    for kw in node.keywords:
        if kw.arg is None:
            continue  # **kwargs: not ours to read
        if kw.arg in _DATA and not isinstance(kw.value, ast.Constant):
            continue  # the signal itself (y=y, S=mel)
        if kw.arg in _RATES:
            try:
                out.kwargs[kw.arg] = ast.literal_eval(kw.value)
            except ValueError:
                out.kwargs[kw.arg] = BY_NAME  # sr=sr: --sample-rate says what it is
            continue
        out.kwargs[kw.arg] = _value(kw.value, name, kw.arg)
    for arg in node.args:
        if isinstance(arg, ast.Call):
            out.inner.append(_call(arg, text))
        elif isinstance(arg, ast.BinOp) and isinstance(arg.op, ast.Add):
            for side in (arg.left, arg.right):
                try:
                    out.offset = float(ast.literal_eval(side))
                except ValueError:
                    continue
    return out


def card_keys(calls: list[Call], *, sample_rate: int | None = None,
              mfcc: int | None = None) -> dict[str, Any]:
    """The ``[frontend]`` keys (and the sample rate) that the calls amount to.

    Parameters
    ----------
    calls : list of Call
        The training code's feature calls, in order.
    sample_rate : int, optional
        Hz, where no call gives it.
    mfcc : int, optional
        Coefficients kept, where the code keeps them by slicing (``[..., :13]``).

    Returns
    -------
    dict
        ``sample_rate`` and ``frontend`` (the card's ``[frontend]`` keys in order).

    Raises
    ------
    ScenemonError
        No known feature call, or calls of different libraries, or no sample rate.
    """
    fe: dict[str, Any] = {}
    sr = sample_rate
    names = [c.name for c in calls]
    by: dict[str, Call] = {}

    def take(c: Call) -> None:  # the calls and every call inside them
        by.setdefault(c.name, c)
        for inner in c.inner:
            take(inner)

    for c in calls:
        take(c)
    if "mfcc" in by or "melspectrogram" in by:
        sr = _librosa(by, fe, sr)
    elif "MelSpectrogram" in by or "MFCC" in by:
        sr = _torchaudio(by, fe, sr)
    elif "stft" in by:
        sr = _tf_signal(by, fe, sr)
    else:
        raise ScenemonError(f"none of {', '.join(names) or 'the calls'} is a feature call "
                            f"scenemon knows (librosa melspectrogram or mfcc, torchaudio "
                            f"MelSpectrogram or MFCC, tf.signal stft)")
    if not sr:
        raise ScenemonError("the calls do not give the sample rate: give --sample-rate")
    if fe.get("kind") == "mfcc":
        if mfcc is not None:
            fe["mfcc"] = int(mfcc)
        if fe.get("mfcc") is None:
            raise ScenemonError("the code keeps its MFCCs by slicing: give --mfcc N")
    return {"sample_rate": int(sr), "frontend": fe}


def _mel(fe: dict, *, n_fft: int, win: int, hop: int, window: str, centre: str,
         center: bool, pad_mode: str, n_mels: int, fmin: float, fmax: float, scale: str,
         norm: str, triangles: str, power: float) -> None:
    fe.update({"frame_length": int(win), "frame_step": int(hop), "fft_length": int(n_fft),
               "window": window, "window_in_frame": centre, "center": bool(center)})
    if center:
        fe["pad_mode"] = pad_mode
    fe.update({"mel_bands": int(n_mels), "fmin": float(fmin), "fmax": float(fmax),
               "mel_scale": scale, "mel_norm": norm, "mel_triangles": triangles,
               "power": float(power)})


def _db(fe: dict, *, multiplier: float, ref: Any, amin: float, top_db: Any, call: str) -> None:
    if ref not in (1.0, 1, "max"):
        raise ScenemonError(f"{call}: ref={ref!r}; scenemon's cards take ref=1.0 or ref=np.max")
    if multiplier != 20.0 / fe["power"]:
        raise ScenemonError(f"{call}: decibels of {'power' if multiplier == 10 else 'magnitude'} "
                            f"on a spectrum of power {fe['power']:g}; use the other dB call")
    fe.update({"log": "db", "log_offset": 0.0, "log_floor": float(amin),
               "db_ref": "max" if ref == "max" else "one",
               "top_db": 0.0 if top_db is None else float(top_db)})


def _rate(value: Any, given: int | None, default: int, key: str) -> int:
    """The sample rate: the call's literal, else --sample-rate, else the library's default;
    a rate the call writes as a name needs --sample-rate."""
    if value is BY_NAME:
        if given is None:
            raise ScenemonError(f"{key}= is written as a name in the call; give the rate with "
                                f"--sample-rate")
        return given
    if value is not None:
        if given is not None and int(value) != int(given):
            raise ScenemonError(f"the call says {key}={value} but --sample-rate is {given}")
        return int(value)
    return given if given is not None else default


def _librosa(by: dict[str, Call], fe: dict, sr: int | None) -> int | None:
    mf = by.get("mfcc")
    ms = by.get("melspectrogram")
    k = {**(ms.kwargs if ms else {}), **(mf.kwargs if mf else {})}
    sr = _rate(k.get("sr"), sr, 22050, "sr")  # 22050: librosa's default rate
    n_fft = k.get("n_fft", 2048)
    win = k.get("win_length") or n_fft
    hop = k.get("hop_length") or win // 4
    fe["kind"] = "mfcc" if mf else "logmel"
    _mel(fe, n_fft=n_fft, win=win, hop=hop, window=k.get("window", "hann"), centre="centre",
         center=bool(k.get("center", True)), pad_mode=k.get("pad_mode", "constant"),
         n_mels=k.get("n_mels", 128), fmin=k.get("fmin", 0.0),
         fmax=k.get("fmax") or sr / 2, scale="htk" if k.get("htk", False) else "slaney",
         norm="slaney" if k.get("norm", "slaney") == "slaney" else "none", triangles="hz",
         power=k.get("power", 2.0))
    db = by.get("power_to_db") or by.get("amplitude_to_db")
    if mf:  # librosa.feature.mfcc: power_to_db(melspectrogram(...)) with its defaults
        _db(fe, multiplier=10.0, ref=1.0, amin=1e-10, top_db=80.0, call=mf.name)
        if mf.kwargs.get("dct_type", 2) != 2:
            raise ScenemonError(f"{mf.name}: dct_type={mf.kwargs['dct_type']}; scenemon's "
                                f"cards take the DCT-II (dct_type=2)")
        fe.update({"mfcc": int(mf.kwargs.get("n_mfcc", 20)),
                   "dct_norm": "ortho" if mf.kwargs.get("norm", "ortho") == "ortho"
                   else "uniform", "lifter": int(mf.kwargs.get("lifter", 0))})
    elif db is not None:
        amplitude = db.name == "amplitude_to_db"
        _db(fe, multiplier=20.0 if amplitude else 10.0, ref=db.kwargs.get("ref", 1.0),
            amin=db.kwargs.get("amin", 1e-5 if amplitude else 1e-10),
            top_db=db.kwargs.get("top_db", 80.0), call=db.name)
    else:
        raise ScenemonError("melspectrogram: give the call that takes its log as well "
                            "(librosa.power_to_db(...), as the training code writes it)")
    fe["layout"] = "time_mel"
    return sr


def _torchaudio(by: dict[str, Call], fe: dict, sr: int | None) -> int | None:
    mf = by.get("MFCC")
    ms = by.get("MelSpectrogram")
    k = dict(ms.kwargs) if ms else {}
    if mf:
        k.update(mf.kwargs.get("melkwargs") or {})
    sr = _rate((mf.kwargs if mf else k).get("sample_rate"), sr, 16000, "sample_rate")
    n_fft = k.get("n_fft", 400)
    win = k.get("win_length") or n_fft
    hop = k.get("hop_length") or win // 2
    if k.get("normalized", False) or k.get("pad", 0):
        raise ScenemonError("MelSpectrogram: normalized=True or pad > 0 has no card key")
    fe["kind"] = "mfcc" if mf else "logmel"
    _mel(fe, n_fft=n_fft, win=win, hop=hop, window=k.get("window_fn", "hann"),
         centre="centre", center=bool(k.get("center", True)),
         pad_mode=k.get("pad_mode", "reflect"), n_mels=k.get("n_mels", 128),
         fmin=k.get("f_min", 0.0), fmax=k.get("f_max") or sr / 2,
         scale=k.get("mel_scale", "htk"), norm="slaney" if k.get("norm") == "slaney" else "none",
         triangles="hz", power=k.get("power", 2.0))
    if mf:
        m = mf.kwargs
        if m.get("log_mels", False):  # torchaudio: log(mel + 1e-6)
            fe.update({"log": "ln", "log_offset": 1e-6})
        else:  # AmplitudeToDB("power", top_db=80.0)
            _db(fe, multiplier=10.0, ref=1.0, amin=1e-10, top_db=80.0, call="MFCC")
        fe.update({"mfcc": int(m.get("n_mfcc", 40)),
                   "dct_norm": "ortho" if m.get("norm", "ortho") == "ortho" else "uniform"})
    else:
        db = by.get("AmplitudeToDB")
        if db is None:
            raise ScenemonError("MelSpectrogram: give the AmplitudeToDB(...) call that follows "
                                "it as well")
        stype = db.kwargs.get("stype", "power")
        _db(fe, multiplier=10.0 if stype == "power" else 20.0, ref=1.0, amin=1e-10,
            top_db=db.kwargs.get("top_db"), call="AmplitudeToDB")
    fe["layout"] = "mel_time"  # torchaudio gives (..., n_mels, time)
    return sr


def _tf_signal(by: dict[str, Call], fe: dict, sr: int | None) -> int | None:
    st = by["stft"]
    k = st.kwargs
    if "frame_length" not in k or "frame_step" not in k:
        raise ScenemonError("stft: give frame_length= and frame_step= as keywords")
    win, hop = int(k["frame_length"]), int(k["frame_step"])
    n_fft = int(k.get("fft_length") or 1 << (win - 1).bit_length())
    power = 2.0 if "square" in by else 1.0
    mel = by.get("linear_to_mel_weight_matrix")
    if mel is None:
        raise ScenemonError("stft: give the linear_to_mel_weight_matrix(...) call as well")
    m = mel.kwargs
    sr = _rate(m.get("sample_rate"), sr, 8000, "sample_rate")
    if k.get("pad_end", False):
        raise ScenemonError("stft: pad_end=True has no card key (frames stay inside the window)")
    fe["kind"] = "mfcc" if "mfccs_from_log_mel_spectrograms" in by else "logmel"
    _mel(fe, n_fft=n_fft, win=win, hop=hop, window=k.get("window_fn", "hann"),
         centre="start", center=False, pad_mode="constant",
         n_mels=m.get("num_mel_bins", 20), fmin=m.get("lower_edge_hertz", 125.0),
         fmax=m.get("upper_edge_hertz", 3800.0), scale="htk", norm="none", triangles="mel",
         power=power)
    log = by.get("log")
    if log is None or log.offset is None:
        raise ScenemonError("give the log call as the training code writes it, with its "
                            "offset (tf.math.log(mel + 1e-6))")
    fe.update({"log": "ln", "log_offset": float(log.offset)})
    if fe["kind"] == "mfcc":  # dct(type 2) / sqrt(2 M); the coefficients kept by slicing
        fe.update({"mfcc": None, "dct_norm": "uniform"})
    fe["layout"] = "time_mel"
    return sr


def card_text(classes: list[str], keys: dict[str, Any], *, window_s: float, hop_s: float,
              output: str = "probabilities", scaling_file: str | None = None,
              source: list[str] | None = None) -> str:
    """The card's TOML text.

    Parameters
    ----------
    classes : list of str
        The model's classes in output order.
    keys : dict
        `card_keys`' result.
    window_s, hop_s : float
        Seconds per window and between windows.
    output : str
        The card's ``output``.
    scaling_file : str, optional
        The ``.npz`` of the scaler, relative to the card.
    source : list of str, optional
        The calls it was written from (kept as comments).

    Returns
    -------
    str
        TOML.
    """
    def lit(v: Any) -> str:
        if isinstance(v, bool):
            return "true" if v else "false"
        if isinstance(v, str):
            return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
        if isinstance(v, float):
            return repr(v)
        return str(v)

    lines = ["# written by scenemon card write from the training code's calls:"]
    lines += [f"#   {c}" for c in source or []]
    lines += ["classes = [" + ", ".join(lit(c) for c in classes) + "]", f"output = {lit(output)}",
              "", "[audio]", f"sample_rate = {keys['sample_rate']}", f"window_s = {lit(window_s)}",
              f"hop_s = {lit(hop_s)}", "", "[frontend]"]
    lines += [f"{k} = {lit(v)}" for k, v in keys["frontend"].items()]
    if scaling_file:
        lines += ["", "[scaling]", f"mean = {lit(scaling_file)}", f"std = {lit(scaling_file)}"]
    return "\n".join(lines) + "\n"
