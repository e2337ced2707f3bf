"""`scenemon card check`: do the card's features equal the ones the training code made?

The user's pain is "my numbers differ from training". Given the card, a recording and the
features the user's own training code computed for one window of it (a ``.npy`` in the
model's input order: unscaled, or with ``--scaled`` after the card's scaling; a channel axis
of 1 and a batch axis of 1 are allowed), this computes the same window through the card's
front end and reports:

- the two shapes (a different shape is a finding: which axis, by how many);
- the largest absolute difference, against a tolerance of 1e-3 of each band's range in the
  file (common practice for float32 parity; per band, so an MFCC's wide c0 hides nothing);
  a file may hold several consecutive windows (a leading axis), one hop apart from --start,
  and all of them are compared;
- when it matches: the searched keys whose other values match too, which these windows
  cannot tell (a top_db that floors nothing in them);
- where the difference sits: which frames and which bands exceed the tolerance;
- when it does not match: the card changed in one key at a time, then in pairs of keys (the
  keys of `SEARCH`, each over its other allowed values or the usual ones), and the card
  lines of the change that makes it match, ready to paste;
- a recording at another rate is resampled to the card's (soxr HQ, as replay does) and the
  report says from which rate; when nothing matches, it names that resampling as a likely
  cause (training code may have resampled differently).

A full-shape scaler that fits only the card's present (wrong) shape does not block the
search: it is set aside (unscaled features need none) and the report says what shape it
needs.

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
    excess : float or None
        The largest absolute difference over its band's tolerance (at most 1: a match).
    """

    shape: tuple[int, ...]
    max_diff: float | None  # None when the shapes differ
    changes: dict[str, Any] = field(default_factory=dict)
    excess: float | None = None  # the largest |difference| over its band's tolerance


@dataclass
class CheckResult:
    """The outcome of a card check: both feature arrays, the tolerance, the search.

    Attributes
    ----------
    card : ModelCard
        The card as given.
    theirs, ours : numpy.ndarray
        The training code's features and the card's, in the model's input order, one row
        per window ``(windows, *feature_shape)``.
    dtype : str
        The dtype of the features file.
    tolerance : numpy.ndarray or float
        The largest difference that still matches, per band (1e-3 of that band's range).
    base : Comparison
        The card as given against theirs.
    tried : int
        Cards the search tried.
    fixes : list of Comparison
        The changed cards that match, best first.
    closest : Comparison or None
        The nearest one when none matches.
    untold : list of str
        Card keys whose other values match these windows too: the windows do not tell them.
    """

    card: ModelCard
    theirs: np.ndarray
    ours: np.ndarray
    dtype: str = "float64"
    tolerance: Any = 0.0
    base: Comparison = field(default_factory=lambda: Comparison((), None))
    tried: int = 0
    fixes: list[Comparison] = field(default_factory=list)  # matches, best first
    closest: Comparison | None = None
    untold: list[str] = field(default_factory=list)  # keys the windows cannot tell apart

    @property
    def matched(self) -> bool:
        """True when every value of every window is within its band's tolerance."""
        return self.base.excess is not None and self.base.excess <= 1.0


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


def as_windows(theirs: np.ndarray, card: ModelCard) -> np.ndarray:
    """The training code's features as ``(windows, *feature_shape)``.

    A file may hold one window (a batch or channel axis of 1 allowed) or several
    consecutive ones (a leading axis), one hop apart.

    Parameters
    ----------
    theirs : numpy.ndarray
        The features file's array.
    card : ModelCard
        The card.

    Returns
    -------
    numpy.ndarray
        With a leading windows axis (1 for a single window).
    """
    shape = tuple(card.feature_shape)
    nd = len(shape)
    x = np.asarray(theirs)
    if x.shape == shape:
        return x[None]
    if x.ndim == nd + 1 and x.shape[1:] == shape:
        return x  # several windows
    if x.ndim == nd + 2 and x.shape[-1] == 1 and x.shape[1:-1] == shape:
        return x[..., 0]  # several windows, each with a channel axis behind
    if x.ndim == nd + 2 and x.shape[1] == 1 and x.shape[2:] == shape:
        return x[:, 0]  # several windows, each with a channel axis in front
    return _model_order(x, nd)[None]  # one window (batch or channel axes of 1 dropped)


def tolerance(theirs: np.ndarray, card: ModelCard) -> np.ndarray:
    """1e-3 of each band's range over all the windows (common practice for float32 parity).

    Per band (mel band, coefficient, bin), so that a coefficient with a wide range (an MFCC's
    c0) does not hide a wrong key in the others; a band without range uses the whole
    array's.

    Parameters
    ----------
    theirs : numpy.ndarray
        ``(windows, *feature_shape)``.
    card : ModelCard
        The card (which axis holds the bands).

    Returns
    -------
    numpy.ndarray
        Broadcastable to `theirs`.
    """
    t = np.asarray(theirs, np.float64)
    whole = float(np.ptp(t)) if t.size else 0.0
    whole = whole if whole > 0 else max(1.0, float(np.max(np.abs(t)))) if t.size else 1.0
    if t.ndim != 3:  # samples, or a flat layout: one range
        return np.full((1,) * t.ndim, TOLERANCE_OF_RANGE * whole)
    band_axis = 1 if card.layout == "mel_time" else 2
    other = tuple(a for a in range(3) if a != band_axis)
    span = np.ptp(t, axis=other, keepdims=True)
    return TOLERANCE_OF_RANGE * np.where(span > 0, span, whole)


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
            scaled: bool, tol: Any = None) -> tuple[np.ndarray, Comparison]:
    """The card's features of the windows against theirs.

    Parameters
    ----------
    card : ModelCard
        The card to try.
    window : numpy.ndarray
        ``(window_samples,)`` or ``(windows, window_samples)`` float32 at the card's rate.
    theirs : numpy.ndarray
        The training code's features, ``(windows, *feature_shape)`` (or one window).
    scaled : bool
        Compare after the card's [scaling] (else before it).
    tol : numpy.ndarray or float, optional
        The tolerance per band (`tolerance`); without it no excess is computed.

    Returns
    -------
    ours : numpy.ndarray
        The card's features, ``(windows, *feature_shape)``.
    comparison : Comparison
        The feature shape, the largest absolute difference and its excess over the
        tolerance (None when the shapes differ).
    """
    w = np.atleast_2d(window)
    ours = np.stack([features_of(card, x, scaled=scaled) for x in w])
    t = theirs if theirs.ndim == ours.ndim else theirs[None]
    shape = tuple(ours.shape[1:])
    if t.shape != ours.shape:
        return ours, Comparison(shape, None)
    d = np.abs(ours.astype(np.float64) - t)
    excess = None if tol is None else float(np.max(d / tol))
    return ours, Comparison(shape, float(np.max(d)), excess=excess)


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
    t = as_windows(np.asarray(theirs), card).astype(np.float64)
    tol = tolerance(t, card)
    w = np.atleast_2d(window)
    ours, base = compare(card, w, t, scaled=scaled, tol=tol)
    res = CheckResult(card, t, ours, str(theirs.dtype), tol, base)
    if not scaled:
        raw = {k: v for k, v in raw.items() if k != "scaling"}  # shapes may change
    results = []
    done: set[tuple] = set()

    def attempt(changes: dict[str, Any], on: dict[str, Any] = raw) -> Comparison | None:
        sig = tuple(sorted(changes.items()))
        if sig in done and on is raw:
            return None
        done.add(sig)
        trial = copy.deepcopy(on)
        trial["frontend"] = {**trial["frontend"], **changes}
        try:
            c = card_from_dict(trial, path)
        except CardError:
            return None  # a combination the card rules refuse
        _, cmp_ = compare(c, w, t, scaled=scaled, tol=tol)
        cmp_.changes = changes
        return cmp_

    def matches(r: Comparison | None) -> bool:
        return r is not None and r.excess is not None and r.excess <= 1.0

    if res.matched:
        # which searched keys these windows cannot tell apart: another value matches too
        for key, changes in candidates(card.frontend.settings()):
            r = attempt(changes)
            if matches(r) and key not in res.untold:
                res.untold.append(key)
        return res
    singles = candidates(card.frontend.settings())
    for _, changes in singles:
        r = attempt(changes)
        if r is not None:
            res.tried += 1
            results.append(r)
    if not any(matches(r) for r in results):
        for (ka, a), (kb, b) in itertools.combinations(singles, 2):
            if ka != kb and not set(a) & set(b):
                r = attempt({**a, **b})
                if r is not None:
                    res.tried += 1
                    results.append(r)
    fitting = sorted((r for r in results if r.excess is not None),
                     key=lambda r: (r.excess, len(r.changes)))
    res.fixes = [r for r in fitting if r.excess <= 1.0]
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
    e = np.abs(res.ours.astype(np.float64) - res.theirs) / res.tolerance
    wk = int(np.argmax(e.reshape(len(e), -1).max(axis=1)))  # the window that differs most
    d = np.abs(res.ours[wk].astype(np.float64) - res.theirs[wk])
    big = (e > 1.0).any(axis=0)  # above tolerance in any window
    k = np.unravel_index(int(np.argmax(e[wk])), d.shape)
    at = ", ".join(f"{n.rstrip('s')} {int(i)}" for n, i in zip(
        _axes(res.card) if d.ndim == 2 else ("sample",), k))
    window = f"window {wk}, " if len(res.theirs) > 1 else ""
    largest = (f"largest at {window}{at} (yours {float(res.theirs[wk][k]):.6g}, the card's "
               f"{float(res.ours[wk][k]):.6g})")
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
             f"features     {features}: {tuple(res.theirs.shape[1:])} {res.dtype}"
             + (f" x {len(res.theirs)} windows, one every {c.hop_s:g} s" if len(res.theirs) > 1
                else "")
             + f", {'scaled' if scaled else 'unscaled'}, in the model's input order"]
    if res.base.max_diff is None:
        lines.append(f"shape        yours {tuple(res.theirs.shape[1:])}, the card's "
                     f"{res.base.shape}: {_shape_finding(res)}")
    else:
        lines.append(f"shape        {res.base.shape}, the same")
        verdict = "match" if res.matched else "MISMATCH"
        tol = np.asarray(res.tolerance)
        span = (f"{float(tol.min()):.3g} to {float(tol.max()):.3g}" if tol.size > 1
                else f"{float(tol.max()):.3g}")
        per = "each band's range" if tol.size > 1 else "the range"
        lines.append(f"max abs diff {res.base.max_diff:.3g} (tolerance {span}: 1e-3 of {per} "
                     f"in {features.name}): {verdict}")
        if not res.matched:
            lines.append(f"where        {where(res)}")
    if res.matched:
        if res.untold:
            lines.append(f"untold       {'these windows do' if len(res.theirs) > 1 else 'this window does'} "
                         f"not tell {', '.join(res.untold)}: another value of "
                         f"{'each' if len(res.untold) > 1 else 'it'} matches too; give "
                         f"features of windows where it matters (more windows, or --start "
                         f"where the sound is loud and quiet) to check "
                         f"{'them' if len(res.untold) > 1 else 'it'}")
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
    a, b = tuple(res.theirs.shape[1:]), res.base.shape
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
    scaling_note = None
    try:
        card = card_from_dict(raw, card_path)
    except CardError as exc:
        # a full-shape scaler fits only the shape the card makes now: when that is what is
        # wrong, the search runs with the scaling set aside (unscaled features need none)
        if scaled or "scaling" not in raw or "scaling." not in str(exc):
            raise
        bare = {k: v for k, v in raw.items() if k != "scaling"}
        try:
            card = card_from_dict(bare, card_path)
        except CardError:
            raise exc from None
        scaling_note = str(exc).split(": ", 1)[-1]
        raw = bare
    theirs = read_features(features)
    if not np.isfinite(start_s) or start_s < 0:
        raise ScenemonError(f"--start {start_s} must be a number of seconds >= 0")
    info, _ = check_audio_files([audio], model_rate=card.sample_rate,
                                window_samples=card.window_samples)
    x = load_audio([audio], model_rate=card.sample_rate, window_samples=card.window_samples)
    a = int(round(start_s * card.sample_rate))
    n = len(as_windows(theirs, card))  # a file may hold several windows, one hop apart
    end = a + (n - 1) * card.hop_samples + card.window_samples
    if end > x.size:
        raise ScenemonError(f"{audio}: holds {x.size / card.sample_rate:.3f} s at "
                            f"{card.sample_rate} Hz; "
                            + (f"a window of {card.window_s:g} s does not fit at --start "
                               f"{start_s:g}" if n == 1 else
                               f"{n} windows of {card.window_s:g} s, one every "
                               f"{card.hop_s:g} s, do not fit from --start {start_s:g}"))
    windows = np.stack([np.ascontiguousarray(x[b:b + card.window_samples], np.float32)
                        for b in range(a, a + n * card.hop_samples, card.hop_samples)])
    res = check(raw, card_path, windows, theirs, scaled=scaled)
    text = report(res, card_path=card_path, audio=audio, features=features, start_s=start_s,
                  scaled=scaled, native_rate=int(info.samplerate), channels=int(info.channels))
    if scaling_note is not None:
        good = res.fixes[0].shape if res.fixes else (res.base.shape if res.matched else None)
        need = (f"with the card as it then is, one window's features are {good}: the "
                f"scaler's mean and std must have that shape, one value per band ("
                f"{good[-1] if res.card.layout != 'mel_time' else good[0]}), or one value"
                if good else "make the card match first, then the scaler's shape to its "
                             "features")
        text += (f"\nscaling      set aside for this check: {scaling_note}; {need}\n")
    sys.stdout.write(text)
    return ExitCode.OK if res.matched and scaling_note is None else ExitCode.FAILURE


__all__ = ["check", "candidates", "run_card_check", "report", "read_features", "SEARCH"]
