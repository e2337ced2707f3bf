"""`scenemon tune`: replay stored raw probabilities through a grid of decision settings.

No model is needed: each session's `windows.jsonl` holds the raw probabilities, so a grid
of a few hundred settings runs in seconds. Each setting is scored on all sessions together:
window accuracy (undecided is wrong), switch rate (decision changes per minute) and median
decision latency after a truth change. A setting is on the trade-off front when no other
setting is at least as good on all three and better on one. The recommendation rule: on
the front, the highest accuracy; among settings within 0.5 percentage points of it, the
lowest switch rate, then the lowest latency.
"""

from __future__ import annotations

import itertools
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from monitor.base.errors import ExitCode, ScenemonError
from monitor.base.files import terminal_safe
from monitor.decisions.decide import decide_sequence
from monitor.decisions.tally import tally_windows
from monitor.features.card import DecisionSettings
from monitor.session.reader import Session, load_session

DEFAULT_GRID = {
    "smoothing": ["none", "mean", "ema", "median"],
    "smoothing_windows": [3, 5],
    "ema_alpha": [0.3, 0.6],
    "enter": [0.5, 0.6, 0.7],
    "margin": [0.0, 0.1, 0.2],
    "confirm": [1, 2, 3],
    "min_hold_s": [0.0, 2.0],
}
_TYPES = {"smoothing": str, "smoothing_windows": int, "ema_alpha": float, "enter": float,
          "exit": float, "margin": float, "confirm": int, "min_hold_s": float}
RECOMMEND_SLACK = 0.005


def parse_grid(text: str | None) -> dict[str, list]:
    """``"smoothing=mean,ema;enter=0.5,0.6"`` -> grid; unnamed fields keep the default grid.

    Parameters
    ----------
    text : str or None
        The ``--grid`` value.

    Returns
    -------
    dict
        Field name to the values to try.

    Raises
    ------
    ScenemonError
        A part that is not NAME=V1,V2 with a known name, or a value of the wrong type.
    """
    grid = {k: list(v) for k, v in DEFAULT_GRID.items()}
    if not text:
        return grid
    for part in filter(None, (p.strip() for p in re.split(r"[;\s]+", text))):
        key, sep, values = part.partition("=")
        key = key.strip().replace("-", "_")
        if not sep or key not in _TYPES:
            raise ScenemonError(f"--grid: {part!r} must be NAME=V1,V2 with NAME one of "
                                f"{', '.join(_TYPES)}")
        try:
            grid[key] = [_TYPES[key](v) for v in values.split(",") if v.strip()]
        except ValueError:
            raise ScenemonError(f"--grid: {part!r} has a value that is not a "
                                f"{_TYPES[key].__name__}") from None
    return grid


def expand(grid: dict[str, list]) -> list[DecisionSettings]:
    """Every combination, without repeats that differ only in unused fields.

    Parameters
    ----------
    grid : dict
        Field name to values.

    Returns
    -------
    list of DecisionSettings
        The combinations.

    Raises
    ------
    ScenemonError
        A combination the decision settings refuse.
    """
    seen, out = set(), []
    keys = list(grid)
    for combo in itertools.product(*(grid[k] for k in keys)):
        kw = dict(zip(keys, combo))
        m = kw.get("smoothing", "mean")
        if m not in ("mean", "median"):
            kw["smoothing_windows"] = 1 if m == "none" else DecisionSettings().smoothing_windows
        if m != "ema":
            kw["ema_alpha"] = DecisionSettings().ema_alpha
        if m == "none":
            kw["smoothing_windows"] = DecisionSettings().smoothing_windows
        try:
            s = DecisionSettings(**kw)
        except ValueError as exc:
            raise ScenemonError(f"--grid: {exc}") from None
        if s not in seen:
            seen.add(s)
            out.append(s)
    return out


@dataclass
class Row:
    """One decision setting's figures over all sessions, and whether it is on the front.

    Attributes
    ----------
    settings : DecisionSettings
        The setting.
    accuracy : float
        Windows decided right over windows with truth.
    switches_per_min : float
        Decision changes per minute.
    latency_median : float or None
        Median seconds to reach a truth change.
    never_reached : int
        Truth changes never reached.
    front : bool
        No other row beats it.
    """

    settings: DecisionSettings
    accuracy: float
    switches_per_min: float
    latency_median: float | None
    never_reached: int
    front: bool = False

    def label(self) -> str:
        """The setting in one line: smoothing (its N or alpha), enter, margin, confirm, hold."""
        s = self.settings
        m = s.smoothing
        if m in ("mean", "median"):
            m += f"/{s.smoothing_windows}"
        elif m == "ema":
            m += f"/{s.ema_alpha:g}"
        return (f"{m:<10} enter {s.enter:<4g} margin {s.margin:<4g} confirm {s.confirm} "
                f"hold {s.min_hold_s:g}")


def evaluate(sessions: list[Session], settings: DecisionSettings, model: int = 0) -> Row:
    """One setting's figures over all sessions (each session's decider state its own).

    Parameters
    ----------
    sessions : list of Session
        Sessions with truth.
    settings : DecisionSettings
        The setting to try.
    model : int
        0 for model A, 1 for model B.

    Returns
    -------
    Row
        Its figures.
    """
    correct = scored = changes = never = 0
    minutes = 0.0
    lat: list[float] = []
    for s in sessions:
        w = [x for x in s.model_windows()[model] if x.get("probs") is not None]
        if not w:
            continue
        probs = np.array([x["probs"] for x in w], dtype=np.float64)
        t1 = np.array([x["t1"] for x in w])
        _, dec = decide_sequence(probs, t1, settings)
        classes = s.classes_of(model)
        labels = [None if d is None else classes[d] for d in dec]
        t = tally_windows(w, classes, hop_s=s.hop_s,
                          spans=s.truth.spans if s.truth else None, decisions=labels)
        correct += t.correct
        scored += t.with_truth
        changes += t.changes
        minutes += t.duration_s / 60.0
        lat += t.latencies
        never += t.never_reached
    return Row(settings, correct / scored if scored else 0.0,
               changes / minutes if minutes else 0.0,
               float(np.median(lat)) if lat else None, never)


def _key(r: Row) -> tuple[float, float, float]:
    lat = r.latency_median if r.latency_median is not None else float("inf")
    return (-r.accuracy, r.switches_per_min, lat + 1000.0 * r.never_reached)


def mark_front(rows: list[Row]) -> None:
    """Set each row's ``front``: True when no other row beats it (see module docstring).

    A row is beaten by one at least as good on all three figures and better on one. The
    figures are accuracy, switch rate, and the median latency with 1000 s added for each
    truth change never reached, so a setting that misses changes does not look fast.

    Parameters
    ----------
    rows : list of Row
        Every setting's figures (changed in place).
    """
    keys = [_key(r) for r in rows]
    for i, r in enumerate(rows):
        a = keys[i]
        r.front = not any(all(b[k] <= a[k] for k in range(3)) and b != a for b in keys)


def recommend(rows: list[Row]) -> Row:
    """The recommended row (the rule of the module docstring).

    On the front, the highest accuracy; among rows within `RECOMMEND_SLACK` of it, the fewest
    switches per minute, then the lowest latency. Without a marked front every row competes.

    Parameters
    ----------
    rows : list of Row
        Every setting's figures, the front marked.

    Returns
    -------
    Row
        The recommended one.
    """
    front = [r for r in rows if r.front] or rows
    best = max(r.accuracy for r in front)
    near = [r for r in front if r.accuracy >= best - RECOMMEND_SLACK]
    return min(near, key=lambda r: (r.switches_per_min, _key(r)[2]))


def sweep(sessions: list[Session], grid: dict[str, list], model: int = 0) -> list[Row]:
    """Every setting of `grid` evaluated on `sessions`, the front marked, best first.

    Parameters
    ----------
    sessions : list of Session
        Sessions with truth (at least one).
    grid : dict
        Values per `DecisionSettings` field (`parse_grid`).
    model : int
        0 for model A, 1 for model B of A/B sessions.

    Returns
    -------
    list of Row
        Sorted by accuracy (highest first), then switch rate, then latency (as `mark_front`).

    Raises
    ------
    ScenemonError
        No window of any session has a truth label, or `grid` holds a combination the
        decision settings refuse (`expand`).
    """
    if not any(x.get("truth") is not None for s in sessions for x in s.windows):
        raise ScenemonError(f"{sessions[0].dir}: no window has a truth label; tune needs "
                            f"sessions with truth")
    rows = [evaluate(sessions, st, model) for st in expand(grid)]
    mark_front(rows)
    rows.sort(key=_key)
    return rows


def table(rows: list[Row], chosen: Row, limit: int = 25) -> str:
    """The front as a table for the terminal, at most `limit` rows, `chosen` marked ``>``.

    A last line counts the settings and states the rule that chose the recommendation.

    Parameters
    ----------
    rows : list of Row
        Every setting's figures.
    chosen : Row
        The recommended one.
    limit : int
        Rows shown at most.

    Returns
    -------
    str
        The table.
    """
    out = [f"  {'':1} {'setting':<52} {'accuracy':>8} {'switch/min':>10} {'latency':>8}"]
    shown = [r for r in rows if r.front][:limit]
    for r in shown:
        mark = ">" if r is chosen else "*"
        lat = "-" if r.latency_median is None else f"{r.latency_median:.2f} s"
        out.append(f"  {mark} {r.label():<52} {r.accuracy:>8.1%} {r.switches_per_min:>10.2f} "
                   f"{lat:>8}")
    out.append(f"  {len(rows)} settings tried, {sum(r.front for r in rows)} on the trade-off "
               f"front (*); > recommended: highest accuracy on the front, then fewest switches "
               f"within {RECOMMEND_SLACK:.1%} of it, then lowest latency")
    return "\n".join(out) + "\n"


def apply_to_card(card_path: Path, settings: DecisionSettings) -> None:
    """Write `settings` into the card's [decision] table; everything else stays as it was.

    The card is edited with tomlkit, a style-preserving TOML library: the tuned keys get
    their new values, and every other byte (comments, order, spacing, quoted and dotted
    keys, inline tables, a header written ``[ decision ]``, CRLF line endings) is kept.

    Parameters
    ----------
    card_path : Path
        The model card to edit in place (atomically).
    settings : DecisionSettings
        The decision settings to write.

    Raises
    ------
    CardError
        The card is not valid before the edit, or [decision] is not a table.
    """
    import tomlkit
    from tomlkit.exceptions import TOMLKitError

    from monitor.base.errors import CardError
    from monitor.base.files import atomic_write
    from monitor.features.card import load_card

    load_card(card_path)  # refuse to edit a card that is not valid to begin with
    raw = card_path.read_bytes().decode("utf-8")
    try:
        doc = tomlkit.parse(raw)
    except TOMLKitError as exc:
        raise CardError(f"{card_path}: cannot be edited as TOML ({exc})") from None
    values = settings.to_dict()
    table = doc.get("decision")
    if table is None:
        table = tomlkit.table()
        for k, v in values.items():
            table[k] = v
        doc["decision"] = table
    elif not isinstance(table, dict):
        raise CardError(f"{card_path}: decision is not a table")
    else:
        for k, v in values.items():
            if k in table and table[k] == v and type(table[k].unwrap()) is type(v):
                continue  # unchanged: its spelling stays too
            table[k] = v
    text = tomlkit.dumps(doc)
    if "\r\n" in raw:  # what tomlkit adds follows the card's own line endings
        text = text.replace("\r\n", "\n").replace("\n", "\r\n")
    atomic_write(card_path, text.encode("utf-8"))
    load_card(card_path)


def run_tune(paths: list[Path], *, grid: str | None = None, apply: Path | None = None,
             show_all: bool = False, model: int = 0, stream=None) -> int:
    """`scenemon tune`: sweep, print the front and the recommendation, optionally apply it.

    Parameters
    ----------
    paths : list of Path
        Session directories with truth, or run folders (their sessions).
    grid : str, optional
        The ``--grid`` value.
    apply : Path, optional
        A card whose [decision] table gets the recommendation.
    show_all : bool
        List every setting, not only the front.
    model : int
        0 for model A, 1 for model B of A/B sessions.
    stream : TextIO, optional
        Where the table goes (stdout).

    Returns
    -------
    int
        The exit code.

    Raises
    ------
    ScenemonError
        A session without windows, not an A/B session for `model` 1, or sessions whose
        classes differ.
    """
    import sys
    import time

    stream = stream or sys.stdout
    from monitor.session.runfolder import expand_runs, is_run

    runs = [p for p in paths if is_run(p)]
    sessions = [load_session(p) for p in expand_runs(paths)]
    if runs:  # a run's sessions without windows (a device that never opened) are left out
        sessions = [s for s in sessions if s.windows or s.dir.parent not in runs]
    if not sessions:
        raise ScenemonError(f"{paths[0]}: holds no sessions with windows")
    for s in sessions:
        if not s.windows:
            raise ScenemonError(f"{s.dir}: the session holds no windows")
        if model and s.windows_b is None:
            raise ScenemonError(f"{s.dir}: not an A/B session (no windows.b.jsonl)")
        for n in s.notes:
            sys.stderr.write(terminal_safe(f"scenemon: warning: {s.dir}: {n}\n"))
    if len({tuple(s.classes_of(model)) for s in sessions}) > 1:
        raise ScenemonError(f"{sessions[1].dir}: its classes differ from {sessions[0].dir}'s")
    t = time.perf_counter()
    rows = sweep(sessions, parse_grid(grid), model)
    best = recommend(rows)
    if show_all:
        for r in rows:
            r.front = True
    stream.write(table(rows, best, limit=len(rows) if show_all else 25))
    stream.write(f"recommended: {best.label()}  ({best.accuracy:.1%} accuracy, "
                 f"{best.switches_per_min:.2f} switches/min)\n")
    stream.write(f"swept {len(rows)} settings over {len(sessions)} session(s) in "
                 f"{time.perf_counter() - t:.1f} s\n")
    if apply is not None:
        apply_to_card(apply, best.settings)
        stream.write(f"wrote the [decision] table of {apply}\n")
    return ExitCode.OK
