"""The model card: the sidecar TOML that says exactly how the model hears.

`load_card(path)` reads and validates it into one frozen `ModelCard` with one frozen config
per card table: `AudioConfig`, the stages' `FrontendConfig` (its keys are declared by the
stages in `monitor.features.stages`), `ScalingConfig` and `DecisionSettings`. Every key a front end
needs is explicit; nothing is inferred silently: a missing key that changes the numbers and
an unknown key are refused. Units are in the key names (`window_s`, `hop_s`) or documented
with the key (`fmin`, `fmax` and `sample_rate` in Hz).
"""

from __future__ import annotations

import dataclasses
import sys
from dataclasses import field
from pathlib import Path
from typing import Any, Literal

import numpy as np

from monitor.base.errors import CardError, ModelError
from monitor.base.records import record
from monitor.features.stages import (
    SCALING_KEYS,
    STAGES,
    AudioConfig,
    CardProblem,
    FrontendConfig,
    ScalingConfig,
    Stage,
    audio_from_table,
    build_stages,
    frontend_from_table,
    keys_of,
    nearest,
)
from monitor.features.stages.pcm import NO_PER_WINDOW

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

MAX_HOLD_S = 3600.0
Smoothing = Literal["none", "mean", "ema", "median"]
SMOOTHING = ("none", "mean", "ema", "median")


@record
class DecisionSettings:
    """Smoothing and hysteresis settings (the README's decision rules).

    Attributes
    ----------
    smoothing : {"none", "mean", "ema", "median"}
        How raw probabilities are smoothed.
    smoothing_windows : int
        Windows the mean or median covers (>= 1).
    ema_alpha : float
        The weight of the newest window in the EMA, in (0, 1].
    enter : float
        Smoothed probability a class needs to become the decision, in [0, 1].
    exit : float
        Below it the decision is released (0: never), in [0, 1].
    margin : float
        Lead over the current decision a new class needs, in [0, 1].
    confirm : int
        Windows in a row a new class must pass (>= 1).
    min_hold_s : float
        Seconds a decision holds before another may replace it (0 to 3600).
    """

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
        """The settings as a plain dict of field name to value."""
        return dataclasses.asdict(self)




@record
class ModelCard:
    """Everything the front end, runner and decider need to treat audio as the device will.

    One frozen config per card table; the derived values (and the names older code reads)
    are properties.

    Attributes
    ----------
    classes : tuple of str
        Output classes in the model's output order.
    audio : AudioConfig
        ``[audio]``: sample rate (Hz), window and hop (seconds).
    frontend : monitor.features.stages.FrontendConfig
        ``[frontend]``: the kind and one config per stage it runs.
    scaling : monitor.features.stages.ScalingConfig
        ``[scaling]``: mean and std broadcastable to one window's model input, per_window.
    decision : DecisionSettings
        ``[decision]``.
    output : {"probabilities", "logits", "sigmoid", "sigmoid_logits"}
        What the model's output is: "probabilities" (one class, a softmax's output),
        "logits" (one class, before the softmax: scenemon applies it), "sigmoid" (several
        labels, each its own probability) or "sigmoid_logits" (several labels, before the
        sigmoid: scenemon applies the logistic function).
    input_name, output_name : str or None
        The model's input and output tensor names, checked when the model has names (ONNX).
    """

    path: Path | None
    classes: tuple[str, ...]
    audio: AudioConfig
    frontend: FrontendConfig
    scaling: ScalingConfig = field(default_factory=ScalingConfig)
    decision: DecisionSettings = field(default_factory=DecisionSettings)
    output: Literal["probabilities", "logits", "sigmoid", "sigmoid_logits"] = "probabilities"
    input_name: str | None = None
    output_name: str | None = None

    # Derived values and the flat names kept for the code that reads them
    @property
    def model_names(self) -> tuple[str | None, str | None]:
        """The input and output tensor names the card gives (None where it gives none)."""
        return self.input_name, self.output_name

    @property
    def sample_rate(self) -> int:
        """Sample rate in Hz the model was trained on (``[audio]``)."""
        return self.audio.sample_rate

    @property
    def window_s(self) -> float:
        """Window length in seconds (``[audio]``)."""
        return self.audio.window_s

    @property
    def hop_s(self) -> float:
        """Hop length in seconds (``[audio]``)."""
        return self.audio.hop_s

    @property
    def window_samples(self) -> int:
        """Window length in samples (window_s x sample_rate, rounded)."""
        return self.audio.window_samples

    @property
    def hop_samples(self) -> int:
        """Hop length in samples (hop_s x sample_rate, rounded)."""
        return self.audio.hop_samples

    @property
    def kind(self) -> str:
        """The front end's kind: "waveform", "spectrogram", "logmel" or "mfcc"."""
        return self.frontend.kind

    @property
    def pcm_bits(self) -> int:
        """16 when the input is quantised to int16 first, else 0."""
        return self.frontend.pcm.pcm_bits

    @property
    def layout(self) -> str:
        """"time_mel", "mel_time" or "flat"; "samples" for a kind without frames."""
        return self.frontend.layout.layout if self.frontend.layout is not None else "samples"

    @property
    def time_axis(self) -> int:
        """The frames axis of one window's model input (0 without frames)."""
        return 1 if self.layout == "mel_time" else 0

    @property
    def bands(self) -> int:
        """Values per frame of the model input: mel bands, coefficients or bins (1 for
        samples)."""
        return self.frontend.bands()

    @property
    def mean(self) -> np.ndarray:
        """The ``[scaling]`` mean, broadcastable to one window's model input."""
        return self.scaling.mean

    @property
    def std(self) -> np.ndarray:
        """The ``[scaling]`` std, broadcastable to one window's model input."""
        return self.scaling.std

    @property
    def frames_per_window(self) -> int:
        """``1 + (L - n) // frame_step``, L the (padded) window, n the frame's span; 0 for a kind
        without frames."""
        return self.frontend.frames(self.audio)

    @property
    def feature_shape(self) -> tuple[int, ...]:
        """Shape of one window's model input, without batch or channel axis."""
        return self.frontend.shape(self.audio)

    def stages(self) -> list[Stage]:
        """The front end's stages, built from this card's audio, front-end and scaling configs.

        Returns
        -------
        list of Stage
            One built stage per stage of the kind, in order (active or not).
        """
        return build_stages(self.audio, self.frontend, self.scaling)

    def same_front_end(self, other: ModelCard) -> bool:
        """True when `other` computes the very same features from the same windows."""
        return (self.audio == other.audio and self.frontend == other.frontend
                and self.scaling.same(other.scaling))

    @property
    def name(self) -> str:
        """The card's path as text, or "<card>" for a card without a file."""
        return str(self.path) if self.path else "<card>"

    def describe_shape(self) -> str:
        """One window's features in words: "N samples" or "F frames x B bands" (or bins, ...)."""
        if self.frontend.framing is None:
            return f"{self.window_samples} samples"
        return f"{self.frames_per_window} frames x {self.bands} {self.frontend.band_name()}"

    def settings_dict(self) -> dict[str, Any]:
        """The card as plain data, for session.json."""
        def arr(a: np.ndarray) -> Any:
            return a.tolist()

        return {
            "classes": list(self.classes),
            "output": self.output,
            **({"input_name": self.input_name} if self.input_name else {}),
            **({"output_name": self.output_name} if self.output_name else {}),
            "audio": dataclasses.asdict(self.audio),
            "frontend": self.frontend.settings(),
            "scaling": {"mean": arr(self.mean), "std": arr(self.std),
                        "per_window": self.scaling.per_window},
            "card": str(self.path) if self.path else None,
        }

    def model_input_shape(self, input_shape: tuple[int | None, ...]) -> tuple[int, ...] | None:
        """One window's features as the model takes them: the card's feature shape, with a
        channel axis of 1 in front or behind where the model has one.

        Parameters
        ----------
        input_shape : tuple
            The model's input shape without the batch axis (None or -1: any size).

        Returns
        -------
        tuple of int or None
            The shape one window is reshaped to (the same values in the same order: a single
            channel changes no memory layout); None when the model takes something else.
        """
        want = tuple(self.feature_shape)
        shape = tuple(None if s is None or int(s) == -1 else int(s) for s in input_shape)

        def fits(s: tuple) -> bool:
            return len(s) == len(want) and all(a is None or a == b for a, b in zip(s, want))

        if fits(shape):
            return want
        if len(shape) == len(want) + 1:
            if shape[-1] in (1, None) and fits(shape[:-1]):
                return (*want, 1)
            if shape[0] in (1, None) and fits(shape[1:]):
                return (1, *want)
        return None

    def _layouts_that_fit(self, input_shape: tuple[int | None, ...]) -> list[str]:
        """The layouts under which the model's input would fit (the sizes match, not the axes)."""
        if self.frontend.framing is None or self.frontend.layout is None:
            return []
        out = []
        for layout in ("time_mel", "mel_time", "flat"):
            if layout == self.frontend.layout.layout:
                continue
            fe = dataclasses.replace(self.frontend,
                                     layout=dataclasses.replace(self.frontend.layout,
                                                                layout=layout))
            other = dataclasses.replace(self, frontend=fe)
            if other.model_input_shape(input_shape) is not None:
                out.append(layout)
        return out

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
            True when the model wants a trailing channel axis of size 1 (`model_input_shape`
            says where any channel axis goes).

        Raises
        ------
        ModelError
            When the card cannot produce what the model expects.
        """
        want = self.feature_shape
        fitted = self.model_input_shape(input_shape)
        if fitted is None:
            hint = ""
            layouts = self._layouts_that_fit(input_shape)
            if layouts:
                hint = (f": the sizes match, the axes do not; set layout = \"{layouts[0]}\" "
                        f"in [frontend]")
            elif self.frontend.framing is not None:
                keys = self.frontend.settings()
                shaping = [k for k in ("frame_step", "frame_length", "fft_length", "window_s",
                                       "center", "window_in_frame", "mel_bands", "mfcc",
                                       "layout") if k in keys or k == "window_s"]
                hint = f": check {', '.join(shaping[:-1])} and {shaping[-1]}"
            raise ModelError(
                f"{model_path}: model expects {tuple(input_shape)} but the card "
                f"{self.name} gives {self.describe_shape()}{hint}"
            )
        if n_outputs != len(self.classes):
            raise ModelError(
                f"{model_path}: model has {n_outputs} outputs but the card {self.name} "
                f"lists {len(self.classes)} classes"
            )
        return len(fitted) > len(want) and fitted[-1] == 1 and fitted[:-1] == want


FRONTEND_KEYS = ("kind", *dict.fromkeys(k for st in STAGES.values()
                                        if st.config is not None and st.name != "scaling"
                                        for k in keys_of(st.config)))
_TABLES = {"audio": tuple(keys_of(AudioConfig)), "frontend": FRONTEND_KEYS,
           "scaling": SCALING_KEYS,
           "decision": tuple(f.name for f in dataclasses.fields(DecisionSettings))}
OUTPUTS = ("probabilities", "logits", "sigmoid", "sigmoid_logits")  # the card's output kinds
_TOP = ("classes", "output", "input_name", "output_name", *_TABLES)


def card_beside(model_path: str | Path) -> Path:
    """The card beside a model: same stem, `.toml` (`demo.int8.tflite` -> `demo.int8.toml`).

    Parameters
    ----------
    model_path : str or Path
        The model file.

    Returns
    -------
    Path
        Where its card is expected.
    """
    return Path(model_path).with_suffix(".toml")


def read_card_table(path: str | Path) -> dict[str, Any]:
    """The parsed TOML of a card file (a UTF-8 byte-order mark is allowed), not validated.

    Raises
    ------
    CardError
        The file is missing, not a regular file (a link to one is followed), not UTF-8 or
        not TOML.

    Parameters
    ----------
    path : str or Path
        The card file.

    Returns
    -------
    dict
        The TOML tables as parsed.
    """
    from monitor.base.files import read_regular_bytes

    path = Path(path)
    if not path.exists():
        raise CardError(f"{path}: model card not found (give one with --card, or put "
                        f"a .toml with the model's stem beside it)")
    try:  # a card may be a link to a card (read where it points); never a FIFO or device
        data = read_regular_bytes(path.resolve())
    except OSError as exc:
        raise CardError(f"{path}: the model card cannot be read "
                        f"({exc.strerror or exc})") from None
    try:
        return tomllib.loads(data.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise CardError(f"{path}: not a UTF-8 text file, so not a model card") from None
    except tomllib.TOMLDecodeError as exc:
        raise CardError(f"{path}: not valid TOML ({exc})") from None


def load_card(path: str | Path) -> ModelCard:
    """Load and validate a model card.

    Raises
    ------
    CardError
        With the file, the key, its value and the rule broken.

    Parameters
    ----------
    path : str or Path
        The card file.

    Returns
    -------
    ModelCard
        The validated card.
    """
    return card_from_dict(read_card_table(path), Path(path))


def card_from_dict(raw: dict[str, Any], path: Path | None = None) -> ModelCard:
    """Validate a parsed card (see `load_card`).

    Every value is checked; an unknown key is refused with the nearest known one; a key that
    changes the numbers must be given (only the switches that are off by default may be left
    out); combinations that make no sense are refused. Sizes are bounded before anything is
    allocated.

    Parameters
    ----------
    raw : dict
        The parsed TOML.
    path : Path, optional
        The card's file, for messages and for a scaling ``.npz`` named relative to it.

    Returns
    -------
    ModelCard
        The validated card.

    Raises
    ------
    CardError
        A key that is unknown, missing, of the wrong type or value, or a combination that
        breaks a rule; the message names the file, the key, its value and the rule.
    """
    where = str(path) if path else "<card>"

    def fail(msg: str) -> CardError:
        return CardError(f"{where}: {msg}")

    for name in raw:
        if name not in _TOP:
            raise fail(f"{name} is not a card key{nearest(name, _TOP)}")
    for table, keys in _TABLES.items():
        sub = raw.get(table, {})
        if not isinstance(sub, dict):
            raise fail(f"[{table}] must be a table")
        if table == "frontend":
            continue  # the stages' own check names the nearest of their keys
        for name in sub:
            if name not in keys:
                raise fail(f"{table}.{name} is not a card key{nearest(name, keys)}")

    classes = raw.get("classes")
    if classes is None:
        raise fail("classes is missing (a list of class names in the model's output order)")
    if (not isinstance(classes, list) or len(classes) < 2
            or not all(isinstance(c, str) and c.strip() for c in classes)):
        raise fail(f"classes={classes!r} must be a list of at least two non-empty names")
    if len(set(classes)) != len(classes):
        dup = sorted({c for c in classes if classes.count(c) > 1})
        raise fail(f"classes lists {', '.join(dup)} more than once")
    output = raw.get("output", "probabilities")
    if output not in OUTPUTS:
        raise fail(f"output={output!r} must be one of {', '.join(OUTPUTS)}")
    names = {}
    for key in ("input_name", "output_name"):
        value = raw.get(key)
        if value is not None and (not isinstance(value, str) or not value.strip()):
            raise fail(f"{key}={value!r} must be the tensor's name, a non-empty string")
        names[key] = value

    try:
        audio = audio_from_table(raw.get("audio", {}))
        if "frontend" not in raw:
            raise CardProblem("[frontend] is missing: the card must say how the features are "
                              "made (kind and the keys of its stages)")
        frontend = frontend_from_table(raw["frontend"], audio)
    except CardProblem as exc:
        raise fail(str(exc)) from None

    shape = frontend.shape(audio)
    scaling = _scaling(raw.get("scaling", {}), frontend, shape, path, fail)
    if frontend.pcm.arithmetic == "q15" and scaling.per_window != "none":
        raise fail(NO_PER_WINDOW)

    dec = raw.get("decision", {})
    dkw = {}
    dfields = {f.name: f.default for f in dataclasses.fields(DecisionSettings)}
    for k, value in dec.items():
        want = dfields[k]
        if isinstance(want, int) and (isinstance(value, bool) or not isinstance(value, int)):
            raise fail(f"decision.{k}={value!r} must be an integer")
        if isinstance(want, float):
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                raise fail(f"decision.{k}={value!r} must be a number")
            value = float(value)
        dkw[k] = value
    try:
        decision = DecisionSettings(**dkw)
    except ValueError as exc:
        raise fail(f"[decision] {exc}") from None
    return ModelCard(path=path, classes=tuple(classes), audio=audio, frontend=frontend,
                     scaling=scaling, decision=decision, output=output, **names)




def with_arithmetic(card: ModelCard, arithmetic: str) -> ModelCard:
    """The card with its front end computed in `arithmetic` ("float32", "q15" or
    "micro-signal"; the last two take int16 samples, so ``pcm_bits`` becomes 16).

    Parameters
    ----------
    card : ModelCard
        The card.
    arithmetic : {"float32", "q15", "micro-signal"}
        The arithmetic wanted.

    Returns
    -------
    ModelCard
        A copy, checked as a card with that key would be.

    Raises
    ------
    CardError
        The card's kind or keys are not computed in that arithmetic (the message names the
        card and the key to change).
    """
    fe = card.frontend
    bits = 16 if arithmetic in ("q15", "micro-signal") else fe.pcm.pcm_bits
    pcm = dataclasses.replace(fe.pcm, arithmetic=arithmetic, pcm_bits=bits)
    new = dataclasses.replace(fe, pcm=pcm)
    try:
        pcm.check(new, card.audio)
        if arithmetic == "q15" and card.scaling.per_window != "none":
            raise CardProblem(NO_PER_WINDOW)
    except CardProblem as exc:
        raise CardError(f"{card.name}: the front end cannot be computed in {arithmetic} "
                        f"here: {exc}") from None
    return dataclasses.replace(card, frontend=new)


def _scaling(table: dict[str, Any], fe: FrontendConfig, shape: tuple[int, ...],
             path: Path | None, fail: Any) -> ScalingConfig:
    """Mean and std as float32 arrays broadcastable to one window's model input."""
    per = keys_of(ScalingConfig)["per_window"]
    try:
        per_window = per.check("scaling.per_window", table.get("per_window", per.default))
    except CardProblem as exc:
        raise fail(str(exc)) from None
    mean, std = table.get("mean", 0.0), table.get("std", 1.0)
    if isinstance(mean, str) or isinstance(std, str):
        if mean != std:
            raise fail("scaling.mean and scaling.std must name the same .npz file")
        mean, std = _scaling_file(mean, path, fail)
    out = []
    bands = fe.bands()
    mel_time = fe.layout is not None and fe.layout.layout == "mel_time"
    flat = fe.layout is not None and fe.layout.layout == "flat"
    for name, value in (("mean", mean), ("std", std)):
        try:
            a = np.asarray(value, dtype=np.float32)
        except (TypeError, ValueError):
            raise fail(f"scaling.{name} must be a number, a list of numbers, or a .npz "
                       f"file") from None
        if flat and a.ndim == 1 and a.shape[0] == bands and a.size != shape[0]:
            a = np.tile(a, shape[0] // bands)  # one per band, for every frame of the flat input
        elif flat and a.ndim == 2 and a.size == shape[0]:
            a = a.reshape(shape)  # (frames, bands) as computed, flattened frame after frame
        elif a.ndim == 1 and len(shape) == 2 and a.size == int(np.prod(shape)) \
                and a.size != bands:
            a = a.reshape(shape)  # a flat scaler of the whole input, in the model's order
        elif a.ndim == 1 and len(shape) == 2:
            if a.shape[0] != bands:
                raise fail(f"scaling.{name} has {a.shape[0]} values, but the features have "
                           f"{bands} per frame (one value per band) and {int(np.prod(shape))} "
                           f"in all: give one per band, the full shape {shape}, or all "
                           f"{int(np.prod(shape))} flat in the model's input order")
            if mel_time:
                a = a[:, None]
        elif a.ndim >= 1 and a.shape != shape:
            raise fail(f"scaling.{name} has shape {a.shape}; one window's features are {shape}")
        if not np.all(np.isfinite(a)):
            raise fail(f"scaling.{name} holds non-finite values")
        if name == "std" and np.any(a <= 0):
            raise fail("scaling.std must be > 0 everywhere")
        out.append(a)
    return ScalingConfig(out[0], out[1], per_window)


def _scaling_file(name: str, path: Path | None, fail: Any) -> tuple[np.ndarray, np.ndarray]:
    import io

    from monitor.base.files import read_regular_bytes

    npz = (path.parent if path else Path(".")) / name
    if npz.suffix.lower() != ".npz":
        raise fail(f"scaling names {name}, but the scaling file must be a .npz holding arrays "
                   f"'mean' and 'std' (numpy.savez(file, mean=..., std=...)), not "
                   f"{npz.suffix or 'a file without extension'}")
    try:
        data = read_regular_bytes(npz)
    except OSError as exc:
        raise fail(f"scaling file {npz} cannot be read ({exc.strerror or exc})") from None
    try:
        with np.load(io.BytesIO(data), allow_pickle=False) as z:
            if not isinstance(z, np.lib.npyio.NpzFile):  # pragma: no cover
                raise ValueError("not an .npz archive")
            if "mean" not in z.files or "std" not in z.files:
                found = ", ".join(repr(f) for f in z.files) or "no arrays"
                raise fail(f"scaling file {npz} holds {found}, not arrays 'mean' and 'std' "
                           f"(numpy.savez(file, mean=scaler.mean_, std=scaler.scale_))")
            return np.asarray(z["mean"]), np.asarray(z["std"])
    except (OSError, ValueError, AttributeError, EOFError) as exc:
        raise fail(f"scaling file {npz} is not an .npz holding arrays 'mean' and 'std' "
                   f"({type(exc).__name__}: {exc})") from None


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

    Returns
    -------
    ModelCard
        The validated card.
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


__all__ = ["AudioConfig", "DecisionSettings", "ModelCard", "read_card_table", "load_card", "card_from_dict", "card_for_model",
           "card_beside"]
