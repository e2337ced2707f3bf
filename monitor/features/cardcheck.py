"""`scenemon card check`: do the card's features equal the ones the training code made?

The user's pain is "my numbers differ from training". Given the card, a recording and the
features the user's own training code computed for one window of it (a ``.npy`` in the
model's input order: unscaled, or with ``--scaled`` after the card's scaling; a channel axis
of 1 and a batch axis of 1 are allowed), this computes the same window through the card's
front end and reports:

- the two shapes (a different shape is a finding: which axis, by how many);
- the largest absolute difference, against a tolerance of 1e-3 of the file's range (common
  practice for float32 parity);
- where the difference sits: which frames and which bands exceed the tolerance;
- when it does not match: the card changed in one key at a time, then in pairs of keys (the
  keys of `SEARCH`, each over its other allowed values or the usual ones), and the card
  lines of the change that makes it match, ready to paste;
- a recording at another rate is resampled to the card's (soxr HQ, as replay does) and the
  report says from which rate; when nothing matches, it names that resampling as a likely
  cause (training code may have resampled differently).

A features file that is no ``.npy`` of numbers is refused in our own words: numpy's
exception text would suggest loading it with pickle.

Exit codes: 0 the features match, 1 they do not (with or without a fix found), 2 bad input.
"""

from __future__ import annotations

import copy
import io
import itertools
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from monitor.base.errors import CardError, ExitCode, ScenemonError
from monitor.features.card import ModelCard, card_from_dict, read_card_table
from monitor.features.stages import show_value

TOLERANCE_OF_RANGE = 1e-3

# The keys tried, in this order; each value is a list of [frontend] changes (one candidate
# each), or None for "the other allowed values" (see `candidates`).
OFFSETS = [(1e-6, 0.0), (1e-10, 0.0), (1e-8, 0.0), (1e-5, 0.0), (1e-3, 0.0), (1.0, 0.0),
           (0.0, 1e-10), (0.0, 1e-8), (0.0, 1e-6), (0.0, 1e-5)]
SEARCH = ("center", "pad_mode", "window_in_frame", "mel_scale", "mel_norm", "mel_triangles",
          "power", "log", "log_offset/log_floor", "db_ref", "top_db", "window",
          "window_symmetric", "pcm_bits", "layout", "dct_norm")
TOP_DB = (0.0, 80.0, 60.0, 40.0, 100.0, 120.0)


@dataclass
class Comparison:
    """Ours against theirs for one card.

    Attributes
    ----------
    shape : tuple of int
        The card's feature shape.
    max_diff : float or None
        Largest absolute difference from theirs; None when the shapes differ.
    changes : dict
        The card keys changed from the card as given (empty for the card itself).
    """

    shape: tuple[int, ...]
    max_diff: float | None  # None when the shapes differ
    changes: dict[str, Any] = field(default_factory=dict)


@dataclass
class CheckResult:
    """The outcome of a card check: both feature arrays, the tolerance, the search.

    Attributes
    ----------
    card : ModelCard
        The card as given.
    theirs, ours : numpy.ndarray
        The training code's features and the card's, in the model's input order.
    dtype : str
        The dtype of the features file.
    tolerance : float
        The largest difference that still matches.
    base : Comparison
        The card as given against theirs.
    tried : int
        Cards the search tried.
    fixes : list of Comparison
        The changed cards that match, best first.
    closest : Comparison or None
        The nearest one when none matches.
    """

    card: ModelCard
    theirs: np.ndarray
    ours: np.ndarray
    dtype: str = "float64"
    tolerance: float = 0.0
    base: Comparison = field(default_factory=lambda: Comparison((), None))
    tried: int = 0
    fixes: list[Comparison] = field(default_factory=list)  # matches, best first
    closest: Comparison | None = None

    @property
    def matched(self) -> bool:
        return self.base.max_diff is not None and self.base.max_diff <= self.tolerance


def candidates(settings: dict[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    """(search key, [frontend] changes) for every alternative to the card's current values.

    Parameters
    ----------
    settings : dict
        The card's flat ``[frontend]`` settings.

    Returns
    -------
    list of (str, dict)
        The key searched and the ``[frontend]`` changes of each alternative.
    """
    from monitor.features.stages import STAGES, keys_of

    specs = {}
    for st in STAGES.values():
        if st.config is not None:
            specs.update(keys_of(st.config))
    out: list[tuple[str, dict[str, Any]]] = []
    for name in SEARCH:
        if name == "log_offset/log_floor":
            if "log_offset" in settings:
                now = (settings["log_offset"], settings.get("log_floor", 0.0))
                out += [(name, {"log_offset": o, "log_floor": f}) for o, f in OFFSETS
                        if (o, f) != now]
            continue
        if name not in settings:
            continue
        now = settings[name]
        if name == "center":
            out += ([(name, {"center": True, "pad_mode": m}) for m in ("constant", "reflect")]
                    if not now else [(name, {"center": False, "pad_mode": "constant"})])
        elif name == "pad_mode":
            if settings.get("center"):
                out += [(name, {"pad_mode": m}) for m in ("constant", "reflect") if m != now]
        elif name == "top_db":
            out += [(name, {"top_db": v}) for v in TOP_DB if v != now]
        elif specs[name].type is bool:
            out.append((name, {name: not now}))
        else:
            out += [(name, {name: v}) for v in specs[name].choices if v != now]
    return out


def _model_order(theirs: np.ndarray, ndim: int) -> np.ndarray:
    """Drop a batch axis of 1 in front and a channel axis of 1 behind."""
    x = theirs
    while x.ndim > ndim and x.shape[-1] == 1:
        x = x[..., 0]
    while x.ndim > ndim and x.shape[0] == 1:
        x = x[0]
    return x


def features_of(card: ModelCard, window: np.ndarray, *, scaled: bool) -> np.ndarray:
    """One window through the card's front end, in the model's input order.

    Parameters
    ----------
    card : ModelCard
        The card.
    window : numpy.ndarray
        ``(window_samples,)`` float32 at the card's rate.
    scaled : bool
        After the card's [scaling] (else before it).

    Returns
    -------
    numpy.ndarray
        The window's features, float32.
    """
    from monitor.features.frontend import FrontEnd

    fe = FrontEnd(card)
    w = window[None, :]
    return (fe.batch(w) if scaled else fe.unscaled(w, model_order=True))[0]


def compare(card: ModelCard, window: np.ndarray, theirs: np.ndarray, *,
            scaled: bool) -> tuple[np.ndarray, Comparison]:
    """The card's features of one window against theirs.

    Parameters
    ----------
    card : ModelCard
        The card to try.
    window : numpy.ndarray
        ``(window_samples,)`` float32 at the card's rate.
    theirs : numpy.ndarray
        The training code's features of that window.
    scaled : bool
        Compare after the card's [scaling] (else before it).

    Returns
    -------
    ours : numpy.ndarray
        The card's features, in the model's input order.
    comparison : Comparison
        Their shapes and the largest absolute difference (None when the shapes differ).
    """
    ours = features_of(card, window, scaled=scaled)
    t = _model_order(theirs, ours.ndim)
    if t.shape != ours.shape:
        return ours, Comparison(ours.shape, None)
    return ours, Comparison(ours.shape, float(np.max(np.abs(ours.astype(np.float64) - t))))


def check(raw: dict[str, Any], path: Path | None, window: np.ndarray, theirs: np.ndarray, *,
          scaled: bool) -> CheckResult:
    """Compare, and search the keys of `SEARCH` when it does not match (module docstring).

    Parameters
    ----------
    raw : dict
        The card's parsed TOML.
    path : Path or None
        The card's file.
    window : numpy.ndarray
        ``(window_samples,)`` float32 at the card's rate.
    theirs : numpy.ndarray
        The training code's features of that window.
    scaled : bool
        Compare after the card's [scaling] (else before it).

    Returns
    -------
    CheckResult
        The comparison and, when it does not match, the search's outcome.
    """
    card = card_from_dict(raw, path)
    ours, base = compare(card, window, theirs, scaled=scaled)
    t = _model_order(theirs, ours.ndim)
    span = float(np.ptp(t)) if t.size else 0.0
    tol = TOLERANCE_OF_RANGE * (span if span > 0 else max(1.0, float(np.max(np.abs(t)))))
    res = CheckResult(card, t.astype(np.float64), ours, str(theirs.dtype), tol, base)
    if res.matched:
        return res
    if not scaled:
        raw = {k: v for k, v in raw.items() if k != "scaling"}  # shapes may change
    singles = candidates(card.frontend.settings())
    results = []
    done: set[tuple] = set()

    def attempt(changes: dict[str, Any]) -> None:
        sig = tuple(sorted(changes.items()))
        if sig in done:
            return
        done.add(sig)
        trial = copy.deepcopy(raw)
        trial["frontend"] = {**trial["frontend"], **changes}
        try:
            c = card_from_dict(trial, path)
        except CardError:
            return  # a combination the card rules refuse
        _, cmp_ = compare(c, window, theirs, scaled=scaled)
        cmp_.changes = changes
        res.tried += 1
        results.append(cmp_)

    for _, changes in singles:
        attempt(changes)
    if not any(r.max_diff is not None and r.max_diff <= tol for r in results):
        for (ka, a), (kb, b) in itertools.combinations(singles, 2):
            if ka != kb and not set(a) & set(b):
                attempt({**a, **b})
    fitting = sorted((r for r in results if r.max_diff is not None),
                     key=lambda r: (r.max_diff, len(r.changes)))
    res.fixes = [r for r in fitting if r.max_diff <= tol]
    res.closest = fitting[0] if fitting else None
    return res


def _ranges(idx: np.ndarray) -> str:
    """[0 1 2 7 9 10] -> "0-2, 7, 9-10"."""
    parts, idx = [], [int(i) for i in idx]
    for _, grp in itertools.groupby(enumerate(idx), lambda p: p[1] - p[0]):
        g = [v for _, v in grp]
        parts.append(str(g[0]) if len(g) == 1 else f"{g[0]}-{g[-1]}")
    if len(parts) > 8:
        parts = parts[:8] + ["..."]
    return ", ".join(parts)


def _axes(card: ModelCard) -> tuple[str, str]:
    what = card.frontend.band_name()
    return ("frames", what) if card.layout != "mel_time" else (what, "frames")


def where(res: CheckResult) -> str:
    """Which frames and which bands the difference above the tolerance sits in.

    Parameters
    ----------
    res : CheckResult
        A check whose shapes agree.

    Returns
    -------
    str
        The frames and bands (as ranges) where the difference exceeds the tolerance.
    """
    d = np.abs(res.ours.astype(np.float64) - res.theirs)
    big = d > res.tolerance
    k = np.unravel_index(int(np.argmax(d)), d.shape)
    at = ", ".join(f"{n.rstrip('s')} {int(i)}" for n, i in zip(
        _axes(res.card) if d.ndim == 2 else ("sample",), k))
    largest = (f"largest at {at} (yours {float(res.theirs[k]):.6g}, the card's "
               f"{float(res.ours[k]):.6g})")
    if d.ndim == 1:
        rows = np.flatnonzero(big)
        return f"{rows.size} of {d.size} samples ({_ranges(rows)}); {largest}"
    parts = []
    for axis, name in enumerate(_axes(res.card)):
        hit = np.flatnonzero(big.any(axis=1 - axis))
        parts.append(f"{hit.size} of {d.shape[axis]} {name} ({_ranges(hit)})")
    hint = ""
    frames_axis = 0 if res.card.layout != "mel_time" else 1
    fr = np.flatnonzero(big.any(axis=1 - frames_axis))
    n = d.shape[frames_axis]
    if fr.size and fr.size < n and set(fr) <= set(range(3)) | set(range(n - 3, n)):
        hint = " (only the first and last frames: centre padding or pad_mode?)"
    return " and ".join(parts) + f"; {largest}{hint}"


def card_lines(changes: dict[str, Any]) -> list[str]:
    """The card lines that make a change, as a user writes them into ``[frontend]``.

    Parameters
    ----------
    changes : dict
        Key to new value.

    Returns
    -------
    list of str
        ``key = value`` lines in TOML's spelling.
    """
    return [f"{k} = {show_value(v)}" for k, v in changes.items()]


def report(res: CheckResult, *, card_path: Path, audio: Path, features: Path, start_s: float,
           scaled: bool, native_rate: int | None = None, channels: int = 1) -> str:
    """The check's report: the shapes, the difference and where it sits, the search's outcome.

    Parameters
    ----------
    native_rate : int, optional
        The recording's own rate in Hz; when it is not the card's, the report says the window
        was resampled (soxr HQ, as replay does) and, when nothing matches, that a different
        resampling in the training code is a likely cause.
    channels : int
        The recording's channels (more than one: down-mixed to their mean).

    Returns
    -------
    str
        The report's lines.
    """
    c = res.card
    resampled = native_rate is not None and native_rate != c.sample_rate
    how = f", resampled from {native_rate} Hz with soxr HQ as replay does" if resampled else ""
    if channels > 1:
        how += f", down-mixed from {channels} channels (their mean)"
    lines = [f"card         {card_path} ({c.kind}, {c.describe_shape()})",
             f"audio        {audio}, the window at {start_s:.3f} s ({c.window_samples} samples "
             f"at {c.sample_rate} Hz{how})",
             f"features     {features}: {tuple(res.theirs.shape)} {res.dtype}, "
             f"{'scaled' if scaled else 'unscaled'}, in the model's input order"]
    if res.base.max_diff is None:
        lines.append(f"shape        yours {tuple(res.theirs.shape)}, the card's "
                     f"{res.base.shape}: {_shape_finding(res)}")
    else:
        lines.append(f"shape        {res.base.shape}, the same")
        verdict = "match" if res.matched else "MISMATCH"
        lines.append(f"max abs diff {res.base.max_diff:.3g} (tolerance {res.tolerance:.3g}, "
                     f"1e-3 of the range of {features.name}): {verdict}")
        if not res.matched:
            lines.append(f"where        {where(res)}")
    if res.matched:
        return "\n".join(lines) + "\n"
    lines.append(f"search       {res.tried} cards, each with one or two of these [frontend] "
                 f"keys changed: {', '.join(SEARCH)}")
    if res.fixes:
        best = res.fixes[0]
        lines += ["", f"These [frontend] lines make it match (max abs diff "
                      f"{best.max_diff:.3g}); put them in {card_path.name}:", ""]
        lines += ["    " + line for line in card_lines(best.changes)]
        others = [f for f in res.fixes[1:4] if len(f.changes) <= len(best.changes)]
        for f in others:
            lines += ["", f"(also matching: {'; '.join(card_lines(f.changes))}, max abs diff "
                          f"{f.max_diff:.3g})"]
    else:
        lines += ["", "No change of one or two of those keys makes it match."]
        if res.closest is not None and res.closest.changes:
            lines.append(f"The closest: {'; '.join(card_lines(res.closest.changes))} "
                         f"(max abs diff {res.closest.max_diff:.3g}). Check the other keys "
                         f"(fmin, fmax, mel_bands, frame_length, frame_step, fft_length, "
                         f"the scaling) "
                         f"against the training code.")
        if resampled:
            lines += ["", f"A likely cause: the recording is at {native_rate} Hz and was "
                          f"resampled to {c.sample_rate} Hz here with soxr HQ; training code "
                          f"that resampled differently (another library, quality or filter) "
                          f"makes other features. Check with a file at {c.sample_rate} Hz "
                          f"resampled the way training did."]
    return "\n".join(lines) + "\n"


def _shape_finding(res: CheckResult) -> str:
    a, b = tuple(res.theirs.shape), res.base.shape
    if len(a) != len(b):
        return f"{len(a)} axes against {len(b)}"
    if a == b[::-1]:
        return "the axes are the other way round (layout?)"
    diffs = []
    for axis, (x, y) in enumerate(zip(a, b)):
        if x != y:
            name = _axes(res.card)[axis] if len(b) == 2 else "samples"
            diffs.append(f"{x} {name} against {y}")
    return "; ".join(diffs) + " (frames: center, window_in_frame, frame_length, frame_step; " \
                              "bands: mel_bands, mfcc)"


def read_features(path: Path) -> np.ndarray:
    """A numeric, finite .npy array (read without pickle); ScenemonError otherwise.

    Parameters
    ----------
    path : Path
        The ``.npy`` file.

    Returns
    -------
    numpy.ndarray
        The array, numeric and finite.

    Raises
    ------
    ScenemonError
        Missing, unreadable, not a ``.npy`` of numbers, an ``.npz``, Python objects, a header
        declaring more data than the file holds, empty, or not finite.
    """
    from monitor.base.files import read_regular_bytes

    try:
        data = read_regular_bytes(path)
    except FileNotFoundError:
        raise ScenemonError(f"{path}: features file not found") from None
    except OSError as exc:
        raise ScenemonError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    if data[:4] == b"PK\x03\x04":
        raise ScenemonError(f"{path}: is an .npz archive; give the one window's features as a "
                            f".npy (numpy.save)")
    if data[:6] != b"\x93NUMPY":  # the .npy magic (numpy's format.MAGIC_PREFIX)
        raise ScenemonError(f"{path}: not a .npy array of numbers")
    problem = _header_problem(data)
    if problem:
        raise ScenemonError(f"{path}: {problem}")
    try:
        a = np.load(io.BytesIO(data), allow_pickle=False)
    except ValueError:
        # numpy's own text here invites loading with pickle; an object array is not read
        if _holds_objects(data):
            raise ScenemonError(f"{path}: holds Python objects, which are not read; save the "
                                f"features as an array of numbers") from None
        raise ScenemonError(f"{path}: not a .npy array of numbers") from None
    except (OSError, EOFError):
        raise ScenemonError(f"{path}: not a .npy array of numbers") from None
    if not isinstance(a, np.ndarray) or a.dtype.kind not in "fiu" or a.size == 0:
        raise ScenemonError(f"{path}: holds {getattr(a, 'dtype', type(a))} values; it must be "
                            f"a non-empty array of numbers")
    if not np.all(np.isfinite(a)):
        raise ScenemonError(f"{path}: holds NaN or infinite values")
    return a


def _header_problem(data: bytes) -> str | None:
    """What is wrong with a .npy header before any array is allocated: a shape whose bytes
    the file does not hold (a header may declare terabytes), or no header at all.

    Parameters
    ----------
    data : bytes
        The whole file.

    Returns
    -------
    str or None
        The problem, or None when the declared array fits in the file (numpy.lib.format,
        the .npy format's own reader).
    """
    from numpy.lib import format as npy_format

    f = io.BytesIO(data)
    try:
        version = npy_format.read_magic(f)
        if version == (1, 0):
            shape, _, dtype = npy_format.read_array_header_1_0(f)
        else:
            shape, _, dtype = npy_format.read_array_header_2_0(f)
    except (ValueError, OSError, EOFError, SyntaxError, TypeError):
        return None  # np.load says what is wrong, as before
    if dtype.hasobject:
        return None
    count = 1
    for n in shape:
        count *= int(n)
    need = count * dtype.itemsize
    have = len(data) - f.tell()
    if need > have:
        return (f"declares an array of shape {tuple(shape)} ({need:,} bytes) but holds "
                f"{have:,} bytes of data")
    return None


def _holds_objects(data: bytes) -> bool:
    """True when a .npy header declares an object array (dtype "|O"), read without pickle."""
    from numpy.lib import format as npy_format

    try:
        f = io.BytesIO(data)
        version = npy_format.read_magic(f)
        header = (npy_format.read_array_header_1_0 if version == (1, 0)
                  else npy_format.read_array_header_2_0)(f)
    except (ValueError, OSError, EOFError):
        return False
    return bool(header[2].hasobject)


def run_card_check(card_path: Path, audio: Path, features: Path, *, start_s: float = 0.0,
                   scaled: bool = False) -> int:
    """`scenemon card check` (module docstring); returns the exit code.

    Parameters
    ----------
    card_path : Path
        The card.
    audio : Path
        The recording the features were computed from.
    features : Path
        The training code's features of one window (``.npy``).
    start_s : float
        Where the window starts in the recording, in seconds.
    scaled : bool
        The features are after the card's [scaling].

    Returns
    -------
    int
        0 when they match, 1 when not.

    Raises
    ------
    ScenemonError
        A bad card, audio or features file, or a window past the recording's end.
    """
    from monitor.sound.sources import check_audio_files, load_audio

    raw = read_card_table(card_path)
    card = card_from_dict(raw, card_path)
    theirs = read_features(features)
    if not np.isfinite(start_s) or start_s < 0:
        raise ScenemonError(f"--start {start_s} must be a number of seconds >= 0")
    info, _ = check_audio_files([audio], model_rate=card.sample_rate,
                                window_samples=card.window_samples)
    x = load_audio([audio], model_rate=card.sample_rate, window_samples=card.window_samples)
    a = int(round(start_s * card.sample_rate))
    if a + card.window_samples > x.size:
        raise ScenemonError(f"{audio}: holds {x.size / card.sample_rate:.3f} s at "
                            f"{card.sample_rate} Hz; a window of {card.window_s:g} s does not "
                            f"fit at --start {start_s:g}")
    window = np.ascontiguousarray(x[a:a + card.window_samples], np.float32)
    res = check(raw, card_path, window, theirs, scaled=scaled)
    sys.stdout.write(report(res, card_path=card_path, audio=audio, features=features,
                            start_s=start_s, scaled=scaled, native_rate=int(info.samplerate),
                            channels=int(info.channels)))
    return ExitCode.OK if res.matched else ExitCode.FAILURE


__all__ = ["check", "candidates", "run_card_check", "report", "read_features", "SEARCH"]
