"""The session directory read back: `load_session(dir) -> Session`.

What a reader can meet: a session killed before its end (no ``summary.json``, perhaps a
torn last line of ``windows.jsonl``), and a session from someone else that is malformed on
purpose. A line that is not JSON (a torn write) is skipped and counted; a line that is JSON
but not a window record (a list, a missing ``t1``, a label that is not text) is bad input:
`SessionError` naming the file and the line.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from monitor.base.errors import SessionError, TruthError
from monitor.base.files import is_regular_file
from monitor.session.truth import TruthTrack, parse_truth

_NUM = (int, float)


@dataclass
class Session:
    """A session read back from disk.

    Attributes
    ----------
    dir : Path
        The session directory.
    meta : dict
        session.json.
    windows : list of dict
        Model A's window records.
    truth : TruthTrack or None
        truth.tsv, when there is one.
    summary : dict or None
        summary.json (None: it did not close cleanly).
    skipped_lines : int
        Torn window lines left out.
    notes : list of str
        What a reader should know (incomplete, still being recorded).
    windows_b : list of dict or None
        Model B's window records in an A/B session.
    """

    dir: Path
    meta: dict[str, Any]
    windows: list[dict[str, Any]]
    truth: TruthTrack | None
    summary: dict[str, Any] | None
    skipped_lines: int = 0
    notes: list[str] = field(default_factory=list)
    windows_b: list[dict[str, Any]] | None = None  # the second model's, in an A/B session

    @property
    def complete(self) -> bool:
        """True when summary.json was read: the session closed cleanly, or was repaired."""
        return self.summary is not None

    @property
    def classes(self) -> list[str]:
        """Model A's classes in output order, from session.json (``classes``, else the card's)."""
        c = self.meta.get("classes")
        if not c:
            card = self.meta.get("card")
            c = card.get("classes") if isinstance(card, dict) else None
        return list(c) if isinstance(c, list) and all(isinstance(x, str) for x in c) else []

    @property
    def hop_s(self) -> float | None:
        """Seconds between windows, from session.json's card (None when missing or not a number)."""
        card = self.meta.get("card")
        audio = card.get("audio") if isinstance(card, dict) else None
        v = audio.get("hop_s") if isinstance(audio, dict) else None
        return float(v) if _finite(v) and v > 0 else None

    @property
    def source(self) -> dict[str, Any]:
        """session.json's ``source`` entry, its ``origin`` ("file" or "mic") always set.

        Sessions written before the key was named ``origin`` carry it as ``kind``; it is
        read from there, so old sessions report the same.
        """
        src = self.meta.get("source")
        if not isinstance(src, dict):
            return {}
        if "origin" not in src and "kind" in src:
            src = {**src, "origin": src["kind"]}
        return src

    @property
    def models(self) -> list[dict[str, Any]]:
        """{path, sha256, kind, runtime, ...} per model, A first."""
        m = self.meta.get("models")
        if isinstance(m, list) and m:  # A and B at most: a session runs one or two models
            return [x for x in m if isinstance(x, dict)][:2]
        one = self.meta.get("model")
        return [one] if isinstance(one, dict) else []

    def classes_of(self, model: int) -> list[str]:
        """The classes of model `model` (0: A, 1: B) in its output order.

        Model B's come from its own entry in session.json (``models[1].classes``): its card
        may name other classes, or the same in another order, than model A's.

        Parameters
        ----------
        model : int
            0 for model A, 1 for model B.

        Returns
        -------
        list of str
            The class names; model A's when the session does not say B's.
        """
        if model:
            entry = self.models[model] if len(self.models) > model else {}
            classes = entry.get("classes")
            if isinstance(classes, list) and classes and all(isinstance(c, str) for c in classes):
                return list(classes)
        return self.classes

    def model_windows(self) -> list[list[dict[str, Any]]]:
        """The window records of each model, A first."""
        return [self.windows] + ([self.windows_b] if self.windows_b is not None else [])


def _show(v: Any) -> str:
    """A value as a message shows it: its repr, cut at 40 characters."""
    try:
        text = repr(v)
    except ValueError:  # an integer too long to print (Python's int limit)
        text = "a number too long to print"
    return text if len(text) <= 40 else text[:37] + "..."


def _finite(v: Any) -> bool:
    """True for a JSON number (not a boolean) that float64 holds as a finite value."""
    if isinstance(v, bool) or not isinstance(v, _NUM):
        return False
    try:
        return math.isfinite(v)
    except OverflowError:  # an integer beyond float64
        return False


def _check_record(rec: Any, where: str, n: int, width: int | None = None) -> str | None:
    """Why `rec` is not a window record (None when it is one); `width`: the values each
    probability list must hold (the classes), when known."""
    if not isinstance(rec, dict):
        return f"is a JSON {type(rec).__name__}, not a window record"
    for key in ("t0", "t1"):
        v = rec.get(key)
        if key not in rec:
            return f"has no {key}"
        if not _finite(v):
            return f"has {key}={_show(v)}, not a finite number"
    if rec["t1"] < rec["t0"]:
        return f"ends (t1={rec['t1']}) before it starts (t0={rec['t0']})"
    for key in ("decision", "truth", "top"):
        v = rec.get(key)
        if v is not None and not isinstance(v, str):
            return f"has {key}={v!r}, not a label or null"
    for key in ("probs", "smoothed"):
        v = rec.get(key)
        if v is None:
            continue
        if not isinstance(v, list) or not all(_finite(p) for p in v):
            return f"has {key}={str(v)[:40]}, not a list of numbers"
        if width is not None and len(v) != width:
            return f"has {len(v)} {key} values for {width} classes"
    for key in ("level_dbfs", "clipped", "gap", "novelty", "ms"):
        v = rec.get(key)
        if v is not None and not _finite(v):
            return f"has {key}={str(v)[:40]!s}, not a finite number or null"
    return None


def read_windows(path: Path, classes: int | None = None) -> tuple[list[dict[str, Any]], int]:
    """The window records of one ``windows*.jsonl`` file, and how many torn lines were skipped.

    Every probability list holds `classes` values when given, else as many as the first
    record's.

    Parameters
    ----------
    path : Path
        A ``windows.jsonl`` or ``windows.b.jsonl`` file (missing: no windows).
    classes : int, optional
        The values every probability list must hold.

    Returns
    -------
    windows : list of dict
        The records in file order.
    skipped : int
        Lines that were not JSON (a torn last line).

    Raises
    ------
    SessionError
        `path` is not a regular file, or a line is JSON but not a window record, is nested
        too deep or holds a number too long (naming the file and the line).
    """
    windows, skipped = [], 0
    if not path.exists():
        return windows, skipped
    if not is_regular_file(path):
        raise SessionError(f"{path}: not a regular file")
    with open(path, encoding="utf-8", errors="replace") as f:
        for n, line in enumerate(f, 1):
            if not line.strip():
                continue
            try:
                rec = json.loads(line)
            except json.JSONDecodeError:
                skipped += 1
                continue
            except (RecursionError, ValueError):  # nested too deep, an integer too long
                raise SessionError(f"{path}: line {n} is nested too deep or holds a number too "
                                   f"long to be a window record") from None
            why = _check_record(rec, str(path), n, classes)
            if why:
                raise SessionError(f"{path}: line {n} {why}")
            if classes is None and isinstance(rec.get("probs"), list):
                classes = len(rec["probs"])
            windows.append(rec)
    return windows, skipped


def _classes_of_b(meta: dict) -> int | None:
    """How many classes model B has (``models[1].classes`` in session.json), if said."""
    models = meta.get("models")
    if isinstance(models, list) and len(models) > 1 and isinstance(models[1], dict):
        classes = models[1].get("classes")
        if isinstance(classes, list) and classes:
            return len(classes)
    return None


def load_session(path: str | Path) -> Session:
    """Read a session directory (see module docstring).

    Parameters
    ----------
    path : str or Path
        The session directory.

    Returns
    -------
    Session
        Its files, read and checked.

    Raises
    ------
    SessionError
        Not a session directory, an unreadable ``session.json`` (or not a JSON object, or
        its ``classes`` not a list of names), or a malformed window line.
    TruthError
        A ``truth.tsv`` that is not UTF-8 text or not valid truth lines.
    """
    d = Path(path)
    if not d.is_dir():
        raise SessionError(f"{d}: not a session directory")
    sj = d / "session.json"
    try:
        meta = json.loads(sj.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SessionError(f"{d}: no session.json, not a session directory") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise SessionError(f"{sj}: not valid JSON ({exc})") from None
    except (RecursionError, ValueError):
        raise SessionError(f"{sj}: is nested too deep or holds a number too long to be a "
                           f"session description") from None
    except OSError as exc:
        raise SessionError(f"{sj}: cannot be read ({exc.strerror})") from None
    if not isinstance(meta, dict):
        raise SessionError(f"{sj}: is a JSON {type(meta).__name__}, not a session description")
    classes = meta.get("classes")
    if classes is not None and not (isinstance(classes, list)
                                    and all(isinstance(c, str) for c in classes)):
        raise SessionError(f"{sj}: classes={str(classes)[:40]} is not a list of names")
    windows, skipped = read_windows(d / "windows.jsonl", len(classes) if classes else None)
    windows_b = None
    if (d / "windows.b.jsonl").exists():
        windows_b, skipped_b = read_windows(d / "windows.b.jsonl", _classes_of_b(meta))
        skipped += skipped_b
    truth = None
    tp = d / "truth.tsv"
    if tp.exists():
        try:
            text = tp.read_text(encoding="utf-8-sig")
        except UnicodeDecodeError:
            raise TruthError(f"{tp}: truth file is not UTF-8 text") from None
        truth = parse_truth(text, where=str(tp))
    summary = None
    sp = d / "summary.json"
    if sp.exists():
        try:
            summary = json.loads(sp.read_text(encoding="utf-8"))
        except (ValueError, RecursionError):  # not JSON, not UTF-8, too deep, too long
            summary = None
        if not isinstance(summary, dict):
            summary = None
    notes = []
    if summary is None:
        from monitor.base.files import session_is_live

        if session_is_live(d):
            notes.append("still being recorded: the figures stop at the last window written")
        else:
            notes.append("incomplete: no summary.json (the session did not close cleanly; "
                         "scenemon repair SESSION makes it whole)")
    if skipped:
        notes.append(f"{skipped} unreadable line(s) in windows.jsonl skipped")
    return Session(d, meta, windows, truth, summary, skipped, notes, windows_b)


def is_session(path: Path) -> bool:
    """True for a folder holding a session.json.

    Parameters
    ----------
    path : Path
        A path.

    Returns
    -------
    bool
        True for a directory with a session.json.
    """
    return Path(path).is_dir() and (Path(path) / "session.json").is_file()
