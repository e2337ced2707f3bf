"""A run folder: the sessions of one unattended run, in order, with its log, status and budget.

Layout::

    RUN/
      run.json        # marks the folder as a run: tool, version, created (written once)
      run.jsonl       # the run's log, one event a line, appended and fsynced: process starts
                      # and stops, sessions started and ended, sessions repaired, gaps in the
                      # input (start, end, cause), wall-clock steps, audio removed for the budget
      status.json     # rewritten atomically every few seconds by the running process
      0001-<stamp>/   # sessions, numbered in the order they started (never ordered by the
      0002-<stamp>/   # wall clock, which may jump on a board without a battery-backed clock)
      .lock           # held (flock) by the process running the folder

This module owns those files: `is_run`, `run_sessions`, `next_session_dir`, the log
(`append_event`, `read_events`), the status file (`write_status`, `read_status`, `health`,
`status_text`) and the disk budget (`parse_keep`, `Keep`, `enforce_budget`): the oldest
audio of closed sessions goes first; window lines, summaries, truth and snippets are never
removed, nor anything of the session being written. A removal is written into that
session's ``summary.json`` (``audio_removed``) before the file goes, so a kill in between
leaves it recorded.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from monitor import __version__
from monitor.base.errors import ScenemonError, SessionError
from monitor.base.files import atomic_write, audio_segments, dumps, is_regular_file, session_is_live
from monitor.session.clock import boot_id, clock_now, iso_utc

RUN_MARK = "run.json"
EVENTS = "run.jsonl"
STATUS = "status.json"
_SESSION_RE = re.compile(r"^(\d{4,})-")
_SIZE_UNITS = {"b": 1, "kb": 10**3, "mb": 10**6, "gb": 10**9, "tb": 10**12,
               "kib": 2**10, "mib": 2**20, "gib": 2**30, "tib": 2**40}
_AGE_UNITS = {"s": 1, "m": 60, "min": 60, "h": 3600, "d": 86400, "w": 7 * 86400}


# --- the folder ----------------------------------------------------------------------------
def is_run(path: Path) -> bool:
    """True for a folder that holds a run (its ``run.json``).

    Parameters
    ----------
    path : Path
        A path.

    Returns
    -------
    bool
        True for a run folder.
    """
    return Path(path).is_dir() and is_regular_file(Path(path) / RUN_MARK)


def make_run(path: Path) -> Path:
    """Create a run folder (or use one that is already a run, or empty).

    Parameters
    ----------
    path : Path
        The run folder.

    Returns
    -------
    Path
        The folder.

    Raises
    ------
    SessionError
        `path` is a file, a session, or a folder that holds other things and is not a run.
    """
    d = Path(path)
    if d.exists() and not d.is_dir():
        raise SessionError(f"{d}: exists and is not a folder; give a run folder")
    if is_run(d):
        return d
    if (d / "session.json").exists():
        raise SessionError(f"{d}: is a session, not a run folder; give a new folder")
    if d.is_dir() and any(p.name != "lost+found" for p in d.iterdir()):
        raise SessionError(f"{d}: holds other files and is not a run folder; give an empty "
                           f"or a new folder")
    try:
        d.mkdir(parents=True, exist_ok=True)
        atomic_write(d / RUN_MARK, dumps({"tool": "scenemon", "kind": "run",
                                          "version": __version__,
                                          "created": iso_utc(time.time())}, indent=2).encode())
    except OSError as exc:
        raise SessionError(f"{d}: cannot create the run folder ({exc.strerror})") from None
    return d


def run_sessions(path: Path) -> list[Path]:
    """The sessions of a run folder in the order they started.

    Parameters
    ----------
    path : Path
        The run folder.

    Returns
    -------
    list of Path
        Session folders (``NNNN-...`` with a session.json), by number.
    """
    found = []
    for p in Path(path).iterdir():
        m = _SESSION_RE.match(p.name)
        if m and p.is_dir() and not p.is_symlink() and (p / "session.json").is_file():
            found.append((int(m.group(1)), p.name, p))
    return [p for _, _, p in sorted(found)]


def next_session_dir(path: Path, name: str = "field") -> Path:
    """The folder of the run's next session: the next number, then the UTC date and time.

    Parameters
    ----------
    path : Path
        The run folder.
    name : str
        A word at the end of the folder's name.

    Returns
    -------
    Path
        A folder that does not exist yet.
    """
    top = 0
    for p in Path(path).iterdir():
        m = _SESSION_RE.match(p.name)
        if m:
            top = max(top, int(m.group(1)))
    stamp = time.strftime("%Y%m%d-%H%M%S", time.gmtime())
    return Path(path) / f"{top + 1:04d}-{stamp}-{name}"


def expand_runs(paths: list[Path]) -> list[Path]:
    """Session folders for commands that take sessions: a run folder stands for its sessions.

    Parameters
    ----------
    paths : list of Path
        Sessions and run folders, as given.

    Returns
    -------
    list of Path
        The same, each run folder replaced by its sessions in order.
    """
    out: list[Path] = []
    for p in paths:
        out += run_sessions(p) if is_run(p) else [Path(p)]
    return out


# --- the log -------------------------------------------------------------------------------
def append_event(path: Path, event: str, **fields: Any) -> dict[str, Any]:
    """Append one event to the run's log (with both clocks), flushed to the disk.

    Parameters
    ----------
    path : Path
        The run folder.
    event : str
        What happened ("session_start", "gap", "clock_step", "audio_removed", ...).
    **fields
        Its figures.

    Returns
    -------
    dict
        The record written.

    Raises
    ------
    OSError
        The log cannot be written (a full disk).
    """
    rec = {"event": event, **clock_now(), **fields}
    fd = os.open(Path(path) / EVENTS, os.O_WRONLY | os.O_APPEND | os.O_CREAT | os.O_NOFOLLOW, 0o644)
    try:
        os.write(fd, (dumps(rec) + "\n").encode())
        os.fsync(fd)
    finally:
        os.close(fd)
    return rec


def read_events(path: Path) -> list[dict[str, Any]]:
    """The run's log; a torn last line (a power cut) is left out.

    Parameters
    ----------
    path : Path
        The run folder.

    Returns
    -------
    list of dict
        The events in order.
    """
    p = Path(path) / EVENTS
    if not is_regular_file(p):
        return []
    out = []
    with open(p, encoding="utf-8", errors="replace") as f:
        for line in f:
            try:
                rec = json.loads(line)
            except ValueError:
                continue
            if isinstance(rec, dict) and isinstance(rec.get("event"), str):
                out.append(rec)
    return out


# --- the status file -----------------------------------------------------------------------
def write_status(path: Path, status: dict[str, Any]) -> None:
    """Replace ``RUN/status.json`` atomically.

    Parameters
    ----------
    path : Path
        The run folder.
    status : dict
        The status (see `health` for what it is judged by).

    Raises
    ------
    OSError
        It cannot be written (a full disk); the previous one stays whole.
    """
    atomic_write(Path(path) / STATUS, dumps(status, indent=2).encode())


def read_status(path: Path) -> dict[str, Any]:
    """``RUN/status.json``.

    Parameters
    ----------
    path : Path
        The run folder.

    Returns
    -------
    dict
        The status.

    Raises
    ------
    SessionError
        Not a run folder, no status yet, or a status file that is not a JSON object.
    """
    d = Path(path)
    if not is_run(d):
        raise SessionError(f"{d}: not a run folder (no run.json)")
    p = d / STATUS
    if not p.exists():
        raise SessionError(f"{p}: no status yet (the run has not started here)")
    try:
        st = json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError, RecursionError):
        raise SessionError(f"{p}: is not a readable status file") from None
    if not isinstance(st, dict):
        raise SessionError(f"{p}: is a JSON {type(st).__name__}, not a status")
    return st


def number(v: Any) -> float | None:
    """A finite JSON number as float, else None (a status file may come from anywhere).

    Parameters
    ----------
    v : object
        A value read from JSON.

    Returns
    -------
    float or None
        The number, or None for anything else (a boolean, text, NaN, beyond float64).
    """
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    try:
        f = float(v)
    except OverflowError:
        return None
    return f if f == f and abs(f) != float("inf") else None


def _obj(v: Any) -> dict[str, Any]:
    return v if isinstance(v, dict) else {}


def health(status: dict[str, Any], *, running: bool, now: dict[str, Any] | None = None,
           stale_after_s: float | None = None) -> list[str]:
    """Why a run is not healthy (empty when it is).

    Healthy: a process holds the run folder, it rewrote the status recently (three status
    periods, judged by the monotonic clock on the same boot, else by the wall clock), it is
    listening, the last window is recent, and audio is being recorded.

    Parameters
    ----------
    status : dict
        ``status.json``.
    running : bool
        A process holds the run folder's lock.
    now : dict, optional
        `clock_now()` (the reader's clocks).
    stale_after_s : float, optional
        The status's age beyond which it is stale (default: three periods, at least 15 s).

    Returns
    -------
    list of str
        One sentence per problem.
    """
    now = now or clock_now()
    problems = []
    if not running:
        problems.append("no scenemon process is running this folder")
    every = min(max(number(status.get("interval_s")) or 5.0, 0.1), 3600.0)
    stale = stale_after_s if stale_after_s is not None else max(15.0, 3 * every)
    mono, wall = number(status.get("written_mono")), number(status.get("written_wall"))
    if isinstance(status.get("boot_id"), str) and status.get("boot_id") == now.get("boot") \
            and mono is not None:
        age = now["mono"] - mono
    else:
        age = now["wall"] - wall if wall is not None else None
    if running and (age is None or age > stale):
        problems.append(f"the status was last written {age:.0f} s ago" if age is not None
                        else "the status has no time")
    state = status.get("state")
    if running and state != "listening":
        problems.append(f"it is not listening: {state}")
    last = _obj(status.get("last_window"))
    lag = number(last.get("age_s"))
    if running and state == "listening" and (lag is None or lag > max(10.0, 2 * every)):
        problems.append("no window for " + (f"{lag:.0f} s" if lag is not None else "this session"))
    audio = _obj(status.get("audio"))
    if running and audio.get("stopped"):
        problems.append(f"audio is not recorded: {audio['stopped']}")
    return problems


def _size(n: float | None) -> str:
    if n is None:
        return "?"
    for unit, k in (("TB", 1e12), ("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= k:
            return f"{n / k:.1f} {unit}"
    return f"{int(n)} B"


def _dur(s: float | None) -> str:
    if s is None:
        return "?"
    s = float(s)
    if s >= 86400:
        return f"{s / 86400:.1f} d"
    if s >= 3600:
        return f"{s / 3600:.1f} h"
    if s >= 60:
        return f"{s / 60:.1f} min"
    return f"{s:.1f} s"


def status_text(status: dict[str, Any], problems: list[str]) -> str:
    """The status for a person: a few lines.

    Parameters
    ----------
    status : dict
        ``status.json``.
    problems : list of str
        `health`'s findings.

    Returns
    -------
    str
        The lines.
    """
    last = _obj(status.get("last_window"))
    gaps = _obj(status.get("gaps"))
    disk = _obj(status.get("disk"))
    budget = _obj(status.get("budget"))
    audio = _obj(status.get("audio"))
    gap_open = _obj(gaps.get("open"))
    lines = [f"run       {status.get('run')}  ({'healthy' if not problems else 'NOT healthy'})",
             f"state     {status.get('state')} since {status.get('state_since', '?')}, "
             f"written {status.get('written_at', '?')}",
             f"session   {status.get('session')} ({status.get('sessions', 0)} in the run)",
             f"last      window ending {last.get('t1', '?')} s into the session, "
             f"{_dur(number(last.get('age_s')))} ago, decision {last.get('decision')}",
             f"hour      {status.get('windows_last_hour', 0)} windows, "
             f"{status.get('decision_changes_last_hour', 0)} decision changes",
             f"losses    {status.get('overruns', 0)} overruns, {gaps.get('count', 0)} gaps "
             f"({_dur(number(gaps.get('seconds')) or 0.0)})"
             + (f", one open since {gap_open.get('since')}: {gap_open.get('cause')}"
                if gap_open else ""),
             f"clock     {status.get('clock_steps', 0)} wall-clock steps",
             f"disk      {_size(number(disk.get('free_bytes')))} free of "
             f"{_size(number(disk.get('total_bytes')))}",
             f"budget    {_size(number(budget.get('used_bytes')))} used"
             + (f" of {_size(number(budget.get('keep_bytes')))}" if budget.get("keep_bytes") else "")
             + (f", audio kept {_dur(number(budget.get('keep_s')))}" if budget.get("keep_s") else "")
             + f"; {budget.get('removed_files', 0)} audio files removed "
               f"({_size(number(budget.get('removed_bytes')) or 0)}, "
               f"{_dur(number(budget.get('removed_s')) or 0.0)})",
             f"audio     {'recording' if audio.get('recording') else 'not recording'}"
             + (f": {audio['stopped']}" if audio.get("stopped") else "")]
    if budget.get("over_budget"):
        lines.append(f"warning   {budget['over_budget']}")
    lines += [f"problem   {p}" for p in problems]
    return "\n".join(lines) + "\n"


# --- the disk budget -----------------------------------------------------------------------
@dataclass(frozen=True)
class Keep:
    """The disk budget of a run.

    Attributes
    ----------
    bytes : int or None
        The run folder's size beyond which the oldest audio goes (None: no size limit).
    seconds : float or None
        Audio older than this goes (None: no age limit).
    """

    bytes: int | None = None
    seconds: float | None = None

    def describe(self) -> dict[str, Any]:
        """status.json's and the log's form: ``keep_bytes``, ``keep_s``."""
        return {"keep_bytes": self.bytes, "keep_s": self.seconds}


def parse_keep(values: list[str] | None, flag: str = "--keep") -> Keep:
    """The budget of ``--keep`` values: sizes (``20GB``, ``500MiB``) and ages (``14d``, ``12h``).

    kB, MB, GB, TB are powers of 1000, KiB, MiB, GiB, TiB powers of 1024 (IEC 80000-13).
    Several values may be given, or one with commas (``20GB,14d``): a size and an age.

    Parameters
    ----------
    values : list of str or None
        The ``--keep`` values.
    flag : str
        The flag the values came from, for the message.

    Returns
    -------
    Keep
        The budget.

    Raises
    ------
    ScenemonError
        A value that is neither a size nor an age, not above zero, or a second size or age.
    """
    size = age = None
    for v in values or []:
        for part in str(v).split(","):
            text = part.strip().lower().replace(" ", "")
            m = re.fullmatch(r"(\d+(?:\.\d+)?)([a-z]+)", text)
            if not m or (m.group(2) not in _SIZE_UNITS and m.group(2) not in _AGE_UNITS):
                raise ScenemonError(f"{flag} {part.strip()!r}: give a size (20GB, 500MiB) or "
                                    f"an age (14d, 12h)")
            n = float(m.group(1))
            if not n > 0:
                raise ScenemonError(f"{flag} {part.strip()!r}: must be above zero")
            if m.group(2) in _SIZE_UNITS:
                if size is not None:
                    raise ScenemonError(f"{flag} {part.strip()!r}: a size is given twice")
                size = int(n * _SIZE_UNITS[m.group(2)])
            else:
                if age is not None:
                    raise ScenemonError(f"{flag} {part.strip()!r}: an age is given twice")
                age = n * _AGE_UNITS[m.group(2)]
    return Keep(size, age)


def folder_bytes(path: Path) -> int:
    """Bytes of every regular file under `path` (links not followed).

    Parameters
    ----------
    path : Path
        A folder.

    Returns
    -------
    int
        The total.
    """
    total = 0
    for root, _, files in os.walk(path):
        for name in files:
            try:
                st = os.lstat(os.path.join(root, name))
            except OSError:
                continue
            if not os.path.islink(os.path.join(root, name)):
                total += st.st_size
    return total


@dataclass(frozen=True)
class Removal:
    """One audio file removed for the budget.

    Attributes
    ----------
    session : str
        The session's folder name.
    file : str
        The file's name.
    bytes : int
        Its size.
    seconds : float
        The audio it held.
    reason : str
        Why, in a few words.
    """

    session: str
    file: str
    bytes: int
    seconds: float
    reason: str


def _audio_seconds(p: Path) -> float:
    from monitor.session.repair import wav_layout

    try:
        lay = wav_layout(p)
    except OSError:
        return 0.0
    return lay[2] / lay[4] if lay and lay[4] else 0.0


def _record_removal(session: Path, r: Removal) -> None:
    """Add the removal to the session's summary.json (before the file goes)."""
    sp = session / "summary.json"
    try:
        summary = json.loads(sp.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        summary = None
    if not isinstance(summary, dict):
        summary = {"recovered": True, "clean": False, "note": "written for the budget"}
    removed = summary.get("audio_removed")
    removed = removed if isinstance(removed, list) else []
    if any(isinstance(x, dict) and x.get("file") == r.file for x in removed):
        return
    removed.append({"file": r.file, "bytes": r.bytes, "seconds": round(r.seconds, 3),
                    "reason": r.reason, "removed_at": iso_utc(time.time())})
    summary["audio_removed"] = removed
    atomic_write(sp, dumps(summary, indent=2).encode())


def enforce_budget(path: Path, keep: Keep, *, current: Path | None = None) -> list[Removal]:
    """Remove the oldest audio of closed sessions until the run is within `keep`.

    Only audio segments go, oldest session first and in recording order within it; never a
    file of `current`, of a session another process writes, or of a session without
    ``summary.json`` (repair it first). Audio older than ``keep.seconds`` (by the file's
    modification time) goes whatever the size.

    Parameters
    ----------
    path : Path
        The run folder.
    keep : Keep
        The budget.
    current : Path, optional
        The session being written.

    Returns
    -------
    list of Removal
        What was removed, in order (each also written into its session's summary.json).

    Raises
    ------
    OSError
        A summary cannot be rewritten (the file is then left in place).
    """
    if keep.bytes is None and keep.seconds is None:
        return []
    cur = Path(current).resolve() if current is not None else None
    candidates = []
    for s in run_sessions(path):
        if cur is not None and s.resolve() == cur:
            continue
        if not (s / "summary.json").exists() or session_is_live(s):
            continue
        candidates += [(s, seg) for seg in audio_segments(s)]
    used = folder_bytes(path) if keep.bytes is not None else 0
    now = time.time()
    out = []
    for s, seg in candidates:
        try:
            st = seg.stat()
        except OSError:
            continue
        reason = None
        if keep.seconds is not None and now - st.st_mtime > keep.seconds:
            reason = f"older than the {_dur(keep.seconds)} kept"
        elif keep.bytes is not None and used > keep.bytes:
            reason = f"the run folder was above its {_size(keep.bytes)} budget"
        if reason is None:
            if keep.seconds is None:
                break  # within the size budget: nothing more goes
            continue
        r = Removal(s.name, seg.name, st.st_size, _audio_seconds(seg), reason)
        _record_removal(s, r)
        seg.unlink()
        used -= st.st_size
        out.append(r)
    return out


def disk_of(path: Path) -> dict[str, int]:
    """Free and total bytes of the file system holding `path`.

    Parameters
    ----------
    path : Path
        A folder on it.

    Returns
    -------
    dict
        ``free_bytes`` (what an unprivileged writer may use) and ``total_bytes``.
    """
    u = shutil.disk_usage(path)
    return {"free_bytes": int(u.free), "total_bytes": int(u.total)}


__all__ = ["Keep", "Removal", "append_event", "boot_id", "clock_now", "disk_of",
           "enforce_budget", "expand_runs", "folder_bytes", "health", "is_run", "make_run",
           "next_session_dir", "parse_keep", "read_events", "read_status", "run_sessions",
           "status_text", "write_status"]
