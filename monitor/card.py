"""The model card: the sidecar TOML that says exactly how the model hears.

`load_card(path)` reads and validates it into one frozen `ModelCard`. Every field a front
end needs is explicit; nothing is inferred silently. Units are in the field names
(`window_s`, `hop_s`) or documented here (`fmin`, `fmax` in Hz, `sample_rate` in Hz).
"""

from __future__ import annotations

import dataclasses
import math
import sys
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np

from monitor.errors import CardError, ModelError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

MAX_HOLD_S = 3600.0
Smoothing = Literal["none", "mean", "ema", "median"]
SMOOTHING = ("none", "mean", "ema", "median")


@dataclass(frozen=True)
class DecisionSettings:
    """Smoothing and hysteresis settings (DESIGN.md, "Decision semantics")."""

    smoothing: Smoothing = "mean"
    smoothing_windows: int = 3
    ema_alpha: float = 0.5
    enter: float = 0.6
    exit: float = 0.0
    margin: float = 0.1
    confirm: int = 2
    min_hold_s: float = 0.0

    def __post_init__(self) -> None:
        problems = []
        if self.smoothing not in SMOOTHING:
            problems.append(f"smoothing={self.smoothing!r} must be one of {', '.join(SMOOTHING)}")
        if not (isinstance(self.smoothing_windows, int) and self.smoothing_windows >= 1):
            problems.append(f"smoothing_windows={self.smoothing_windows!r} must be an integer >= 1")
        if not 0.0 < self.ema_alpha <= 1.0:
            problems.append(f"ema_alpha={self.ema_alpha!r} must be in (0, 1]")
        for name in ("enter", "exit", "margin"):
            v = getattr(self, name)
            if not 0.0 <= v <= 1.0:
                problems.append(f"{name}={v!r} must be in [0, 1]")
        if not (isinstance(self.confirm, int) and self.confirm >= 1):
            problems.append(f"confirm={self.confirm!r} must be an integer >= 1")
        if not 0.0 <= self.min_hold_s <= MAX_HOLD_S:  # also refuses NaN and infinity
            problems.append(f"min_hold_s={self.min_hold_s!r} must be a number of seconds from "
                            f"0 to {MAX_HOLD_S:g}")
        if problems:
            raise ValueError("; ".join(problems))

    def replace(self, **changes: Any) -> DecisionSettings:
        """Return a copy with the given fields changed (None values are ignored)."""
        return dataclasses.replace(self, **{k: v for k, v in changes.items() if v is not None})

    def to_dict(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class ModelCard:
    """Everything the front end, runner and decider need to treat audio as the device will.

    Attributes
    ----------
    classes : tuple of str
        Output classes in the model's output order.
    sample_rate : int
        Hz, the rate the model was trained on.
    window_s, hop_s : float
        Seconds of audio per decision, and between decisions.
    kind : {"logmel", "waveform"}
        Front end; "waveform" passes the samples straight to the model.
    frame_length, frame_step, fft_length : int
        STFT frame size, hop and FFT size in samples (no centre padding).
    fmin, fmax : float
        Mel filterbank edges in Hz.
    mean, std : numpy.ndarray
        Standardisation, broadcastable to one window's features (frames, bands).
    """

    path: Path | None
    classes: tuple[str, ...]
    sample_rate: int = 16000
    window_s: float = 1.0
    hop_s: float = 0.5
    kind: Literal["logmel", "waveform"] = "logmel"
    frame_length: int = 400
    frame_step: int = 160
    fft_length: int = 512
    window: Literal["hann", "hamming"] = "hann"
    window_symmetric: bool = False
    mel_bands: int = 40
    fmin: float = 0.0
    fmax: float = 8000.0
    mel_scale: Literal["htk", "slaney"] = "htk"
    mel_norm: Literal["none", "slaney"] = "none"
    mel_triangles: Literal["hz", "mel"] = "hz"
    power: float = 2.0
    log: Literal["ln", "log10", "db"] = "ln"
    log_offset: float = 1e-6
    layout: Literal["time_mel", "mel_time"] = "time_mel"
    pcm_bits: int = 0
    output: Literal["probabilities", "logits"] = "probabilities"
    mean: np.ndarray = field(default_factory=lambda: np.zeros((), np.float32), compare=False)
    std: np.ndarray = field(default_factory=lambda: np.ones((), np.float32), compare=False)
    decision: DecisionSettings = field(default_factory=DecisionSettings)

    # Derived values
    @property
    def window_samples(self) -> int:
        return int(round(self.window_s * self.sample_rate))

    @property
    def hop_samples(self) -> int:
        return int(round(self.hop_s * self.sample_rate))

    @property
    def frames_per_window(self) -> int:
        """1 + (window samples - frame_length) // frame_step (no centre padding)."""
        return 1 + (self.window_samples - self.frame_length) // self.frame_step

    @property
    def feature_shape(self) -> tuple[int, ...]:
        """Shape of one window's model input, without batch or channel axis."""
        if self.kind == "waveform":
            return (self.window_samples,)
        if self.layout == "time_mel":
            return (self.frames_per_window, self.mel_bands)
        return (self.mel_bands, self.frames_per_window)

    def same_front_end(self, other: ModelCard) -> bool:
        """True when `other` computes the very same features from the same windows."""
        keys = ("sample_rate", "window_s", "hop_s", *FRONTEND_KEYS)
        return (all(getattr(self, k) == getattr(other, k) for k in keys)
                and np.array_equal(self.mean, other.mean) and np.array_equal(self.std, other.std))

    @property
    def name(self) -> str:
        return str(self.path) if self.path else "<card>"

    def describe_shape(self) -> str:
        if self.kind == "waveform":
            return f"{self.window_samples} samples"
        return f"{self.frames_per_window} frames x {self.mel_bands} bands"

    def settings_dict(self) -> dict[str, Any]:
        """The card as plain data, for session.json."""
        def arr(a: np.ndarray) -> Any:
            return a.tolist()

        return {
            "classes": list(self.classes),
            "output": self.output,
            "audio": {"sample_rate": self.sample_rate, "window_s": self.window_s,
                      "hop_s": self.hop_s},
            "frontend": {k: getattr(self, k) for k in FRONTEND_KEYS},
            "scaling": {"mean": arr(self.mean), "std": arr(self.std)},
            "card": str(self.path) if self.path else None,
        }

    def check_model(self, input_shape: tuple[int | None, ...], n_outputs: int,
                    model_path: Path | str) -> bool:
        """Check the model's input shape and output size against the card.

        Parameters
        ----------
        input_shape : tuple
            The model's input shape without the batch axis.
        n_outputs : int
            Length of the model's output vector.

        Returns
        -------
        bool
            True when the model wants a trailing channel axis of size 1.

        Raises
        ------
        ModelError
            When the card cannot produce what the model expects.
        """
        want = self.feature_shape
        shape = tuple(input_shape)
        channel = False
        if len(shape) == len(want) + 1 and shape[-1] == 1:
            shape, channel = shape[:-1], True
        if len(shape) != len(want) or any(s is not None and s != w for s, w in zip(shape, want)):
            hint = ""
            if self.kind == "logmel":
                hint = ": check frame_step, frame_length, window_s, mel_bands and layout"
            raise ModelError(
                f"{model_path}: model expects {tuple(input_shape)} but the card "
                f"{self.name} gives {self.describe_shape()}{hint}"
            )
        if n_outputs != len(self.classes):
            raise ModelError(
                f"{model_path}: model has {n_outputs} outputs but the card {self.name} "
                f"lists {len(self.classes)} classes"
            )
        return channel


FRONTEND_KEYS = (
    "kind", "frame_length", "frame_step", "fft_length", "window", "window_symmetric",
    "mel_bands", "fmin", "fmax", "mel_scale", "mel_norm", "mel_triangles", "power", "log",
    "log_offset", "layout", "pcm_bits",
)
_CHOICES = {
    "kind": ("logmel", "waveform"),
    "window": ("hann", "hamming"),
    "mel_scale": ("htk", "slaney"),
    "mel_norm": ("none", "slaney"),
    "mel_triangles": ("hz", "mel"),
    "log": ("ln", "log10", "db"),
    "layout": ("time_mel", "mel_time"),
    "output": ("probabilities", "logits"),
}
_TABLES = {"audio": ("sample_rate", "window_s", "hop_s"), "frontend": FRONTEND_KEYS,
           "scaling": ("mean", "std"),
           "decision": tuple(f.name for f in dataclasses.fields(DecisionSettings))}
_TOP = ("classes", "output", *_TABLES)


def card_beside(model_path: str | Path) -> Path:
    """The card beside a model: same stem, `.toml` (`demo.int8.tflite` -> `demo.int8.toml`)."""
    return Path(model_path).with_suffix(".toml")


def load_card(path: str | Path) -> ModelCard:
    """Load and validate a model card.

    Raises
    ------
    CardError
        With the file, the field, its value and the rule broken.
    """
    path = Path(path)
    if not path.is_file():
        raise CardError(f"{path}: model card not found (give one with --card, or put "
                        f"a .toml with the model's stem beside it)")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise CardError(f"{path}: not valid TOML ({exc})") from None
    return card_from_dict(raw, path)


def card_from_dict(raw: dict[str, Any], path: Path | None = None) -> ModelCard:
    """Validate a parsed card (see `load_card`)."""
    where = str(path) if path else "<card>"

    def fail(msg: str) -> CardError:
        return CardError(f"{where}: {msg}")

    for key in raw:
        if key not in _TOP:
            warnings.warn(f"{where}: unknown key {key!r} ignored", stacklevel=2)
    for table, keys in _TABLES.items():
        sub = raw.get(table, {})
        if not isinstance(sub, dict):
            raise fail(f"[{table}] must be a table")
        for key in sub:
            if key not in keys:
                warnings.warn(f"{where}: unknown key {table}.{key} ignored", stacklevel=2)

    classes = raw.get("classes")
    if classes is None:
        raise fail("classes is missing (a list of class names in the model's output order)")
    if (not isinstance(classes, list) or len(classes) < 2
            or not all(isinstance(c, str) and c.strip() for c in classes)):
        raise fail(f"classes={classes!r} must be a list of at least two non-empty names")
    if len(set(classes)) != len(classes):
        dup = sorted({c for c in classes if classes.count(c) > 1})
        raise fail(f"classes lists {', '.join(dup)} more than once")

    kw: dict[str, Any] = {"path": path, "classes": tuple(classes)}
    defaults = {f.name: f.default for f in dataclasses.fields(ModelCard)
                if f.default is not dataclasses.MISSING}

    def take(table: str | None, key: str) -> None:
        src = raw if table is None else raw.get(table, {})
        if key not in src:
            return
        value = src[key]
        want = defaults[key]
        label = key if table is None else f"{table}.{key}"
        if isinstance(want, bool):
            if not isinstance(value, bool):
                raise fail(f"{label}={value!r} must be true or false")
        elif isinstance(want, int):
            if isinstance(value, bool) or not isinstance(value, int):
                raise fail(f"{label}={value!r} must be an integer")
        elif isinstance(want, float):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise fail(f"{label}={value!r} must be a number")
            value = float(value)
            if not math.isfinite(value):
                raise fail(f"{label}={value!r} must be finite")
        elif isinstance(want, str):
            if value not in _CHOICES.get(key, (value,)):
                raise fail(f"{label}={value!r} must be one of {', '.join(_CHOICES[key])}")
        kw[key] = value

    take(None, "output")
    for key in _TABLES["audio"]:
        take("audio", key)
    for key in FRONTEND_KEYS:
        take("frontend", key)

    sr = kw.get("sample_rate", defaults["sample_rate"])
    g = {**defaults, **kw}
    if sr <= 0:
        raise fail(f"audio.sample_rate={sr} must be > 0")
    for key in ("window_s", "hop_s"):
        v = g[key]
        if v <= 0:
            raise fail(f"audio.{key}={v} must be > 0")
        n = v * sr
        if abs(n - round(n)) > 1e-6:
            raise fail(f"audio.{key}={v} is not a whole number of samples at {sr} Hz "
                       f"({n:.4f} samples)")
    if g["kind"] == "logmel":
        nyq = sr / 2
        checks = [
            (g["frame_length"] >= 2, f"frontend.frame_length={g['frame_length']} must be >= 2"),
            (g["frame_step"] >= 1, f"frontend.frame_step={g['frame_step']} must be >= 1"),
            (g["fft_length"] >= g["frame_length"],
             f"frontend.frame_length={g['frame_length']} must not exceed "
             f"fft_length={g['fft_length']}"),
            (g["frame_length"] <= round(g["window_s"] * sr),
             f"frontend.frame_length={g['frame_length']} is longer than the window "
             f"({round(g['window_s'] * sr)} samples)"),
            (g["mel_bands"] >= 1, f"frontend.mel_bands={g['mel_bands']} must be >= 1"),
            (0 <= g["fmin"] < g["fmax"],
             f"frontend.fmin={g['fmin']} must be >= 0 and below fmax={g['fmax']}"),
            (g["fmax"] <= nyq, f"frontend.fmax={g['fmax']} is above the Nyquist frequency "
                               f"{nyq:g} Hz of sample_rate={sr}"),
            (g["power"] in (1.0, 2.0), f"frontend.power={g['power']} must be 1 or 2"),
            (g["log_offset"] > 0, f"frontend.log_offset={g['log_offset']} must be > 0"),
            (g["pcm_bits"] in (0, 16), f"frontend.pcm_bits={g['pcm_bits']} must be 0 or 16"),
        ]
        for ok, msg in checks:
            if not ok:
                raise fail(msg)
    elif g["pcm_bits"] not in (0, 16):
        raise fail(f"frontend.pcm_bits={g['pcm_bits']} must be 0 or 16")

    card_shape = ModelCard(**{**kw, "decision": DecisionSettings()}).feature_shape
    scaling = raw.get("scaling", {})
    kw["mean"], kw["std"] = _load_scaling(scaling, card_shape, g, path, fail)

    dec = raw.get("decision", {})
    dkw = {}
    dfields = {f.name: f.default for f in dataclasses.fields(DecisionSettings)}
    for key, value in dec.items():
        if key not in dfields:
            continue
        want = dfields[key]
        if isinstance(want, int) and (isinstance(value, bool) or not isinstance(value, int)):
            raise fail(f"decision.{key}={value!r} must be an integer")
        if isinstance(want, float):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise fail(f"decision.{key}={value!r} must be a number")
            value = float(value)
        dkw[key] = value
    try:
        kw["decision"] = DecisionSettings(**dkw)
    except ValueError as exc:
        raise fail(f"[decision] {exc}") from None
    return ModelCard(**kw)


def _load_scaling(scaling: dict[str, Any], shape: tuple[int, ...], g: dict[str, Any],
                  path: Path | None, fail: Any) -> tuple[np.ndarray, np.ndarray]:
    """Mean and std as float32 arrays broadcastable to one window's features."""
    mean, std = scaling.get("mean", 0.0), scaling.get("std", 1.0)
    if isinstance(mean, str) or isinstance(std, str):
        if mean != std:
            raise fail("scaling.mean and scaling.std must name the same .npz file")
        npz = (path.parent if path else Path(".")) / mean
        try:
            with np.load(npz, allow_pickle=False) as data:
                mean, std = data["mean"], data["std"]
        except (OSError, KeyError, ValueError) as exc:
            raise fail(f"scaling file {npz} cannot be read: it needs arrays 'mean' and "
                       f"'std' ({exc})") from None
    out = []
    bands_axis = 0 if (g["kind"] == "logmel" and g["layout"] == "mel_time") else -1
    for name, value in (("mean", mean), ("std", std)):
        try:
            a = np.asarray(value, dtype=np.float32)
        except (TypeError, ValueError):
            raise fail(f"scaling.{name} must be a number, a list of numbers, or a .npz file") from None
        if a.ndim == 1 and g["kind"] == "logmel":
            if a.shape[0] != g["mel_bands"]:
                raise fail(f"scaling.{name} has {a.shape[0]} values but mel_bands="
                           f"{g['mel_bands']}")
            if bands_axis == 0:
                a = a[:, None]
        elif a.ndim >= 1 and a.shape != shape:
            raise fail(f"scaling.{name} has shape {a.shape}; one window's features are {shape}")
        if not np.all(np.isfinite(a)):
            raise fail(f"scaling.{name} holds non-finite values")
        if name == "std" and np.any(a <= 0):
            raise fail("scaling.std must be > 0 everywhere")
        out.append(a)
    return out[0], out[1]


def card_for_model(model_path: str | Path, card: str | Path | None = None) -> ModelCard:
    """The card given with ``--card``, or the one beside the model.

    Parameters
    ----------
    model_path : str or Path
        The model file; it must exist (a missing model is named as missing, not its card).
    card : str or Path, optional
        An explicit card file.

    Raises
    ------
    ModelError
        The model file does not exist.
    CardError
        No card beside the model and none given, or the card is invalid.
    """
    model_path = Path(model_path)
    if not model_path.exists():
        raise ModelError(f"{model_path}: model file not found")
    if card is not None:
        return load_card(card)
    beside = card_beside(model_path)
    if not beside.is_file():
        raise CardError(f"{model_path}: no model card {beside} beside it (give one with --card)")
    return load_card(beside)


__all__ = ["DecisionSettings", "ModelCard", "load_card", "card_from_dict", "card_for_model",
           "card_beside"]
