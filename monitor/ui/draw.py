"""What the live view draws, as plain functions from state to Rich `Text`.

Every class is told apart by its text key (a letter) as well as its colour, so the screen
reads the same with NO_COLOR or on a monochrome terminal.
"""

from __future__ import annotations

import numpy as np
from rich.text import Text

PALETTE = ("#5d9bd5", "#e3a13b", "#62b26f", "#d0607a", "#a283d6", "#4fb7b3", "#c9874f",
           "#9aa3ad", "#7fc4e8", "#d7c35a")
SHADES = " .:-=+*#%@"  # intensity without colour
HEAT = ("#10141c", "#1b2a44", "#24466b", "#2f6a8c", "#3f8f9c", "#63ad97", "#9cc687",
        "#d2d97a", "#f1e38a", "#fff4c2")


def class_keys(classes) -> dict[str, str]:
    """One distinct character per class: its first unused letter, else a digit."""
    used, out = set(), {}
    for i, c in enumerate(classes):
        key = next((ch for ch in c.lower() if ch.isalnum() and ch not in used), str(i % 10))
        used.add(key)
        out[c] = key
    return out


def colour(classes, c) -> str:
    return PALETTE[list(classes).index(c) % len(PALETTE)] if c in classes else "#777777"


def bar(frac: float, width: int, *, mark: float | None = None, style: str = "") -> Text:
    """A horizontal bar of `width` cells; `mark` draws a threshold tick at that fraction."""
    frac = min(max(float(frac), 0.0), 1.0)
    cells = frac * width
    full = int(cells)
    parts = "█" * full + ("▌" if cells - full >= 0.5 and full < width else "")
    text = Text(parts.ljust(width), style=style)
    if mark is not None and 0 <= mark <= 1:
        pos = min(width - 1, int(round(mark * width)))
        text = text[:pos] + Text("│", style="bold") + text[pos + 1:]
    return text


def decision_text(classes, keys, decision, held_s, truth, top_p) -> Text:
    t = Text()
    if decision is None:
        t.append("  undecided\n", style="bold dim")
        t.append("  waiting for a class to pass the\n  enter threshold\n", style="dim")
    else:
        col = colour(classes, decision)
        t.append("  ██ ", style=col)
        t.append(decision.upper(), style=f"bold {col}")
        t.append(f"  [{keys[decision]}]\n", style="dim")
        t.append(f"  held {held_s:5.1f} s   p {top_p:.2f}\n", style="")
    if truth is None:
        t.append("  truth  not given (keys 1-9)", style="dim")
    else:
        same = truth == decision
        t.append("  truth  ", style="")
        t.append(truth, style=f"bold {colour(classes, truth)}")
        t.append("   agrees" if same else "   ✗ DIFFERS", style="bold" if same else "bold reverse")
    return t


def class_bars(classes, keys, probs, smoothed, enter, width=12, name_w=12) -> Text:
    t = Text()
    name_w = min(name_w, max(len(c) for c in classes))
    t.append(f"{'':{name_w + 4}}{'raw':<{width + 1}}{'smoothed':<{width + 1}}\n", style="dim")
    for i, c in enumerate(classes):
        col = colour(classes, c)
        t.append(f"{keys[c]} ", style=f"bold {col}")
        t.append(f"{c[:name_w]:<{name_w}}  ")
        t.append_text(bar(probs[i] if probs is not None else 0, width, style=col))
        t.append(" ")
        t.append_text(bar(smoothed[i] if smoothed is not None else 0, width, mark=enter, style=col))
        t.append(f" {smoothed[i] if smoothed is not None else 0:.2f}\n")
    t.append(f"{'':{name_w + 4}}{'':<{width + 1}}│ = enter {enter:g}", style="dim")
    return t


def strip_text(classes, keys, decisions, truths, width, hop_s, span_s=60.0) -> Text:
    """The last `span_s` seconds in `width` cells: decisions above, truth beneath, newest on
    the right; a cell shows the newest window it covers."""
    t = Text()
    per = max(1, -(-int(round(span_s / hop_s)) // width))  # hops per cell
    width = min(width, -(-int(round(span_s / hop_s)) // per))
    for row, label in ((decisions, "decision"), (truths, "truth   ")):
        t.append(f"{label} ", style="dim")
        vals = list(row)
        seq = vals[::-1][::per][:width][::-1]  # the newest window of each cell
        pad = width - len(seq)
        t.append("·" * pad, style="dim")
        for v, run in _runs(seq):  # one segment per run keeps rendering cheap
            if v is None:
                t.append("·" * run, style="dim")
            else:
                t.append(keys[v] * run, style=f"bold {colour(classes, v)} reverse")
        t.append("\n")
    span = width * per * hop_s
    left = f"-{span:.0f} s"
    t.append(f"{'':9}{left}{'now':>{width - len(left)}}", style="dim")
    return t


def heat_text(features, rows=6, cols=30, *, color=True) -> Text:
    """The window's log-mel as a small heat map: low bands at the bottom."""
    t = Text()
    if features is None:
        return Text("\n" * (rows - 1) + "(no window yet)", style="dim")
    f = np.asarray(features, dtype=np.float64)
    if f.ndim != 2:
        return Text("(waveform model: no spectrum)", style="dim")
    frames, bands = f.shape
    fb = np.array_split(np.arange(bands), rows)
    ft = np.array_split(np.arange(frames), cols)
    grid = np.array([[f[np.ix_(tt, bb)].mean() for tt in ft] for bb in fb])
    z = np.clip((grid + 2.5) / 5.0, 0.0, 0.999)
    for r in range(rows - 1, -1, -1):
        for k, run in _runs([int(v * len(SHADES)) for v in z[r]]):
            t.append(SHADES[k] * run, style=f"{HEAT[k]} on {HEAT[k]}" if color else "")
        t.append("\n")
    return t


def _runs(seq):
    """(value, count) of consecutive equal values."""
    out = []
    for v in seq:
        if out and out[-1][0] == v:
            out[-1][1] += 1
        else:
            out.append([v, 1])
    return [(v, n) for v, n in out]


def level_text(level_dbfs, clipped, quiet_s, width=22) -> Text:
    t = Text("dBFS ")
    frac = (max(-60.0, min(0.0, level_dbfs)) + 60.0) / 60.0
    style = "red" if level_dbfs > -3 else "yellow" if level_dbfs > -12 else "green"
    t.append_text(bar(frac, width, style=style))
    t.append(f" {level_dbfs:6.1f}")
    if clipped > 0.001:
        t.append("\nCLIPPING", style="bold reverse red")
    elif quiet_s >= 3.0:
        t.append("\nSILENT: input muted?", style="bold reverse yellow")
    return t


def confusion_text(classes, keys, cm) -> Text:
    t = Text("     " + " ".join(f"{keys[c]:>3}" for c in classes) + "   ?\n", style="dim")
    for i, c in enumerate(classes):
        t.append(f"  {keys[c]}  ", style=f"bold {colour(classes, c)}")
        t.append(" ".join(f"{v:>3}" for v in cm[i][:len(classes)]) + f" {cm[i][-1]:>3}\n")
    return t


BIG = {  # a 3x5 block font of our own, for the stage view
    "A": ["███", "█ █", "███", "█ █", "█ █"], "B": ["██ ", "█ █", "██ ", "█ █", "██ "],
    "C": ["███", "█  ", "█  ", "█  ", "███"], "D": ["██ ", "█ █", "█ █", "█ █", "██ "],
    "E": ["███", "█  ", "██ ", "█  ", "███"], "F": ["███", "█  ", "██ ", "█  ", "█  "],
    "G": ["███", "█  ", "█ █", "█ █", "███"], "H": ["█ █", "█ █", "███", "█ █", "█ █"],
    "I": ["███", " █ ", " █ ", " █ ", "███"], "J": ["  █", "  █", "  █", "█ █", "███"],
    "K": ["█ █", "█ █", "██ ", "█ █", "█ █"], "L": ["█  ", "█  ", "█  ", "█  ", "███"],
    "M": ["█ █", "███", "███", "█ █", "█ █"], "N": ["██ ", "█ █", "█ █", "█ █", "█ █"],
    "O": ["███", "█ █", "█ █", "█ █", "███"], "P": ["███", "█ █", "███", "█  ", "█  "],
    "Q": ["███", "█ █", "█ █", "███", "  █"], "R": ["██ ", "█ █", "██ ", "█ █", "█ █"],
    "S": ["███", "█  ", "███", "  █", "███"], "T": ["███", " █ ", " █ ", " █ ", " █ "],
    "U": ["█ █", "█ █", "█ █", "█ █", "███"], "V": ["█ █", "█ █", "█ █", "█ █", " █ "],
    "W": ["█ █", "█ █", "███", "███", "█ █"], "X": ["█ █", "█ █", " █ ", "█ █", "█ █"],
    "Y": ["█ █", "█ █", " █ ", " █ ", " █ "], "Z": ["███", "  █", " █ ", "█  ", "███"],
    " ": ["   "] * 5, "_": ["   ", "   ", "   ", "   ", "███"], "-": ["   ", "   ", "███", "   ", "   "],
    "?": ["███", "  █", " ██", "   ", " █ "],
}
for _d, _rows in zip("0123456789", (
        ["███", "█ █", "█ █", "█ █", "███"], [" █ ", "██ ", " █ ", " █ ", "███"],
        ["███", "  █", "███", "█  ", "███"], ["███", "  █", "███", "  █", "███"],
        ["█ █", "█ █", "███", "  █", "  █"], ["███", "█  ", "███", "  █", "███"],
        ["███", "█  ", "███", "█ █", "███"], ["███", "  █", "  █", "  █", "  █"],
        ["███", "█ █", "███", "█ █", "███"], ["███", "█ █", "███", "  █", "███"])):
    BIG[_d] = _rows


def big_text(word: str, style: str = "") -> Text:
    word = word.upper().replace("_", " ")
    rows = ["", "", "", "", ""]
    for ch in word:
        glyph = BIG.get(ch, BIG["?"])
        for i in range(5):
            rows[i] += glyph[i] + " "
    return Text("\n".join(rows), style=style)
