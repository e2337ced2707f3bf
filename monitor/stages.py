"""The front end as a short pipeline of stages, one small unit each.

A stage has its own frozen config (the card keys it owns, each with its type, allowed values,
default and meaning), its float32 computation (`run`), its float64 reference (`reference`),
and what the portable C front end needs from it (`c_lines`: ``#define``s and constant
tables; `c_buffers`: the static arrays ``frontend.c`` keeps for it; `ops`: its work per
hop). A kind is a list of stages (`KINDS`). Adding a stage means one config class, one
stage class, one field of `FrontendConfig` and its place in `KINDS`, here, plus its block in
``device/frontend.c`` and its tests; the card, `FrontEnd`, the C header, ``budget`` and
``card check`` pick it up from here.

The order and the exact semantics (the README's "The model card"): int16 quantisation,
pre-emphasis within each window, centre padding, framing, window, ``|rfft|^power``, mel
matrix, log (offset, floor, log, dB reference, top_db), DCT-II and lifter, layout, scaling.

Parts: "samples" stages work on a window's samples, "frames" stages on one frame at a time
(their output is what a stream shares between overlapping windows), "features" stages on a
window's stack of frames, "output" stages give the model input.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, ClassVar, Literal

import numpy as np
import scipy.fft

from monitor.dsp import dct_matrix, lifter_weights, mel_filterbank, window_coefficients
from monitor.samples import quantise_pcm16

if TYPE_CHECKING:  # pragma: no cover
    from monitor.card import AudioConfig, ModelCard

Kind = Literal["waveform", "spectrogram", "logmel", "mfcc"]
Part = Literal["samples", "frames", "features", "output"]

# Sane bounds, checked before anything is allocated (a card is untrusted input).
MAX_FFT = 32768  # the C front end indexes bins with int16_t
MAX_BANDS = 1024
MAX_SAMPLES = 1 << 22  # one window or hop: 262 s at 16 kHz, 87 s at 48 kHz
MAX_WORK = 1 << 23  # frames x fft_length of one window (32 MiB of float32)
PER_WINDOW_EPS = 1e-8


class CardProblem(ValueError):
    """A card value or combination breaks a rule (the message names the key, not the file)."""


class _Marker:
    def __init__(self, name: str) -> None:
        self.name = name

    def __repr__(self) -> str:
        return self.name


REQUIRED = _Marker("REQUIRED")  # the card must give the key when its stage runs
NO_OFF = _Marker("NO_OFF")  # the key has no value that means "nothing changes"


@dataclass(frozen=True)
class Key:
    """One card key: its type, allowed values, default and meaning.

    ``default`` is REQUIRED for a key that changes the numbers and has no off state (the card
    must give it); ``off`` is the value that changes nothing, so a key of a stage the kind
    does not run may carry it (and no other: a key without one is refused there); for a key
    that is no switch it is the value a card written out at the defaults carries
    (``dct_norm = "ortho"`` beside ``mfcc = 0``); ``needs`` names a switch of the same stage
    without which the key does nothing (``pad_mode`` needs ``center``).
    """

    type: type
    doc: str
    choices: tuple = ()
    lo: float | None = None
    hi: float | None = None
    above: bool = False  # lo itself is not allowed
    default: Any = REQUIRED
    off: Any = NO_OFF
    needs: str | None = None

    def is_off(self, value: Any) -> bool:
        """True when `value` is the key's off value (``false`` is not ``0``, nor ``0`` false)."""
        return (self.off is not NO_OFF and isinstance(value, bool) == isinstance(self.off, bool)
                and value == self.off)

    def allowed(self) -> str:
        """The allowed values, as the end of "... must be ..."."""
        if self.type is bool:
            return "true or false"
        if self.type is str:
            return "one of " + ", ".join(self.choices)
        if self.choices:
            return " or ".join(f"{c:g}" for c in self.choices)
        noun = "an integer" if self.type is int else "a number"
        if self.lo is not None and self.hi is not None and not self.above:
            return f"{noun} from {self.lo:g} to {self.hi:g}"
        if self.lo is not None:
            text = f"{noun} {'>' if self.above else '>='} {self.lo:g}"
            return text + (f" and <= {self.hi:g}" if self.hi is not None else "")
        return noun

    def check(self, label: str, value: Any) -> Any:
        """The value, converted (an integer is a fine float); CardProblem when not allowed."""
        def bad(v: Any = value) -> CardProblem:
            return CardProblem(f"{label}={show_value(v)} must be {self.allowed()}")

        if self.type is bool:
            if not isinstance(value, bool):
                raise bad()
            return value
        if self.type is str:
            if not isinstance(value, str) or value not in self.choices:
                raise bad()
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad()
        if self.type is int:
            if not isinstance(value, int):
                raise bad()
        else:
            value = float(value)
            if not math.isfinite(value):
                raise CardProblem(f"{label}={show_value(value)} must be a finite number "
                                  f"({self.allowed()})")
        if self.choices and value not in self.choices:
            raise bad(value)
        if self.lo is not None and (value < self.lo or (self.above and value == self.lo)):
            raise bad(value)
        if self.hi is not None and value > self.hi:
            raise bad(value)
        return value


def show_value(value: Any) -> str:
    """A card value as a message shows it: TOML's true/false, a quoted string, else repr."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    return repr(value)


def key(type_: type, doc: str, **kw: Any) -> Any:
    """A dataclass field that is a card key (see `Key`)."""
    k = Key(type_, doc, **kw)
    if k.default is REQUIRED:
        return field(metadata={"key": k})
    return field(default=k.default, metadata={"key": k})


def keys_of(config: type) -> dict[str, Key]:
    """The card keys of a config class, in declaration order."""
    return {f.name: f.metadata["key"] for f in dataclasses.fields(config) if "key" in f.metadata}


def nearest(name: str, known) -> str:
    """", did you mean X?" for the nearest known name, or ""."""
    close = difflib.get_close_matches(name, list(known), n=1, cutoff=0.6)
    return f"; did you mean {close[0]}?" if close else ""


# --- stage configs (one per stage; the field names are the card keys) ---------------------
@dataclass(frozen=True)
class PcmConfig:
    """The pcm stage's key: ``pcm_bits``, 16 to quantise the input to int16, 0 to keep it."""
    pcm_bits: int = key(int, "16: quantise the input to int16 first, as the device's "
                        "microphone path does; 0: keep float", choices=(0, 16), default=0, off=0)


@dataclass(frozen=True)
class PreemphasisConfig:
    """The pre-emphasis stage's key: the coefficient ``preemphasis`` (0: off)."""
    preemphasis: float = key(float, "a > 0: y[0] = x[0], y[n] = x[n] - a x[n-1], within each "
                             "window", lo=0.0, hi=1.0, default=0.0, off=0.0)


@dataclass(frozen=True)
class CentreConfig:
    """The centre stage's keys: padding by fft_length // 2 samples, and with what."""
    center: bool = key(bool, "true: pad each window by fft_length // 2 on both sides first",
                       default=False, off=False)
    pad_mode: str = key(str, "with center: \"constant\" (zeros) or \"reflect\"",
                        choices=("constant", "reflect"), default="constant", off="constant",
                        needs="center")

    def pad(self, fe: FrontendConfig) -> int:
        """Samples padded on each side of a window: fft_length // 2 with center, else 0."""
        return fe.framing.fft_length // 2 if self.center else 0

    def check(self, fe: FrontendConfig, audio: AudioConfig) -> None:
        """CardProblem for pad_mode "reflect" when the padding is not shorter than the window."""
        if self.center and self.pad_mode == "reflect" and self.pad(fe) >= audio.window_samples:
            raise CardProblem(f"frontend.pad_mode=\"reflect\" needs a window longer than the "
                              f"padding: fft_length // 2 = {self.pad(fe)} samples against "
                              f"{audio.window_samples} (use pad_mode = \"constant\")")


@dataclass(frozen=True)
class FramingConfig:
    """The framing stage's keys: frame length, step and FFT size in samples, window place."""
    frame_length: int = key(int, "samples per frame (the window's length)", lo=2, hi=MAX_FFT)
    frame_step: int = key(int, "samples between frames", lo=1, hi=MAX_SAMPLES)
    fft_length: int = key(int, "FFT size, a power of two >= frame_length (the C front end's "
                          "radix-2 FFT)", lo=16, hi=MAX_FFT)
    window_in_frame: str = key(str, "\"start\": frame_length samples, zero-padded at the end "
                               "to fft_length; \"centre\": fft_length samples, the window "
                               "centred in them", choices=("start", "centre"), default="start")

    @property
    def span(self) -> int:
        """Samples one frame covers: frame_length ("start") or fft_length ("centre")."""
        return self.fft_length if self.window_in_frame == "centre" else self.frame_length

    @property
    def offset(self) -> int:
        """Where the window sits in the frame (and in the FFT buffer)."""
        return (self.fft_length - self.frame_length) // 2 if self.window_in_frame == "centre" else 0

    def frames(self, padded: int) -> int:
        """``1 + (L - n) // frame_step`` for a (padded) window of L samples; 0 if it is shorter."""
        return 1 + (padded - self.span) // self.frame_step if padded >= self.span else 0

    def check(self, fe: FrontendConfig, audio: AudioConfig) -> None:
        """CardProblem unless fft_length is a power of two >= frame_length, a frame fits
        in the (padded) window and frames x fft_length stays within MAX_WORK.
        """
        n = self.fft_length
        if n & (n - 1):
            raise CardProblem(f"frontend.fft_length={n} must be a power of two from 16 to "
                              f"{MAX_FFT} (the C front end's radix-2 FFT)")
        if self.frame_length > n:
            raise CardProblem(f"frontend.frame_length={self.frame_length} must not exceed "
                              f"fft_length={n}")
        padded = audio.window_samples + 2 * fe.centre.pad(fe)
        if self.span > padded:
            what = "fft_length" if self.window_in_frame == "centre" else "frame_length"
            raise CardProblem(f"frontend.{what}={self.span} is longer than the window "
                              f"({padded} samples{' with the centre padding' if padded > audio.window_samples else ''})")
        if self.frames(padded) * n > MAX_WORK:
            raise CardProblem(f"frontend.frame_step={self.frame_step} gives "
                              f"{self.frames(padded)} frames of {n} points per window, more "
                              f"than {MAX_WORK} values; use a larger frame_step or a shorter "
                              f"window")


@dataclass(frozen=True)
class WindowConfig:
    """The window stage's keys: Hann or Hamming, periodic or symmetric."""
    window: str = key(str, "\"hann\" or \"hamming\" (Harris 1978); periodic unless "
                      "window_symmetric", choices=("hann", "hamming"))
    window_symmetric: bool = key(bool, "true: the symmetric window (np.hanning) instead of the "
                                 "periodic one", default=False, off=False)


@dataclass(frozen=True)
class SpectrumConfig:
    """The spectrum stage's key: ``power``, 1 for magnitude, 2 for power."""
    power: float = key(float, "1: magnitude |X|, 2: power |X|^2", choices=(1.0, 2.0))


@dataclass(frozen=True)
class MelConfig:
    """The mel stage's keys: band count, edges in Hz, mel scale, normalisation, triangles."""
    mel_bands: int = key(int, "triangular mel bands", lo=1, hi=MAX_BANDS)
    fmin: float = key(float, "Hz, lower edge of the lowest band", lo=0.0)
    fmax: float = key(float, "Hz, upper edge of the highest band, at most sample_rate / 2",
                      lo=0.0, above=True)
    mel_scale: str = key(str, "\"htk\" (2595 log10(1 + f/700)) or \"slaney\"",
                         choices=("htk", "slaney"))
    mel_norm: str = key(str, "\"none\" or \"slaney\" (each band scaled to unit area in Hz)",
                        choices=("none", "slaney"))
    mel_triangles: str = key(str, "\"hz\": triangles linear in Hz at the FFT bins (librosa); "
                             "\"mel\": linear in mel (TensorFlow, CMSIS-DSP)",
                             choices=("hz", "mel"))

    def check(self, fe: FrontendConfig, audio: AudioConfig) -> None:
        """CardProblem unless fmin < fmax <= sample_rate / 2 and mel_bands <= the FFT bins."""
        nyq = audio.sample_rate / 2
        if not self.fmin < self.fmax:
            raise CardProblem(f"frontend.fmin={self.fmin} must be >= 0 and below "
                              f"fmax={self.fmax}")
        if self.fmax > nyq:
            raise CardProblem(f"frontend.fmax={self.fmax} is above the Nyquist frequency "
                              f"{nyq:g} Hz of sample_rate={audio.sample_rate}")
        bins = fe.framing.fft_length // 2 + 1
        if self.mel_bands > bins:
            raise CardProblem(f"frontend.mel_bands={self.mel_bands} must not exceed the "
                              f"{bins} FFT bins of fft_length={fe.framing.fft_length}")


@dataclass(frozen=True)
class LogConfig:
    """The log stage's keys: which log, its offset and floor, for dB its reference and top_db."""
    log: str = key(str, "\"ln\", \"log10\" or \"db\" (10 log10 of power, 20 log10 of "
                   "magnitude)", choices=("ln", "log10", "db"))
    log_offset: float = key(float, "added before the log (0 with a log_floor)", lo=0.0, hi=1e6)
    log_floor: float = key(float, "values below it are raised to it before the log (after "
                           "log_offset; librosa's amin)", lo=0.0, hi=1e6, default=0.0, off=0.0)
    db_ref: str = key(str, "log = \"db\": \"one\" (10 log10(x / 1)) or \"max\" (minus the "
                      "window's own maximum; librosa's ref=np.max)", choices=("one", "max"),
                      default="one", off="one")
    top_db: float = key(float, "log = \"db\", > 0: values below the window's maximum minus "
                        "top_db are raised to it", lo=0.0, hi=1000.0, default=0.0, off=0.0)

    def check(self, fe: FrontendConfig, audio: AudioConfig) -> None:
        """CardProblem when log_offset and log_floor are both 0, or top_db or db_ref "max"
        is given without log = "db".
        """
        if self.log_offset == 0 and self.log_floor == 0:
            raise CardProblem("frontend.log_offset=0.0 needs a log_floor > 0 (silence would "
                              "give log(0)); give log_offset > 0 or log_floor > 0")
        if self.top_db > 0 and self.log != "db":
            raise CardProblem(f"frontend.top_db={self.top_db} needs log = \"db\" (it floors "
                              f"decibels), not log = \"{self.log}\"")
        if self.db_ref != "one" and self.log != "db":
            raise CardProblem(f"frontend.db_ref=\"{self.db_ref}\" needs log = \"db\", not "
                              f"log = \"{self.log}\"")

    def factor(self, fe: FrontendConfig) -> float:
        """dB units: 10 for power, 20 for magnitude (1 for ln and log10)."""
        return 10.0 * 2.0 / fe.spectrum.power if self.log == "db" else 1.0


@dataclass(frozen=True)
class DctConfig:
    """The dct stage's keys (kind "mfcc"): coefficients kept, DCT-II normalisation, lifter."""
    mfcc: int = key(int, "kind = \"mfcc\": coefficients kept from the DCT-II of the log-mel",
                    lo=1, hi=MAX_BANDS, off=0)
    # off: "ortho" is what a card written out at the defaults carries beside kind = "logmel"
    dct_norm: str = key(str, "\"ortho\" (scipy.fft.dct norm=\"ortho\") or \"uniform\" (every "
                        "row times sqrt(2 / mel_bands): TensorFlow, CMSIS-DSP)",
                        choices=("ortho", "uniform"), off="ortho")
    lifter: float = key(float, "> 0: coefficient n (from 0) times 1 + (lifter/2) "
                        "sin(pi (n+1) / lifter)", lo=0.0, hi=1e4, default=0.0, off=0.0)

    def check(self, fe: FrontendConfig, audio: AudioConfig) -> None:
        """CardProblem when mfcc exceeds mel_bands."""
        if self.mfcc > fe.mel.mel_bands:
            raise CardProblem(f"frontend.mfcc={self.mfcc} must not exceed "
                              f"mel_bands={fe.mel.mel_bands}")


@dataclass(frozen=True)
class LayoutConfig:
    """The layout stage's key: the model input's axis order, "time_mel" or "mel_time"."""
    layout: str = key(str, "model input axes after the batch: \"time_mel\" (frames, bands) or "
                      "\"mel_time\" (bands, frames); a channel axis is added if the model has "
                      "one", choices=("time_mel", "mel_time"))


@dataclass(frozen=True)
class ScalingConfig:
    """The ``[scaling]`` table: standardisation learned in training, and per window."""

    mean: np.ndarray = field(default_factory=lambda: np.zeros((), np.float32), compare=False)
    std: np.ndarray = field(default_factory=lambda: np.ones((), np.float32), compare=False)
    per_window: str = key(str, "\"standardise\": minus the window's mean of all its feature "
                          "values, over their population std + 1e-8, before mean / std",
                          choices=("none", "standardise"), default="none", off="none")

    def same(self, other: ScalingConfig) -> bool:
        """True when per_window, mean and std are equal (``==`` leaves the arrays out)."""
        return (self.per_window == other.per_window and np.array_equal(self.mean, other.mean)
                and np.array_equal(self.std, other.std))


SCALING_KEYS = ("mean", "std", *keys_of(ScalingConfig))


@dataclass(frozen=True)
class FrontendConfig:
    """The ``[frontend]`` table: the kind, and one config per stage (None when the kind
    does not run the stage)."""

    kind: Kind
    pcm: PcmConfig
    preemphasis: PreemphasisConfig
    centre: CentreConfig | None = None
    framing: FramingConfig | None = None
    window: WindowConfig | None = None
    spectrum: SpectrumConfig | None = None
    mel: MelConfig | None = None
    log: LogConfig | None = None
    dct: DctConfig | None = None
    layout: LayoutConfig | None = None

    def stage_configs(self) -> list[tuple[str, Any]]:
        """(stage name, config) of the stages the kind runs, in order (scaling aside)."""
        return [(n, getattr(self, n)) for n in KINDS[self.kind] if n != "scaling"]

    def settings(self) -> dict[str, Any]:
        """The table as flat key = value pairs (the keys of the stages the kind runs)."""
        out: dict[str, Any] = {"kind": self.kind}
        for _, cfg in self.stage_configs():
            out.update({k: getattr(cfg, k) for k in keys_of(type(cfg))})
        return out

    def pad(self) -> int:
        """Samples of centre padding on each side of a window (0 without it)."""
        return self.centre.pad(self) if self.centre is not None else 0

    def frames(self, audio: AudioConfig) -> int:
        """Frames per window (0 for a kind without frames)."""
        if self.framing is None:
            return 0
        return self.framing.frames(audio.window_samples + 2 * self.pad())

    def bands(self) -> int:
        """Values per frame of the features (1 for a kind without frames)."""
        width = 1
        for name, cfg in self.stage_configs():
            width = STAGES[name].width(cfg, self, width)
        return width

    def band_name(self) -> str:
        """What the values of a frame are: "bins", "bands", "coefficients" ("samples")."""
        name = "samples"
        for stage, _ in self.stage_configs():
            name = STAGES[stage].band_name or name
        return name

    def time_major_shape(self, audio: AudioConfig) -> tuple[int, ...]:
        """One window's features before layout: ``(frames, bands)``, or ``(samples,)``."""
        if self.framing is None:
            return (audio.window_samples,)
        return (self.frames(audio), self.bands())

    def shape(self, audio: AudioConfig) -> tuple[int, ...]:
        """One window's model input, without batch or channel axis."""
        shape = self.time_major_shape(audio)
        if self.layout is not None and self.layout.layout == "mel_time":
            return shape[::-1]
        return shape


def frontend_from_table(table: dict[str, Any], audio: AudioConfig) -> FrontendConfig:
    """Validate a ``[frontend]`` table (see `Key`); CardProblem names the key and the rule.

    Every key of a stage the kind runs is checked and a missing one that changes the numbers
    is refused; a key of a stage it does not run may only carry its off value (one without an
    off value is refused there at any value, naming the kind); an unknown key
    is refused with the nearest known one; then each stage checks its combinations.
    """
    if "kind" not in table:
        raise CardProblem(f"frontend.kind is missing: it must be one of {', '.join(KINDS)}")
    kind = Key(str, "", choices=tuple(KINDS)).check("frontend.kind", table["kind"])
    known = {"kind"}
    for st in STAGES.values():
        if st.config is not None and st.name != "scaling":
            known.update(keys_of(st.config))
    for name in table:
        if name not in known:
            raise CardProblem(f"frontend.{name} is not a card key{nearest(name, known)}")
    used = KINDS[kind]
    runs = {}
    for st in STAGES.values():
        if st.config is None or st.name == "scaling":
            continue
        ks = keys_of(st.config)
        values: dict[str, Any] = {}
        for name, k in ks.items():
            label = f"frontend.{name}"
            given = name in table
            if st.name not in used:
                if given and not k.is_off(table[name]):
                    k.check(label, table[name])
                    users = ", ".join(f'"{n}"' for n, s in KINDS.items() if st.name in s)
                    fix = "remove it" + (f" or set it to {show_value(k.off)}"
                                         if k.off is not NO_OFF else "")
                    raise CardProblem(f"{label}={show_value(table[name])} has no effect with "
                                      f"kind = \"{kind}\" (the {st.name} stage runs in kind "
                                      f"{users}); {fix}")
                continue
            needed = k.needs is None or values.get(k.needs) is True
            if not given:
                if k.default is REQUIRED or (k.needs and needed):
                    raise CardProblem(_missing(label, k, kind, k.needs))
                values[name] = k.default
                continue
            value = k.check(label, table[name])
            if not needed and value != k.off:
                raise CardProblem(f"{label}={show_value(value)} needs {k.needs} = true")
            values[name] = value
        if st.name in used:
            runs[st.name] = st.config(**values)
    fe = FrontendConfig(kind=kind, **runs)
    for _name, cfg in fe.stage_configs():
        check: Callable | None = getattr(cfg, "check", None)
        if check is not None:
            check(fe, audio)
    return fe


def _missing(label: str, k: Key, kind: str, needs: str | None) -> str:
    why = f"{needs} = true needs it" if needs else f"kind = \"{kind}\" needs it"
    return f"{label} is missing: {why} and it has no default ({k.allowed()})"


# --- the C header's pieces ---------------------------------------------------------------
def cfloat(v: float) -> str:
    """A C float literal: 9 significant digits, always with a point or an exponent."""
    text = f"{float(v):.9g}"
    if not any(ch in text for ch in ".eEn"):
        text += ".0"
    return text + "f"


def c_floats(name: str, values, per_line: int = 8) -> str:
    """A C ``static const float`` table of `values` (flattened, float32), `per_line` a line."""
    vals = [cfloat(v) for v in np.asarray(values, dtype=np.float32).reshape(-1)]
    body = ",\n".join("    " + ", ".join(vals[i:i + per_line]) for i in range(0, len(vals), per_line))
    return f"static const float {name}[{len(vals)}] = {{\n{body}\n}};"


def c_ints(name: str, ctype: str, values, per_line: int = 12) -> str:
    """A C ``static const`` table of type `ctype` of integer `values`, `per_line` a line."""
    vals = [str(int(v)) for v in values]
    body = ",\n".join("    " + ", ".join(vals[i:i + per_line]) for i in range(0, len(vals), per_line))
    return f"static const {ctype} {name}[{len(vals)}] = {{\n{body}\n}};"


def c_define(name: str, value: Any, comment: str = "") -> str:
    """A ``#define`` line (a bool as 0 or 1, a float as `cfloat`), with `comment` if given."""
    if isinstance(value, bool):
        value = int(value)
    if isinstance(value, float):
        value = cfloat(value)
    return f"#define {name} {value}" + (f" /* {comment} */" if comment else "")


def sparse_bank(weights: np.ndarray) -> tuple[list[int], list[int], np.ndarray]:
    """(first bins, lengths, packed weights) of a (bands, bins) filterbank, the way embedded
    DSP libraries store one."""
    first, length, packed = [], [], []
    for row in weights:
        nz = np.flatnonzero(row)
        if nz.size == 0:
            first.append(0)
            length.append(0)
            continue
        a, b = int(nz[0]), int(nz[-1]) + 1
        first.append(a)
        length.append(b - a)
        packed.append(row[a:b])
    return first, length, (np.concatenate(packed) if packed else np.zeros(0, np.float32))


# --- stages ------------------------------------------------------------------------------
class Stage:
    """One step of the front end, built once per card (matrices and windows here).

    Subclasses set `name` (their field of `FrontendConfig`), `config` (their config class),
    `part`, and override what they do. `active` is False for a switch that is off: the
    stage is then left out of the computation (and its C flag is 0).
    """

    name: ClassVar[str]
    config: ClassVar[type | None]
    part: ClassVar[Part]
    left: ClassVar[int] = 0  # samples at a window's start that differ from the stream's
    band_name: ClassVar[str | None] = None  # what its output values per frame are called

    def __init__(self, card: ModelCard) -> None:
        self.card = card
        self.fe = card.frontend
        self.cfg = getattr(self.fe, self.name)

    @property
    def active(self) -> bool:
        """False when the card switches the stage off (it is then skipped); True here."""
        return True

    @staticmethod
    def width(cfg: Any, fe: FrontendConfig, width: int) -> int:
        """Values per frame after this stage, given `width` before it."""
        return width

    def run(self, x: np.ndarray) -> np.ndarray:
        """The float32 computation."""
        return x

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same in float64, built independently where it can be."""
        return x

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


class PcmStage(Stage):
    """Quantisation of the input samples to int16 steps (``pcm_bits = 16``)."""
    name, config, part = "pcm", PcmConfig, "samples"

    @property
    def active(self) -> bool:
        """On when pcm_bits = 16."""
        return self.cfg.pcm_bits == 16

    @property
    def history(self) -> int:
        """Samples the C stream keeps: the window rounded up to whole hops."""
        a = self.card.audio
        return -(-a.window_samples // a.hop_samples) * a.hop_samples

    def run(self, x: np.ndarray) -> np.ndarray:
        """Samples rounded to int16 steps (x 32768, clipped to int16, / 32768), float32."""
        return quantise_pcm16(x)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same quantisation, returned as float64."""
        return quantise_pcm16(x).astype(np.float64)

    def c_lines(self) -> list[str]:
        """SM_PCM_BITS and SM_HIST_SAMPLES, the stream's history length."""
        return [c_define("SM_PCM_BITS", self.cfg.pcm_bits, "16: float input quantised to int16"),
                c_define("SM_HIST_SAMPLES", self.history,
                         "the stream's history: the window rounded up to whole hops")]

    def c_buffers(self) -> dict[str, int]:
        """The stream's history ``sm_hist`` (float32) and its int32 fill count ``sm_filled``."""
        return {"sm_hist": 4 * self.history, "sm_filled": 4}


class PreemphasisStage(Stage):
    """Pre-emphasis within each window (off when the coefficient is 0)."""
    name, config, part = "preemphasis", PreemphasisConfig, "samples"

    @property
    def active(self) -> bool:
        """On when preemphasis > 0."""
        return self.cfg.preemphasis > 0

    @property
    def left(self) -> int:  # type: ignore[override]
        """1 when active: a window's first sample has no predecessor inside it."""
        return 1 if self.active else 0

    def run(self, x: np.ndarray) -> np.ndarray:
        """Pre-emphasis y[0] = x[0], y[n] = x[n] - coef * x[n-1] within each window, float32."""
        y = np.empty_like(x)
        y[..., :1] = x[..., :1]
        np.subtract(x[..., 1:], np.float32(self.cfg.preemphasis) * x[..., :-1], out=y[..., 1:])
        return y

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same difference, in the input's precision (float64 in the reference)."""
        y = x.copy()
        y[..., 1:] = x[..., 1:] - self.cfg.preemphasis * x[..., :-1]
        return y

    def c_lines(self) -> list[str]:
        """SM_PREEMPHASIS, the coefficient."""
        return [c_define("SM_PREEMPHASIS", float(self.cfg.preemphasis), "y[n] = x[n] - a x[n-1]")]

    def ops(self, new_frames: int) -> dict[str, int]:
        """One multiply-subtract per new sample of the hop, when active."""
        return {"pre-emphasis": self.card.audio.hop_samples} if self.active else {}


class CentreStage(Stage):
    """Centre padding: fft_length // 2 samples on each side of a window, zeros or reflected."""
    name, config, part = "centre", CentreConfig, "samples"

    @property
    def active(self) -> bool:
        """On when center = true."""
        return self.cfg.center

    @property
    def pad(self) -> int:
        """Samples padded on each side: fft_length // 2 with center, else 0."""
        return self.cfg.pad(self.fe)

    def run(self, x: np.ndarray) -> np.ndarray:
        """Windows padded by `pad` samples at both ends of the last axis (np.pad, pad_mode)."""
        p = self.pad
        return np.pad(x, [(0, 0)] * (x.ndim - 1) + [(p, p)], mode=self.cfg.pad_mode)

    reference = run

    def stream(self, x: np.ndarray) -> np.ndarray:
        """The stream unchanged."""
        return x  # the stream is not padded: only the frames at a window's edges see padding

    def c_lines(self) -> list[str]:
        """SM_PAD (0 when off) and SM_PAD_REFLECT."""
        return [c_define("SM_PAD", self.pad if self.active else 0, "samples padded on each side"),
                c_define("SM_PAD_REFLECT", self.active and self.cfg.pad_mode == "reflect",
                         "1: reflect, 0: zeros")]


class FramingStage(Stage):
    """Frames of a (padded) window, and which of them a stream shares between windows."""
    name, config, part = "framing", FramingConfig, "frames"

    def __init__(self, card: ModelCard) -> None:
        super().__init__(card)
        c, a = self.cfg, card.audio
        self.frames = self.fe.frames(a)
        pad = self.fe.pad()
        left = PreemphasisStage(card).left
        # frame t uses window samples u_t = t * step + offset - pad .. u_t + frame_length: the
        # frames that lie inside the window (past the pre-emphasis start) are the same for
        # every window that holds those samples, so a stream computes them once
        base = c.offset - pad
        lo = max(0, -(-(left - base) // c.frame_step))
        hi = min(self.frames - 1, (a.window_samples - c.frame_length - base) // c.frame_step)
        self.shared = (lo, hi)  # first and last shared frame; hi < lo: none
        self.first_sample = lo * c.frame_step + base  # window sample of the first shared frame
        hop = a.hop_samples
        self.share_step = (hop // c.frame_step
                           if hop % c.frame_step == 0 and hop // c.frame_step <= hi - lo else 0)
        self.edges = np.array([t for t in range(self.frames) if not lo <= t <= hi], np.intp)

    @staticmethod
    def width(cfg: Any, fe: FrontendConfig, width: int) -> int:
        """frame_length values per frame."""
        return cfg.frame_length

    def run(self, x: np.ndarray, which: np.ndarray | None = None) -> np.ndarray:
        """Frames ``(n, frames, frame_length)`` of padded windows ``(n, L)`` (a view; a copy
        of the frames `which` when given): the samples the window multiplies."""
        c = self.cfg
        view = np.lib.stride_tricks.sliding_window_view(x, c.frame_length, axis=-1)
        view = view[..., c.offset::c.frame_step, :][..., : self.frames, :]
        return view if which is None else view[..., which, :]

    def reference(self, x: np.ndarray) -> np.ndarray:
        """Frames ``(n, frames, span)``: all the samples each frame covers, as the card says."""
        c = self.cfg
        idx = np.arange(c.span)[None, :] + c.frame_step * np.arange(self.frames)[:, None]
        return x[..., idx]

    def c_lines(self) -> list[str]:
        """The frame sizes, SM_FRAMES and the shared frames a stream reuses."""
        c = self.cfg
        lo, hi = self.shared
        return [c_define("SM_FRAME_LENGTH", c.frame_length),
                c_define("SM_FRAME_STEP", c.frame_step),
                c_define("SM_FFT_LENGTH", c.fft_length),
                c_define("SM_FRAME_SPAN", c.span, "samples a frame covers"),
                c_define("SM_FRAME_OFFSET", c.offset, "where the window sits in the frame"),
                c_define("SM_FRAMES", self.frames),
                c_define("SM_SHARED_FIRST", lo, "frames lo..hi lie inside the window"),
                c_define("SM_SHARED_LAST", hi),
                c_define("SM_SHARE_STEP", self.share_step,
                         "frames per hop a stream reuses (0: recompute all)")]


class WindowStage(Stage):
    """Each frame times the Hann or Hamming window, placed in a zero-filled FFT buffer."""
    name, config, part = "window", WindowConfig, "frames"

    def __init__(self, card: ModelCard) -> None:
        super().__init__(card)
        f = self.fe.framing
        self.window = window_coefficients(f.frame_length, kind=self.cfg.window,
                                          symmetric=self.cfg.window_symmetric)
        self.fft_length, self.offset = f.fft_length, f.offset

    @staticmethod
    def width(cfg: Any, fe: FrontendConfig, width: int) -> int:
        """fft_length values per frame (the FFT buffer)."""
        return fe.framing.fft_length

    def run(self, x: np.ndarray) -> np.ndarray:
        """Windowed frames placed in zero-filled FFT buffers ``(..., fft_length)``."""
        out = np.zeros((*x.shape[:-1], self.fft_length), np.float32)
        np.multiply(x, self.window, out=out[..., self.offset: self.offset + x.shape[-1]])
        return out

    def reference(self, x: np.ndarray) -> np.ndarray:
        """Frames of `span` samples times the float64 window at `offset` (zeros elsewhere)."""
        f = self.fe.framing
        w = np.zeros(f.span)
        w[f.offset: f.offset + f.frame_length] = window_coefficients(
            f.frame_length, kind=self.cfg.window, symmetric=self.cfg.window_symmetric,
            dtype=np.float64)
        return x * w

    def c_lines(self) -> list[str]:
        """The window table ``sm_window`` (frame_length float32 coefficients)."""
        return [c_floats("sm_window", self.window)]

    def c_tables(self) -> dict[str, int]:
        """``sm_window``: 4 bytes per coefficient."""
        return {"sm_window": 4 * self.window.size}

    def ops(self, new_frames: int) -> dict[str, int]:
        """frame_length multiplies per new frame."""
        return {"window multiply": new_frames * self.window.size}


class SpectrumStage(Stage):
    """``|rfft|`` or ``|rfft|^2`` of each FFT buffer: fft_length // 2 + 1 bins."""
    name, config, part = "spectrum", SpectrumConfig, "frames"
    band_name = "bins"

    @staticmethod
    def width(cfg: Any, fe: FrontendConfig, width: int) -> int:
        """fft_length // 2 + 1 bins per frame."""
        return fe.framing.fft_length // 2 + 1

    def run(self, x: np.ndarray) -> np.ndarray:
        """``re^2 + im^2`` (power 2, no square root) or ``|X|`` of scipy.fft.rfft, float32."""
        spec = scipy.fft.rfft(x, axis=-1, workers=1, overwrite_x=True)
        if self.cfg.power == 2.0:  # |X|^2 without the square root
            mag = np.square(spec.real)
            mag += np.square(spec.imag)
            return mag
        return np.abs(spec).astype(np.float32)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """``|numpy.fft.rfft(x, n=fft_length)| ** power`` in float64."""
        return np.abs(np.fft.rfft(x, n=self.fe.framing.fft_length, axis=-1)) ** self.cfg.power

    def c_lines(self) -> list[str]:
        """SM_POWER and SM_BINS."""
        return [c_define("SM_POWER", int(self.cfg.power), "1: |X|, 2: |X|^2"),
                c_define("SM_BINS", self.fe.framing.fft_length // 2 + 1)]

    def c_buffers(self) -> dict[str, int]:
        """FFT twiddles (fft_length / 2 floats each), bit reversal (uint16) and work arrays."""
        n = self.fe.framing.fft_length
        return {"sm_cos": 4 * (n // 2), "sm_sin": 4 * (n // 2), "sm_bitrev": 2 * n,
                "sm_re": 4 * n, "sm_im": 4 * n}

    def ops(self, new_frames: int) -> dict[str, int]:
        """Radix-2 butterflies, (n / 2) log2 n, and n // 2 + 1 power values per new frame."""
        n = self.fe.framing.fft_length
        return {"FFT butterflies (radix-2)": new_frames * (n // 2) * int(math.log2(n)),
                "power spectrum": new_frames * (n // 2 + 1)}


class MelStage(Stage):
    """The triangular mel filterbank (`monitor.dsp.mel_filterbank`) applied to each frame."""
    name, config, part = "mel", MelConfig, "features"
    band_name = "bands"

    def __init__(self, card: ModelCard) -> None:
        super().__init__(card)
        kw = self._bank_args()
        self.weights = mel_filterbank(**kw)
        self.mel_t = np.ascontiguousarray(self.weights.T)
        self.first, self.length, self.packed = sparse_bank(self.weights)

    def _bank_args(self) -> dict[str, Any]:
        c = self.cfg
        return dict(sample_rate=self.card.audio.sample_rate,
                    fft_length=self.fe.framing.fft_length, mel_bands=c.mel_bands, fmin=c.fmin,
                    fmax=c.fmax, scale=c.mel_scale, norm=c.mel_norm, triangles=c.mel_triangles)

    @staticmethod
    def width(cfg: Any, fe: FrontendConfig, width: int) -> int:
        """mel_bands values per frame."""
        return cfg.mel_bands

    def run(self, x: np.ndarray) -> np.ndarray:
        """Spectra ``(..., bins)`` times the float32 filterbank: ``(..., mel_bands)``."""
        # np.matmul on a stack runs one GEMM per window, so a window's numbers never depend
        # on how many windows were computed with it (BLAS kernels differ by matrix size)
        return np.matmul(x, self.mel_t)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same product with the filterbank built in float64."""
        return x @ mel_filterbank(**self._bank_args(), dtype=np.float64).T

    def c_lines(self) -> list[str]:
        """SM_MEL_BANDS and the filterbank in sparse form (see `sparse_bank`)."""
        return [c_define("SM_MEL_BANDS", self.cfg.mel_bands),
                c_define("SM_MEL_COEFFS", self.packed.size, "weights in the sparse table"),
                c_ints("sm_mel_first_bin", "int16_t", self.first),
                c_ints("sm_mel_length", "int16_t", self.length),
                c_floats("sm_mel_weights", self.packed)]

    def c_tables(self) -> dict[str, int]:
        """The sparse filterbank: 2 bytes per band for first bin and length, 4 per weight."""
        return {"sm_mel_first_bin": 2 * len(self.first), "sm_mel_length": 2 * len(self.length),
                "sm_mel_weights": 4 * self.packed.size}

    def c_buffers(self) -> dict[str, int]:
        """``sm_power``: one frame's spectrum, fft_length // 2 + 1 floats."""
        return {"sm_power": 4 * (self.fe.framing.fft_length // 2 + 1)}

    def ops(self, new_frames: int) -> dict[str, int]:
        """One multiply-add per stored (non-zero) weight per new frame."""
        return {"mel weights": new_frames * int(self.packed.size)}


class LogStage(Stage):
    """The log of each value (offset, floor, ln, log10 or dB), then dB reference and top_db."""
    name, config, part = "log", LogConfig, "features"

    def __init__(self, card: ModelCard) -> None:
        super().__init__(card)
        self.factor = self.cfg.factor(self.fe)
        self.per_window = self.cfg.db_ref == "max" or self.cfg.top_db > 0

    def run(self, x: np.ndarray) -> np.ndarray:
        """float32 log of max(x + log_offset, log_floor); db_ref and top_db over each window."""
        c = self.cfg
        y = np.add(x, np.float32(c.log_offset))
        if c.log_floor > 0:
            np.maximum(y, np.float32(c.log_floor), out=y)
        if c.log == "ln":
            np.log(y, out=y)
        else:
            np.log10(y, out=y)
            if c.log == "db":
                y *= np.float32(self.factor)
        if self.per_window:
            axes = (-2, -1)
            if c.db_ref == "max":
                y -= y.max(axis=axes, keepdims=True)
            if c.top_db > 0:
                np.maximum(y, y.max(axis=axes, keepdims=True) - np.float32(c.top_db), out=y)
        return y

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same in float64, the window's maximum taken over its last two axes."""
        c = self.cfg
        y = np.maximum(x + c.log_offset, c.log_floor)
        y = np.log(y) if c.log == "ln" else self.factor * np.log10(y)
        if c.db_ref == "max":
            y = y - y.max(axis=(-2, -1), keepdims=True)
        if c.top_db > 0:
            y = np.maximum(y, y.max(axis=(-2, -1), keepdims=True) - c.top_db)
        return y

    def c_lines(self) -> list[str]:
        """The log kind, offset, floor, dB factor, reference and top_db, SM_FRAME_FEATURES."""
        c = self.cfg
        width = self._width()
        return [c_define("SM_LOG_KIND", {"ln": 0, "log10": 1, "db": 2}[c.log],
                         "0 ln, 1 log10, 2 dB"),
                c_define("SM_LOG_OFFSET", float(c.log_offset)),
                c_define("SM_HAS_LOG_FLOOR", c.log_floor > 0),
                c_define("SM_LOG_FLOOR", float(c.log_floor)),
                c_define("SM_DB_FACTOR", float(self.factor), "10 for power, 20 for magnitude"),
                c_define("SM_DB_REF_MAX", c.db_ref == "max", "1: minus the window's maximum"),
                c_define("SM_HAS_TOP_DB", c.top_db > 0),
                c_define("SM_TOP_DB", float(c.top_db)),
                c_define("SM_FRAME_FEATURES", width, "values per frame kept in sm_frames")]

    def _width(self) -> int:
        return self.fe.mel.mel_bands if self.fe.mel is not None else \
            self.fe.framing.fft_length // 2 + 1

    def c_buffers(self) -> dict[str, int]:
        """``sm_frames``: one window's log values, frames x values per frame floats."""
        return {"sm_frames": 4 * self.fe.frames(self.card.audio) * self._width()}

    def ops(self, new_frames: int) -> dict[str, int]:
        """One log per new value, plus a pass over the whole window for db_ref or top_db."""
        out = {"logs": new_frames * self._width()}
        if self.per_window:
            out["dB reference (whole window)"] = self.fe.frames(self.card.audio) * self._width()
        return out


class DctStage(Stage):
    """DCT-II of each log-mel frame, mfcc rows kept, lifter folded in (`monitor.dsp.dct_matrix`)."""
    name, config, part = "dct", DctConfig, "features"
    band_name = "coefficients"

    def __init__(self, card: ModelCard) -> None:
        super().__init__(card)
        c = self.cfg
        self.matrix = dct_matrix(c.mfcc, self.fe.mel.mel_bands, norm=c.dct_norm, lifter=c.lifter)
        self.matrix_t = np.ascontiguousarray(self.matrix.T)

    @staticmethod
    def width(cfg: Any, fe: FrontendConfig, width: int) -> int:
        """mfcc coefficients per frame."""
        return cfg.mfcc

    def run(self, x: np.ndarray) -> np.ndarray:
        """Frames ``(..., mel_bands)`` times the float32 DCT matrix: ``(..., mfcc)``."""
        return np.matmul(x, self.matrix_t)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """scipy.fft.dct type 2 ("uniform": unnormalised / sqrt(2 M)), then the lifter."""
        c = self.cfg
        if c.dct_norm == "ortho":
            y = scipy.fft.dct(x, type=2, norm="ortho", axis=-1)
        else:  # TensorFlow's mfccs_from_log_mel_spectrograms: dct(type 2) * rsqrt(2 M)
            y = scipy.fft.dct(x, type=2, axis=-1) / np.sqrt(2.0 * x.shape[-1])
        y = y[..., : c.mfcc]
        return y * lifter_weights(c.mfcc, c.lifter) if c.lifter > 0 else y

    def c_lines(self) -> list[str]:
        """SM_MFCC and the DCT matrix ``sm_dct`` (mfcc x mel_bands, lifter folded in)."""
        return [c_define("SM_MFCC", self.cfg.mfcc, "DCT-II rows kept (lifter folded in)"),
                c_floats("sm_dct", self.matrix)]

    def c_tables(self) -> dict[str, int]:
        """``sm_dct``: 4 bytes per matrix entry."""
        return {"sm_dct": 4 * self.matrix.size}

    def c_buffers(self) -> dict[str, int]:
        """``sm_row``: one frame's mel_bands floats."""
        return {"sm_row": 4 * self.fe.mel.mel_bands}

    def ops(self, new_frames: int) -> dict[str, int]:
        """mfcc x mel_bands multiply-adds per frame: of the new frames only when the log is
        per frame (the C stream keeps each frame's coefficients), else of the whole window
        (the DCT follows db_ref "max" or top_db, which depend on the whole window)."""
        log = self.fe.log
        if log.db_ref == "max" or log.top_db > 0:
            return {"DCT multiply-adds (whole window)": self.fe.frames(self.card.audio)
                    * self.matrix.size}
        return {"DCT multiply-adds": new_frames * self.matrix.size}


class LayoutStage(Stage):
    """The model input's axis order: ``(frames, bands)`` as computed, or swapped."""
    name, config, part = "layout", LayoutConfig, "output"

    @property
    def active(self) -> bool:
        """On for layout = "mel_time" (time_mel is the computed order)."""
        return self.cfg.layout == "mel_time"

    def run(self, x: np.ndarray) -> np.ndarray:
        """The last two axes swapped: ``(..., frames, bands)`` to ``(..., bands, frames)``."""
        return np.swapaxes(x, -1, -2)

    reference = run

    def c_lines(self) -> list[str]:
        """SM_LAYOUT_MEL_TIME and SM_CHANNELS, the values per frame in the output."""
        return [c_define("SM_LAYOUT_MEL_TIME", self.cfg.layout == "mel_time",
                         "0: out[frame][band], 1: out[band][frame]"),
                c_define("SM_CHANNELS", self.fe.bands(), "values per frame in the output")]


class ScalingStage(Stage):
    """The ``[scaling]`` table: optional per-window standardisation, then (x - mean) / std."""
    name, config, part = "scaling", ScalingConfig, "output"

    def __init__(self, card: ModelCard) -> None:
        self.card, self.fe, self.cfg = card, card.frontend, card.scaling
        self.mean = self.cfg.mean.astype(np.float32)
        self.inv_std = (1.0 / self.cfg.std).astype(np.float32)

    def run(self, x: np.ndarray) -> np.ndarray:
        """float32: each window standardised if asked, then (x - mean) times 1 / std."""
        if self.cfg.per_window == "standardise":
            axes = tuple(range(1, x.ndim))
            x = (x - x.mean(axis=axes, keepdims=True)) / (
                x.std(axis=axes, keepdims=True) + np.float32(PER_WINDOW_EPS))
        out = (x - self.mean) * self.inv_std
        return np.ascontiguousarray(out, dtype=np.float32)

    def reference(self, x: np.ndarray) -> np.ndarray:
        """The same in float64, dividing by std."""
        if self.cfg.per_window == "standardise":
            axes = tuple(range(1, x.ndim))
            x = (x - x.mean(axis=axes, keepdims=True)) / (x.std(axis=axes, keepdims=True)
                                                          + PER_WINDOW_EPS)
        return (x - self.cfg.mean.astype(np.float64)) / self.cfg.std.astype(np.float64)

    def tables(self) -> tuple[int, np.ndarray, np.ndarray]:
        """(mode, mean, 1 / std) as the C code stores them: mode 0 one value, 1 one per band,
        2 the full feature shape in the model's input order."""
        mean = np.asarray(self.cfg.mean, np.float32)
        std = np.asarray(self.cfg.std, np.float32)
        shape = self.card.feature_shape
        bands = self.fe.bands()
        if mean.size == 1 and std.size == 1:
            return 0, mean.reshape(1), (1.0 / std).reshape(1)
        if (mean.size == bands and std.size == bands and mean.size != np.prod(shape)
                and len(shape) == 2):
            return 1, mean.reshape(-1), (1.0 / std).reshape(-1)
        full_m = np.broadcast_to(mean, shape).reshape(-1)
        full_s = np.broadcast_to(std, shape).reshape(-1)
        return 2, full_m, (1.0 / full_s)

    def c_lines(self) -> list[str]:
        """SM_PER_WINDOW, its epsilon, SM_SCALE_MODE and the mean and 1 / std tables."""
        mode, mean, inv_std = self.tables()
        return [c_define("SM_PER_WINDOW", self.cfg.per_window == "standardise",
                         "1: standardise each window first"),
                c_define("SM_PER_WINDOW_EPS", PER_WINDOW_EPS),
                c_define("SM_SCALE_MODE", mode, "0 one value, 1 per band, 2 full shape"),
                c_floats("sm_scale_mean", mean), c_floats("sm_scale_inv_std", inv_std)]

    def c_tables(self) -> dict[str, int]:
        """``sm_scale_mean`` and ``sm_scale_inv_std``: 4 bytes per value."""
        _, mean, inv_std = self.tables()
        return {"sm_scale_mean": 4 * mean.size, "sm_scale_inv_std": 4 * inv_std.size}

    def ops(self, new_frames: int) -> dict[str, int]:
        """One scaling per value of the window per hop, 3 more per value to standardise it."""
        n = int(np.prod(self.card.feature_shape))
        out = {"scaling (whole window)": n}
        if self.cfg.per_window == "standardise":
            out["per-window standardisation"] = 3 * n
        return out


STAGES: dict[str, type[Stage]] = {s.name: s for s in (
    PcmStage, PreemphasisStage, CentreStage, FramingStage, WindowStage, SpectrumStage,
    MelStage, LogStage, DctStage, LayoutStage, ScalingStage)}

_FRAMES = ("pcm", "preemphasis", "centre", "framing", "window", "spectrum")
KINDS: dict[str, tuple[str, ...]] = {
    "waveform": ("pcm", "preemphasis", "scaling"),
    "spectrogram": (*_FRAMES, "log", "layout", "scaling"),
    "logmel": (*_FRAMES, "mel", "log", "layout", "scaling"),
    "mfcc": (*_FRAMES, "mel", "log", "dct", "layout", "scaling"),
}


def build_stages(card: ModelCard) -> list[Stage]:
    """The stages of the card's kind, built (active or not), in order."""
    return [STAGES[name](card) for name in KINDS[card.frontend.kind]]


__all__ = ["Key", "CardProblem", "FrontendConfig", "ScalingConfig", "Stage", "STAGES", "KINDS",
           "build_stages", "frontend_from_table", "keys_of", "nearest", "sparse_bank", "cfloat"]
