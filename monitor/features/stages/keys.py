"""Card keys: how a config class declares its keys, and the ``[audio]`` table.

`key` declares a dataclass field as a card key (`Key`: type, allowed values, default, off
value, meaning); `keys_of` lists a config's keys; `CardProblem` is a broken rule (the
message names the key, not the file). `AudioConfig` is the ``[audio]`` table every stage is
built with. The bounds here are checked before anything is allocated (a card is untrusted).
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import field
from typing import Any

from monitor.base.records import record

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


@record
class Key:
    """One card key: its type, allowed values, default and meaning.

    ``default`` is REQUIRED for a key that changes the numbers and has no off state (the card
    must give it); ``off`` is the value that changes nothing, so a key of a stage the kind
    does not run may carry it (and no other: a key without one is refused there); for a key
    that is no switch it is the value a card written out at the defaults carries
    (``dct_norm = "ortho"`` beside ``mfcc = 0``); ``needs`` names a switch of the same stage
    without which the key does nothing (``pad_mode`` needs ``center``).

    Attributes
    ----------
    type : type
        int, float, str or bool.
    doc : str
        What the key means, for messages and the README.
    choices : tuple
        The allowed values (empty: any in range).
    lo, hi : float or None
        Bounds of a number.
    above : bool
        `lo` itself is not allowed.
    default : object
        The value when the card leaves the key out, or REQUIRED.
    off : object
        The value that changes nothing, or NO_OFF.
    needs : str or None
        The switch of the same stage without which the key does nothing.
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
    """A card value as a message shows it: TOML's true/false, a quoted string, else repr.

    Parameters
    ----------
    value : object
        A card value.

    Returns
    -------
    str
        Its spelling in a message.
    """
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return f'"{value}"'
    return repr(value)


def key(type_: type, doc: str, **kw: Any) -> Any:
    """A dataclass field that is a card key (see `Key`).

    Parameters
    ----------
    type_ : type
        int, float, str or bool.
    doc : str
        What the key means.
    **kw
        The rest of `Key`'s fields.

    Returns
    -------
    dataclasses.Field
        A field whose metadata holds the `Key`.
    """
    k = Key(type_, doc, **kw)
    if k.default is REQUIRED:
        return field(metadata={"key": k})
    return field(default=k.default, metadata={"key": k})


def keys_of(config: type) -> dict[str, Key]:
    """The card keys of a config class, in declaration order.

    Parameters
    ----------
    config : type
        A stage's config class (or `AudioConfig`).

    Returns
    -------
    dict
        Key name to `Key`.
    """
    return {f.name: f.metadata["key"] for f in dataclasses.fields(config) if "key" in f.metadata}


def nearest(name: str, known) -> str:
    """", did you mean X?" for the nearest known name, or "".

    Parameters
    ----------
    name : str
        An unknown name.
    known : iterable of str
        The names allowed.

    Returns
    -------
    str
        The hint, or "" when none is close (difflib).
    """
    import difflib  # only when a key is unknown

    close = difflib.get_close_matches(name, list(known), n=1, cutoff=0.6)
    return f"; did you mean {close[0]}?" if close else ""


@record
class AudioConfig:
    """The ``[audio]`` table: the rate the model was trained on, its window and hop.

    Attributes
    ----------
    sample_rate : int
        Hz, what the model was trained on.
    window_s : float
        seconds of audio per decision (a whole number of samples).
    hop_s : float
        seconds between decisions (a whole number of samples).
    """

    sample_rate: int = key(int, "Hz, what the model was trained on", lo=1000, hi=768000)
    window_s: float = key(float, "seconds of audio per decision (a whole number of samples)",
                          lo=0.0, above=True)
    hop_s: float = key(float, "seconds between decisions (a whole number of samples)",
                       lo=0.0, above=True)

    @property
    def window_samples(self) -> int:
        """Window length in samples (window_s x sample_rate, rounded)."""
        return int(round(self.window_s * self.sample_rate))

    @property
    def hop_samples(self) -> int:
        """Hop length in samples (hop_s x sample_rate, rounded)."""
        return int(round(self.hop_s * self.sample_rate))


def audio_from_table(table: dict[str, Any]) -> AudioConfig:
    """Validate an ``[audio]`` table; CardProblem names the key and the rule.

    Parameters
    ----------
    table : dict
        The ``[audio]`` table as parsed.

    Returns
    -------
    AudioConfig
        The validated table.

    Raises
    ------
    CardProblem
        A key missing or out of bounds, or a window or hop that is not a whole number of
        samples.
    """
    values = {}
    for name, k in keys_of(AudioConfig).items():
        if name not in table:
            raise CardProblem(f"audio.{name} is missing: it changes the numbers and has no "
                              f"default; give {k.allowed()} ({k.doc})")
        values[name] = k.check(f"audio.{name}", table[name])
    sr = values["sample_rate"]
    for name in ("window_s", "hop_s"):
        n = values[name] * sr
        if abs(n - round(n)) > 1e-6:
            raise CardProblem(f"audio.{name}={values[name]} is not a whole number of samples "
                              f"at {sr} Hz ({n:.4f} samples)")
        if not 1 <= round(n) <= MAX_SAMPLES:
            raise CardProblem(f"audio.{name}={values[name]} is {round(n)} samples at {sr} Hz; "
                              f"it must be from 1 to {MAX_SAMPLES} samples")
    return AudioConfig(**values)
