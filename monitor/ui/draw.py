"""What the screens draw, as plain functions from state to Rich `Text`.

Pure and cheap: they run on the UI thread at every redraw, so they build no widgets, read no
files and touch no session object; the app hands them plain values. Every class is told
apart by its letter as well as its colour (`monitor.base.palette`), and every picture has a form
without colour (glyph density), so the screens read the same under NO_COLOR. Every function
that takes a ``width`` returns lines no longer than it: panels never wrap.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from rich.style import Style
from rich.text import Text

from monitor.base import palette as P
from monitor.base.palette import class_keys  # noqa: F401  (the UI's name for it)

SHADES = " .:-=+*#%@"  # intensity by glyph density, for NO_COLOR
EIGHTHS = " ▏▎▍▌▋▊▉"
UNFAMILIAR = "◆"  # the unfamiliar-sound mark, always with its word
DIFFER = "≠"  # two models' decisions differ


# --- numbers that keep their columns ------------------------------------------------------
def clock(t_s: float) -> str:
    """Session time as h:mm:ss (7 characters up to 9:59:59).

    Parameters
    ----------
    t_s : float
        Seconds.

    Returns
    -------
    str
        The time.
    """
    s = int(max(t_s, 0.0))
    return f"{s // 3600}:{s // 60 % 60:02d}:{s % 60:02d}"


def held(t_s: float) -> str:
    """A duration in 7 characters: "  4.5 s", "  12:34", "1:02:03".

    Parameters
    ----------
    t_s : float
        Seconds.

    Returns
    -------
    str
        7 characters.
    """
    t_s = max(t_s, 0.0)
    if t_s < 60:
        return f"{t_s:5.1f} s"
    s = int(t_s)
    if s < 3600:
        return f"{s // 60:4d}:{s % 60:02d}"
    return f"{clock(t_s):>7}"


def count4(n: int) -> str:
    """A count in at most 4 characters: 9999, 12k, 999k, 1.2M, 12M, 999M, 1.2G, ...

    Parameters
    ----------
    n : int
        A count >= 0.

    Returns
    -------
    str
        At most 4 characters.
    """
    if n < 10000:
        return str(n)
    for unit, scale in (("k", 1e3), ("M", 1e6), ("G", 1e9), ("T", 1e12)):
        v = n / scale
        if v < 9.95 and unit != "k":
            return f"{v:.1f}{unit}"
        if v < 999.5:
            return f"{v:.0f}{unit}"
    return "1P+"


def count3(n: int) -> str:
    """A count in at most 3 characters, two digits kept: 999, 1k2, 12k, M12, 1M2, 12M, G12, ...

    The unit letter stands where the decimal point would (the letter code of resistor
    values, IEC 60062, from memory): 1k2 is 1.2 thousand, M12 is 0.12 million (120,000).

    Parameters
    ----------
    n : int
        A count >= 0.

    Returns
    -------
    str
        At most 3 characters.
    """
    if n < 1000:
        return str(n)
    units = "kMGTP"
    for k, unit in enumerate(units[:-1]):
        v = n / 1000.0 ** (k + 1)
        if v < 9.95:
            whole, tenth = divmod(int(v * 10 + 0.5), 10)
            return f"{whole}{unit}{tenth}"
        if v < 99.5:
            return f"{int(v + 0.5)}{unit}"
        if v < 995:
            return f"{units[k + 1]}{int(v / 10 + 0.5):02d}"
    return "1P+"


def pct(x: float | None) -> str:
    """A share in 6 characters ("100.0%", " 97.6%", "     -").

    Parameters
    ----------
    x : float or None
        A share from 0 to 1 (None: no figure).

    Returns
    -------
    str
        6 characters.
    """
    return "     -" if x is None else f"{x:6.1%}"


def fit(s: str, width: int) -> str:
    """`s` cut to `width` cells with an ellipsis (labels are short ASCII).

    Parameters
    ----------
    s : str
        The text.
    width : int
        Cells.

    Returns
    -------
    str
        At most `width` characters.
    """
    return s if len(s) <= width else (s[:max(width - 1, 0)] + "…" if width > 0 else "")


# --- classes --------------------------------------------------------------------------------
def colour(classes, c) -> str:
    """The class colour (`monitor.base.palette`, the same as the HTML report's).

    Parameters
    ----------
    classes : sequence of str
        The model's classes.
    c : str
        A label.

    Returns
    -------
    str
        ``#rrggbb``.
    """
    return P.class_colour(classes, c)


def bar(frac: float, width: int, *, mark: float | None = None, style: str = "") -> Text:
    """A horizontal bar of `width` cells in eighths; `mark` draws a threshold tick.

    Parameters
    ----------
    frac : float
        From 0 to 1 (clipped).
    width : int
        Cells.
    mark : float, optional
        Where the threshold tick goes, from 0 to 1.
    style : str
        The bar's Rich style.

    Returns
    -------
    rich.text.Text
        One line of `width` cells.
    """
    frac = min(max(float(frac), 0.0), 1.0)
    eighths = int(round(frac * width * 8))
    full, part = divmod(eighths, 8)
    s = "█" * min(full, width) + (EIGHTHS[part] if part and full < width else "")
    text = Text(s.ljust(width), style=style)
    if mark is not None and 0 <= mark <= 1 and width > 1:
        pos = min(width - 1, int(round(mark * width)))
        text = text[:pos] + Text("│", style=f"bold {P.TEXT}") + text[pos + 1:]
    return text


@dataclass(frozen=True)
class ModelView:
    """What the decision panel shows of one model (UI thread values).

    Attributes
    ----------
    name : str
        The model's name (A, B, or its file).
    decision : str or None
        Its decision.
    held_s : float
        Seconds the decision has held.
    top_p : float
        Its top smoothed probability.
    accuracy : float or None
        Its running accuracy against the truth.
    unfamiliar : bool
        The sound is unfamiliar to it.
    """

    name: str  # "" for a one-model session, else "A" / "B"
    decision: str | None
    held_s: float
    top_p: float
    accuracy: float | None = None
    unfamiliar: bool = False


def _truth_line(classes, truth, decision, truth_mode: str, width: int) -> Text:
    t = Text("truth  ", style=P.MUTED)
    if truth is None:
        hint = {"keys": f"not given · keys 1-{min(len(classes), 9)}",
                "file": "not in the truth file here"}.get(truth_mode, "none")
        t.append(fit(hint, width - 7), style=P.MUTED)
        return t
    t.append(fit(truth, 12), style=f"bold {colour(classes, truth)}")
    if decision is not None or truth_mode != "none":
        same = truth == decision
        t.append("  ")
        t.append("✓ agrees" if same else "✗ DIFFERS", style="bold" if same else f"bold reverse {P.ALERT}")
    t.truncate(width)
    return t


def decision_text(classes, keys, models: list[ModelView], truth: str | None, *,
                  truth_mode: str = "keys", agreement: float | None = None,
                  width: int = 36) -> Text:
    """The decision panel: one model, or A and B side by side with a mark where they
    differ, each model's running accuracy and how often they agree.

    ``truth_mode``: "keys" (the operator gives it), "file" (a truth file) or "none".

    Parameters
    ----------
    classes : sequence of str
        The model's classes.
    keys : dict
        Each class's letter (`class_keys`).
    models : list of ModelView
        One model, or A and B.
    truth : str or None
        The truth now.
    truth_mode : str
        How the truth is told ("keys", "file", "none").
    agreement : float, optional
        How often A and B decided alike.
    width : int
        Cells.

    Returns
    -------
    rich.text.Text
        The panel's lines.
    """
    t = Text(no_wrap=True, overflow="crop")
    if len(models) == 1:
        m = models[0]
        if m.decision is None:
            t.append("·· undecided", style=f"bold {P.MUTED}")
        else:
            col = colour(classes, m.decision)
            t.append("██ ", style=col)
            t.append(fit(m.decision.upper(), width - 20), style=f"bold {col}")
            t.append(f"  {keys[m.decision]}", style=P.MUTED)
        if m.unfamiliar:
            t.append(f"  {UNFAMILIAR} unfamiliar", style=f"bold {P.ALERT}")
        t.append("\n")
        if m.decision is None:
            t.append("no class above the enter threshold\n", style=P.MUTED)
        else:
            t.append(f"held {held(m.held_s)}   p {m.top_p:4.2f}\n")
        t.append_text(_truth_line(classes, truth, m.decision, truth_mode, width))
        if m.accuracy is not None:
            t.append(f"\naccuracy {pct(m.accuracy)}")
        return t
    col_w = (width - 1) // 2
    a, b = models[0], models[1]
    differ = a.decision != b.decision
    for k, m in enumerate((a, b)):
        if k:
            t.append(DIFFER if differ else " ", style=f"bold reverse {P.ALERT}" if differ else "")
        cell = Text(f"{m.name} ", style=f"bold {P.TEXT}")
        if m.decision is None:
            cell.append("·· undecided", style=P.MUTED)
        else:
            col = colour(classes, m.decision)
            cell.append("██ ", style=col)
            cell.append(fit(m.decision.upper(), col_w - 5), style=f"bold {col}")
        cell.truncate(col_w, pad=True)
        t.append_text(cell)
    t.append("\n")
    for k, m in enumerate((a, b)):
        if k:
            t.append(" ")
        if m.unfamiliar:
            cell = Text(f"  {UNFAMILIAR} unfamiliar", style=f"bold {P.ALERT}")
        else:
            cell = Text(f"  held {held(m.held_s)}" if m.decision else "")
        cell.truncate(col_w, pad=True)
        t.append_text(cell)
    t.append("\n")
    for k, m in enumerate((a, b)):
        if k:
            t.append(" ")
        cell = Text(f"  acc {pct(m.accuracy)}")
        if m.accuracy is not None and truth is not None:
            ok = m.decision == truth
            cell.append(" ✓" if ok else " ✗", style="bold" if ok else f"bold {P.ALERT}")
        cell.truncate(col_w, pad=True)
        t.append_text(cell)
    t.append("\n")
    line = Text("truth ", style=P.MUTED)
    if truth is None:
        line.append("-" if truth_mode != "keys" else f"keys 1-{min(len(classes), 9)}",
                    style=P.MUTED)
    else:
        line.append(fit(truth, 12), style=f"bold {colour(classes, truth)}")
    line.truncate(col_w, pad=True)
    line.append(" ")
    line.append(f"  agree {pct(agreement)}")
    t.append_text(line)
    t.truncate(width * 5)
    return t


def name_width(classes, limit: int = 12) -> int:
    """Width of the class-name column: the longest class name, at most `limit`.

    Parameters
    ----------
    classes : sequence of str
        The model's classes.
    limit : int
        Cells at most.

    Returns
    -------
    int
        Cells.
    """
    return min(limit, max(len(c) for c in classes))


def class_bars(classes, keys, columns: list, enter: float, *, width: int) -> Text:
    """One line per class: its letter, name and one bar per column.

    ``columns``: a list of (values or None, with_enter_mark, with_number); one model shows
    raw and smoothed, two models A's and B's smoothed.

    Parameters
    ----------
    classes : sequence of str
        The model's classes.
    keys : dict
        Each class's letter (`class_keys`).
    columns : list
        (values or None, with_enter_mark, with_number) per bar column.
    enter : float
        The decision threshold, marked on the bars that ask for it.
    width : int
        Cells.

    Returns
    -------
    rich.text.Text
        One line per class.
    """
    t = Text(no_wrap=True, overflow="crop")
    nw = name_width(classes)
    fixed = 2 + nw + 1 + sum(5 if num else 0 for _, _, num in columns) + len(columns) - 1
    bw = max(4, (width - fixed) // len(columns))
    for i, c in enumerate(classes):
        col = colour(classes, c)
        t.append(f"{keys[c]} ", style=f"bold {col}")
        t.append(f"{fit(c, nw):<{nw}} ")
        for k, (vals, marked, num) in enumerate(columns):
            v = float(vals[i]) if vals is not None else 0.0
            if k:
                t.append(" ")
            t.append_text(bar(v, bw, mark=enter if marked else None, style=col))
            if num:
                t.append(f" {v:4.2f}")
        if i < len(classes) - 1:
            t.append("\n")
    return t


# --- the strip --------------------------------------------------------------------------------
STRIP_LABEL = 9


def strip_cells(width: int) -> int:
    """How many hops the strip shows in a panel `width` cells wide (one cell per hop).

    Parameters
    ----------
    width : int
        The panel's cells.

    Returns
    -------
    int
        Hops shown.
    """
    return max(8, width - STRIP_LABEL)


def _runs(seq):
    """(value, count) of consecutive equal values."""
    out: list[list] = []
    for v in seq:
        if out and out[-1][0] == v:
            out[-1][1] += 1
        else:
            out.append([v, 1])
    return [(v, n) for v, n in out]


def _axis(cells: int, hop_s: float) -> str:
    """Time ticks under the strip: "-20 s" at their cells, "now" at the right."""
    line = [" "] * cells
    now = "now"
    line[cells - len(now):] = now
    step = next((s for s in (5, 10, 15, 30, 60, 120, 300, 600, 1800, 3600)
                 if s / hop_s >= 9), 3600)
    k = 1
    free_until = cells - len(now) - 1
    while True:
        pos = cells - 1 - int(round(k * step / hop_s))
        if pos < 0:
            break
        label = f"╵-{k * step:g}s" if k * step < 60 or k * step % 60 else f"╵-{k * step // 60:g}m"
        if pos + len(label) <= free_until:
            line[pos:pos + len(label)] = label
            free_until = pos - 1
        k += 1
    return "".join(line)


def strip_text(classes, keys, rows: list[tuple[str, list]], width: int, hop_s: float) -> Text:
    """The newest hops, one cell each, newest on the right: a row per model and the truth,
    then the time axis.

    Parameters
    ----------
    classes : sequence of str
        The model's classes.
    keys : dict
        Each class's letter (`class_keys`).
    rows : list of (str, list)
        Each row's name and its labels per hop, oldest first.
    width : int
        Cells.
    hop_s : float
        Seconds per hop.

    Returns
    -------
    rich.text.Text
        The strip's lines.
    """
    cells = strip_cells(width)
    t = Text(no_wrap=True, overflow="crop")
    for label, values in rows:
        t.append(f"{fit(label, STRIP_LABEL - 1):<{STRIP_LABEL}}", style=P.MUTED)
        seq = list(values)[-cells:]
        if len(seq) < cells:
            t.append("·" * (cells - len(seq)), style=P.LINE)
        for v, run in _runs(seq):  # one segment per run keeps rendering cheap
            if v is None:
                t.append("·" * run, style=P.MUTED)
            else:
                t.append(keys.get(v, "?") * run, style=f"bold {P.GROUND} on {colour(classes, v)}")
        t.append("\n")
    t.append(" " * STRIP_LABEL + _axis(cells, hop_s), style=P.MUTED)
    return t


def strip_title(width: int, hop_s: float) -> str:
    """The strip's border title: the seconds it spans at `width` and the hop of one cell.

    Parameters
    ----------
    width : int
        The panel's cells.
    hop_s : float
        Seconds per hop.

    Returns
    -------
    str
        The title.
    """
    span = strip_cells(width) * hop_s
    return f"last {span:.0f} s · a cell per {hop_s:g} s hop"


# --- what it hears: the feature picture -------------------------------------------------------
@dataclass(frozen=True)
class PictureSpec:
    """How to draw one card's features: orientation, frequency axis and value scale.

    ``display = features * gain + offset`` (broadcast to the card's layout) gives the values
    drawn, from ``lo`` (the ramp's first step) to ``hi`` (its last), in ``unit``.

    Attributes
    ----------
    time_axis : int or None
        The frames axis of one window's features (None: no picture, a waveform model).
    centres_hz : tuple of float or None
        The centre frequency of each band, for the axis labels.
    gain, offset : numpy.ndarray
        ``display = features * gain + offset``.
    lo, hi : float
        The display values at the ends of the heat ramp.
    unit : str
        The display's unit ("dB", or none).
    what : str
        What the picture shows, for its title.
    """

    time_axis: int | None  # None: no picture (a waveform model)
    centres_hz: tuple[float, ...] | None  # per band, low to high; None: no frequency axis
    gain: np.ndarray
    offset: np.ndarray
    lo: float
    hi: float
    unit: str
    what: str  # "log-mel", "spectrogram", "MFCC" ...


def picture_spec(card) -> PictureSpec:
    """The picture of a model card's features.

    A log-mel or linear spectrogram card with a fixed scaling is drawn in dB (the scaling
    undone, the card's log turned into 10 log10 of power), its frequency axis from the
    card's band centres (`monitor.features.dsp.mel_band_edges`) or FFT bins. Anything else
    (MFCC, per-window standardisation) is drawn as the model's scaled input in standard
    deviations, without a frequency axis.

    Parameters
    ----------
    card : ModelCard
        The model's card.

    Returns
    -------
    PictureSpec
        How to draw its features.
    """
    fe = card.frontend
    kind = fe.kind
    one = np.ones((), np.float32)
    if kind == "waveform" or card.layout == "flat":  # no axes to draw a picture on
        return PictureSpec(None, None, one, one * 0, 0.0, 1.0, "", kind)
    time_axis = card.time_axis
    centres: tuple[float, ...] | None = None
    if kind == "logmel" and fe.mel is not None:
        from monitor.features.dsp import mel_band_edges

        edges = mel_band_edges(mel_bands=fe.mel.mel_bands, fmin=fe.mel.fmin, fmax=fe.mel.fmax,
                               scale=fe.mel.mel_scale)
        centres = tuple(float(f) for f in edges[1:-1])
    elif kind == "spectrogram" and fe.framing is not None:
        centres = tuple(k * card.sample_rate / fe.framing.fft_length for k in range(card.bands))
    per_window = card.scaling.per_window
    log = fe.log.log if fe.log is not None else None
    power = fe.spectrum.power if fe.spectrum is not None else 2.0
    factor = {"db": 1.0, "ln": 20.0 / power / math.log(10.0), "log10": 20.0 / power}.get(log)
    if log == "db" and fe.log.db_ref != "one":
        factor = None  # relative to each window's own maximum: no absolute level to draw
    if centres is None or per_window != "none" or factor is None:
        return PictureSpec(time_axis, centres if per_window == "none" else None, one,
                           one * 0, -2.5, 2.5, "σ", "scaled input")
    mean = np.asarray(card.mean, np.float32)
    std = np.asarray(card.std, np.float32)
    gain, offset = std * factor, mean * factor
    # the training features' spread: from the quietest band's mean less 1.5 std to the
    # loudest band's mean plus 1 std (on the demo tour: -60 to +20 dB, where 98% of it lies)
    hi = float(np.max(offset + 1.0 * gain))
    lo = float(np.min(offset - 1.5 * gain))
    if log != "db":  # nothing lies below the log of the offset (digital silence)
        floor = max(fe.log.log_offset, fe.log.log_floor)
        base = math.log(floor) if log == "ln" else math.log10(floor)
        lo = max(lo, factor * base)
    lo, hi = 10.0 * math.floor(lo / 10.0), 10.0 * math.ceil(hi / 10.0)
    if hi - lo < 20:
        lo = hi - 20
    return PictureSpec(time_axis, centres, gain, offset, lo, hi, "dB",
                       "log-mel" if kind == "logmel" else "spectrogram")


@lru_cache(maxsize=64)
def _pool(n_in: int, n_out: int) -> np.ndarray:
    """(n_out, n_in) averaging matrix: output j is the mean of its share of the inputs
    (the nearest input when there are more outputs than inputs)."""
    m = np.zeros((n_out, n_in), np.float32)
    for j in range(n_out):
        a = int(j * n_in / n_out)
        z = max(a + 1, int((j + 1) * n_in / n_out))
        m[j, a:z] = 1.0 / (z - a)
    return m


@lru_cache(maxsize=64)
def _top_band(n_in: int, n_out: int) -> tuple[int, ...]:
    """For each output row, the highest input band it covers."""
    return tuple(max(int(j * n_in / n_out) + 1, int((j + 1) * n_in / n_out)) - 1
                 for j in range(n_out))


_HALF: dict[tuple[int, int], Style] = {}


def _half(top: int, bottom: int) -> Style:
    st = _HALF.get((top, bottom))
    if st is None:
        st = _HALF[(top, bottom)] = Style(color=P.HEAT[top], bgcolor=P.HEAT[bottom])
    return st


AXIS_W = 4


def khz(f_hz: float) -> str:
    """A frequency in Hz as its kHz axis label: one decimal below 10 kHz, none from there on.

    Parameters
    ----------
    f_hz : float
        Hz.

    Returns
    -------
    str
        The label.
    """
    f = f_hz / 1000.0
    return f"{f:.1f}" if f < 9.95 else f"{f:.0f}"


def heat_text(features, spec: PictureSpec, rows: int, cols: int, *, color: bool = True) -> Text:
    """The current window's features as a picture `rows` lines high and ``AXIS_W + cols``
    wide: low bands at the bottom, time to the right, a kHz label on every other line.

    In colour each cell is two pixels (the upper half block's foreground and its
    background), steps of `monitor.base.palette.HEAT`; without colour one pixel per cell, by
    glyph density (`SHADES`).

    Parameters
    ----------
    features : numpy.ndarray
        One window's model input.
    spec : PictureSpec
        How to draw it.
    rows, cols : int
        Lines and picture cells.
    color : bool
        Colours (else characters of rising density).

    Returns
    -------
    rich.text.Text
        The picture.
    """
    t = Text(no_wrap=True, overflow="crop")
    if spec.time_axis is None:
        return Text("waveform model: the input is the samples", style=P.MUTED)
    if features is None:
        return Text("\n" * (rows // 2) + " " * AXIS_W + "waiting for the first window",
                    style=P.MUTED)
    f = np.asarray(features, dtype=np.float32)
    if f.ndim == 3:
        f = f[..., 0]
    v = f * spec.gain + spec.offset
    if spec.time_axis == 0:
        v = v.T  # (bands, frames)
    bands, frames = v.shape
    px = 2 * rows if color else rows
    grid = _pool(bands, px) @ v @ _pool(frames, cols).T  # row 0: the lowest band
    n = len(P.HEAT)
    z = np.clip(((grid - spec.lo) / (spec.hi - spec.lo) * n).astype(np.int64), 0, n - 1)
    tops = _top_band(bands, rows)
    for r in range(rows):
        label = ""
        row_from_bottom = rows - 1 - r
        if spec.centres_hz is not None and (r % 2 == 0 or rows <= 4):
            label = khz(spec.centres_hz[min(tops[row_from_bottom], len(spec.centres_hz) - 1)])
        elif spec.centres_hz is None and r in (0, rows - 1):
            label = str(bands - 1 if r == 0 else 0)
        t.append(f"{label:>{AXIS_W - 1}} ", style=P.MUTED)
        if color:
            top, bottom = z[2 * row_from_bottom + 1], z[2 * row_from_bottom]
            for (a, b), run in _runs(zip(top.tolist(), bottom.tolist())):
                t.append("▀" * run, style=_half(a, b))
        else:
            for k, run in _runs(z[row_from_bottom].tolist()):
                t.append(SHADES[k * len(SHADES) // n] * run)
        if r < rows - 1:
            t.append("\n")
    return t


def scale_text(spec: PictureSpec, width: int, *, color: bool = True) -> Text:
    """The picture's value scale on one line: lowest value, the ramp, highest value.

    Parameters
    ----------
    spec : PictureSpec
        The picture's scale.
    width : int
        Cells.
    color : bool
        Colours (else characters).

    Returns
    -------
    rich.text.Text
        One line.
    """
    t = Text(no_wrap=True, overflow="crop")
    if spec.time_axis is None:
        return t
    unit = f" {spec.unit}"
    lo, hi = f"{spec.lo:+.0f}" if spec.unit == "σ" else f"{spec.lo:.0f}", f"{spec.hi:+.0f}"
    n = len(P.HEAT)
    room = width - AXIS_W - len(lo) - len(hi) - len(unit) - 2
    if room < n:  # narrow: the ramp starts at the left edge
        room += AXIS_W - 1
        t.append(" ")
    else:
        t.append(" " * AXIS_W)
    per = max(1, min(3, room // n))
    t.append(lo + " ", style=P.MUTED)
    for k in range(n):
        if color:
            t.append(" " * per, style=Style(bgcolor=P.HEAT[k]))
        else:
            t.append(SHADES[k * len(SHADES) // n] * per)
    t.append(" " + hi + unit, style=P.MUTED)
    return t


def level_text(level_dbfs: float, clipped: float, quiet_s: float, width: int) -> Text:
    """The input level: its value, then a meter from -60 to 0 dBFS, or in its place the
    warning that matters (clipping; silent for 3 s or more: a muted input?).

    Parameters
    ----------
    level_dbfs : float
        The newest window's level (AES17).
    clipped : float
        Its share of full-scale samples.
    quiet_s : float
        Seconds the input has been silent.
    width : int
        Cells.

    Returns
    -------
    rich.text.Text
        One line.
    """
    t = Text(no_wrap=True, overflow="crop")
    t.append(f"{max(level_dbfs, -160.0):6.1f} dBFS ")  # the windows' floor, -160
    room = max(4, width - 12)
    if clipped > 0.001:
        t.append(fit(" CLIPPING ", room).ljust(room), style=f"bold reverse {P.ALERT}")
        return t
    if quiet_s >= 3.0:
        t.append(fit(" SILENT: muted? ", room).ljust(room), style=f"bold reverse {P.TEXT}")
        return t
    frac = (max(-60.0, min(0.0, level_dbfs)) + 60.0) / 60.0
    # greys rising in lightness as the level nears full scale, ALERT in the last 3 dB: no
    # class colour, which would say a class
    style = P.ALERT if level_dbfs > -3 else P.TEXT if level_dbfs > -12 else P.MUTED
    t.append("▕", style=P.LINE)
    t.append_text(bar(frac, room - 2, style=style))
    t.append("▏", style=P.LINE)
    return t


# --- session and health -------------------------------------------------------------------------
def confusion_text(classes, keys, cm, width: int, *, color: bool = True) -> Text | None:
    """Counts, rows truth and columns decision (the last: undecided), each cell shaded by
    its share of the row on the heat ramp; None when it does not fit in `width`.

    A cell is 5 or 4 characters wide with its space; its count is written in what is left
    (`count4` or `count3`), so hours of windows never break a column.

    Parameters
    ----------
    classes : sequence of str
        The model's classes.
    keys : dict
        Each class's letter (`class_keys`).
    cm : array_like
        Counts, rows truth, columns decisions then undecided.
    width : int
        Cells.
    color : bool
        Shade the cells.

    Returns
    -------
    rich.text.Text or None
        The table, or None when it does not fit.
    """
    cols = [keys[c] for c in classes] + ["?"]
    cell = 5
    if 3 + cell * len(cols) > width:
        cell = 4
        if 3 + cell * len(cols) > width:
            return None
    count = count4 if cell == 5 else count3
    t = Text(no_wrap=True, overflow="crop")
    t.append("   " + "".join(f"{k:>{cell - 1}} " for k in cols), style=P.MUTED)
    for i, c in enumerate(classes):
        row = cm[i]
        total = sum(row) or 1
        t.append("\n")
        t.append(f" {keys[c]} ", style=f"bold {colour(classes, c)}")
        for v in row[:len(cols)]:
            share = v / total
            txt = f"{count(v) if v else '·':>{cell - 1}} "
            if color and v:
                k = P.heat_index(share)
                fg = P.GROUND if k >= 6 else P.TEXT
                t.append(txt, style=Style(color=fg, bgcolor=P.HEAT[k]))
            else:
                t.append(txt, style=P.MUTED if not v else "")
    return t


def session_text(*, t_s: float, windows: int, snippets: int, tally, classes, keys,
                 width: int, height: int, truth_mode: str, which: str = "",
                 unfamiliar: int | None = None, color: bool = True) -> Text:
    """The session panel: time, windows, snippets, accuracy and the confusion table, then
    what fits of latency and switch rate. At most `height` lines of at most `width`.

    Parameters
    ----------
    t_s : float
        Session seconds.
    windows : int
        Windows so far.
    snippets : int
        Snippets captured.
    tally : Tally
        The running counts.
    classes : sequence of str
        The model's classes.
    keys : dict
        Each class's letter (`class_keys`).
    width, height : int
        Cells and lines.
    truth_mode : str
        How the truth is told.
    which : str
        Which model the panel is about ("", "A", "B").
    unfamiliar : int, optional
        Windows marked unfamiliar.
    color : bool
        Colours.

    Returns
    -------
    rich.text.Text
        The panel's lines.
    """
    acc = pct(tally.accuracy) if tally.with_truth else "     -"
    # 26 cells (the panel's inner width at every size): up to 99:59:59 and 999,999 windows
    # in full, beyond that in short form
    tm = clock(t_s) if t_s < 100 * 3600 else f"{int(t_s // 3600)} h"
    win = f"{windows:,}" if windows < 10 ** 6 else count4(windows)
    snip = f"{snippets:,}" if snippets < 10 ** 6 else count4(snippets)
    lines: list[Text] = [Text(f"time {tm:>8}  win {win:>7}"),
                         Text(f"snip {snip:>8}  acc {acc:>7}")]
    extra: list[Text] = []
    if not tally.with_truth:
        hint = {"keys": f"no truth yet: keys 1-{min(len(classes), 9)}",
                "file": "no truth yet in the file"}.get(truth_mode, "no truth in this session")
        lines.append(Text(hint, style=P.MUTED))
    else:
        cm = confusion_text(classes, keys, tally.confusion.tolist(), width, color=color)
        if cm is not None and height >= 3 + 1 + len(classes):
            head = f"truth↓ decision→{' of ' + which if which else ''}"
            lines.append(Text(fit(head, width), style=P.MUTED))
            lines.extend(cm.split("\n"))
        else:
            recalls = tally.per_class()
            for c in classes:
                r = recalls[c].get("recall")
                lines.append(Text(f" {keys[c]} {fit(c, width - 12):<{width - 12}} "
                                  f"{pct(r) if r is not None else '     -'}"))
        lat = tally.latency_median
        extra.append(Text(f"latency med {'-' if lat is None else f'{lat:.1f} s':>7}",
                          style=P.MUTED))
        if tally.switches_per_min is not None:
            extra.append(Text(f"switches    {tally.switches_per_min:>5.1f}/min", style=P.MUTED))
    if unfamiliar is not None:
        unf = f"{unfamiliar:,}" if unfamiliar < 10 ** 6 else count4(unfamiliar)
        extra.insert(0, Text(f"{UNFAMILIAR} unfamiliar  {unf:>7}", style=P.MUTED))
    lines.extend(extra)
    t = Text(no_wrap=True, overflow="crop")
    for k, line in enumerate(lines[:height]):
        if k:
            t.append("\n")
        line.truncate(width)
        t.append_text(line)
    return t


def health_text(*, source: str, rate, ms: float | None, latency_ms: float | None,
                cpu: float | None, overruns: int, gaps: int, write_error: bool,
                width: int, show_timings: bool = True, model_faults: int = 0,
                height: int = 7) -> Text:
    """The health panel: source, native rate, compute and latency, CPU, losses; then the
    alarms (windows whose model output was not finite, a disk that stopped), for which the
    rate and then the latency rows make room when the panel has `height` rows only.

    Parameters
    ----------
    source : str
        The source's origin and name.
    rate : int or str
        The native rate.
    ms : float or None
        Compute per window.
    latency_ms : float or None
        Latency of the last window (live).
    cpu : float or None
        Share of one core the process used.
    overruns, gaps : int
        Ring overruns and windows after a gap.
    write_error : bool
        The session writer has stopped.
    width : int
        Cells.
    show_timings : bool
        Show compute and latency (a clock-frozen test leaves them out).
    model_faults : int
        Windows whose model output was not finite.
    height : int
        Lines.

    Returns
    -------
    rich.text.Text
        The panel's lines.
    """
    t = Text(no_wrap=True, overflow="crop")

    def num(v, spec, unit):
        return "-" if v is None or not show_timings else f"{v:{spec}}{unit}"

    rows = [(fit(source, width), ""), ("rate", f"{rate} Hz"),
            ("compute", num(ms, ".2f", " ms")), ("latency", num(latency_ms, ".1f", " ms")),
            ("CPU", num(None if cpu is None else cpu * 100, ".1f", " %")),
            ("overruns", f"{overruns:,}"), ("gaps", f"{gaps:,}")]
    alarms = ([f"MODEL FAULTS {count4(model_faults)}"] if model_faults else []) \
        + (["DISK STOPPED"] if write_error else [])
    for name in ("rate", "latency"):
        if len(rows) + len(alarms) > height:
            rows = [r for r in rows if r[0] != name]
    for k, (name, value) in enumerate(rows):
        if k:
            t.append("\n")
        style = f"bold reverse {P.ALERT}" if name in ("overruns", "gaps") and value != "0" else ""
        t.append(f"{name:<{width - len(value)}}{value}"[:width], style=style)
    for line in alarms:
        t.append("\n")
        t.append(fit(line, width), style=f"bold reverse {P.ALERT}")
    return t


# --- the stage font ---------------------------------------------------------------------------
# A squared 5 x 6 block font of our own for the stage view: straight strokes and square
# corners, so it reads from across a room; every character a class name can hold (a-z, 0-9,
# "_", "-") differs from every other in at least three of its 30 cells, and the zero carries
# a stroke so it is never the letter O.
_FONT_ROWS = {
    "A": "##### #...# ##### #...# #...# #...#",
    "B": "####. #...# ####. #...# #...# ####.",
    "C": "##### #.... #.... #.... #.... #####",
    "D": "####. #...# #...# #...# #..#. ###..",
    "E": "##### #.... ####. #.... #.... #####",
    "F": "##### #.... ####. #.... #.... #....",
    "G": "##### #.... #.... #..## #...# #####",
    "H": "#...# #...# ##### #...# #...# #...#",
    "I": "##### ..#.. ..#.. ..#.. ..#.. #####",
    "J": "..### ....# ....# ....# #...# #####",
    "K": "#...# #..#. ###.. #..#. #...# #...#",
    "L": "#.... #.... #.... #.... #.... #####",
    "M": "##.## #.#.# #.#.# #...# #...# #...#",
    "N": "##..# #.#.# #.#.# #.#.# #..## #...#",
    "O": "##### #...# #...# #...# #...# #####",
    "P": "##### #...# #...# ##### #.... #....",
    "Q": "##### #...# #...# #.#.# #..#. ##.##",
    "R": "##### #...# #...# ####. #..#. #...#",
    "S": "##### #.... ##### ....# ....# #####",
    "T": "##### ..#.. ..#.. ..#.. ..#.. ..#..",
    "U": "#...# #...# #...# #...# #...# #####",
    "V": "#...# #...# #...# #...# .#.#. ..#..",
    "W": "#...# #...# #...# #.#.# #.#.# .#.#.",
    "X": "#...# .#.#. ..#.. ..#.. .#.#. #...#",
    "Y": "#...# #...# ##### ..#.. ..#.. ..#..",
    "Z": "##### ...#. ..#.. .#... #.... #####",
    "0": "##### #..## #.#.# #.#.# ##..# #####",
    "1": "###.. ..#.. ..#.. ..#.. ..#.. .###.",
    "2": "##### ....# ##### #.... #.... #####",
    "3": "##### ....# .#### ....# ....# #####",
    "4": "#.... #.... #..#. ##### ...#. ...#.",
    "5": "##### #.... ####. ....# #...# ####.",
    "6": "#.... #.... ##### #...# #...# #####",
    "7": "##### ....# ...#. ..#.. ..#.. ..#..",
    "8": "##### #...# ##### #...# #...# #####",
    "9": "##### #...# ##### ....# ....# ....#",
    "_": "..... ..... ..... ..... ..... #####",
    "-": "..... ..... .###. ..... ..... .....",
    "?": "##### ....# ..### ..#.. ..... ..#..",
    " ": "..... ..... ..... ..... ..... .....",
}
FONT: dict[str, tuple[str, ...]] = {ch: tuple(rows.split()) for ch, rows in _FONT_ROWS.items()}
FONT_W, FONT_H = 5, 6
STAGE_SCALES = (2, 1)  # cells per font pixel, across; one line per pixel row


def big_width(word: str, scale: int) -> int:
    """Cells `word` takes in the stage font at `scale` cells per pixel (letters one pixel apart).

    Parameters
    ----------
    word : str
        The word.
    scale : int
        Cells per font pixel.

    Returns
    -------
    int
        Cells.
    """
    return len(word) * (FONT_W + 1) * scale - scale if word else 0


def big_text(word: str, *, max_width: int = 10 ** 6, style: str = "") -> Text:
    """`word` in the stage font, at the widest scale that fits `max_width` (two cells or one
    per pixel); a word too long even at one cell per pixel is cut with a trailing "-".

    Parameters
    ----------
    word : str
        The word.
    max_width : int
        Cells at most.
    style : str
        Its Rich style.

    Returns
    -------
    rich.text.Text
        Six lines.
    """
    word = word.upper()
    scale = next((s for s in STAGE_SCALES if big_width(word, s) <= max_width), 1)
    while big_width(word, scale) > max_width and len(word) > 1:
        word = word[:-2] + "-"
    lines = []
    for r in range(FONT_H):
        parts = []
        for ch in word:
            row = FONT.get(ch, FONT["?"])[r]
            parts.append("".join(("█" if p == "#" else " ") * scale for p in row))
        lines.append((" " * scale).join(parts))
    return Text("\n".join(lines), style=style, no_wrap=True, overflow="crop")
