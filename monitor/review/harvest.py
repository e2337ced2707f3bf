"""`scenemon harvest`: snippets of many sessions gathered into one retraining set.

``DIR/<label>/<file>.wav`` plus ``DIR/manifest.csv`` (path, label, reason, session, t0,
duration, predicted, predicted_b, confidence, model sha256, audio sha256; ``predicted_b`` is
model B's prediction of a ``models_disagree`` snippet, empty for the others). The sidecar is
the truth about a snippet: a relabel (the sidecar's ``label``) wins, a dropped snippet is
left out.
Duplicates (same audio sha256) appear once. Re-running adds only what is new; existing files
are never rewritten or deleted. A target folder holding anything else than an earlier
harvest is refused; paths given that are not sessions are skipped and counted.

Snippet audio is copied only after `snippets.verified_audio` accepts it (a regular WAV inside
its session, not a link, matching its sidecar): a session from someone else cannot smuggle a
local file into the set. Manifest cells that a spreadsheet would run as a formula (starting
with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return) get a leading ``'``, as the OWASP
CSV-injection guidance says.

Two harvests into one set take turns (an exclusive lock on ``DIR/.lock``); the manifest is
written atomically; a harvest killed half-way leaves a set the next run completes (files
already copied are recognised by their sha256 and entered in the manifest).
"""

from __future__ import annotations

import csv
import fcntl
import hashlib
import io
import os
import sys
from dataclasses import dataclass, field
from pathlib import Path

from monitor.base.errors import ExitCode, ScenemonError
from monitor.base.files import atomic_write, read_regular_bytes, terminal_safe
from monitor.session.reader import is_session, load_session
from monitor.session.snippets import (
    REASONS,
    count_unreadable,
    iter_snippets,
    safe_label,
    verified_audio,
)

MARKER = ".scenemon-harvest"
LOCK = ".lock"
FIELDS = ["path", "label", "reason", "session", "t0", "duration", "predicted", "predicted_b",
          "confidence", "model_sha256", "audio_sha256"]
# a manifest written before predicted_b existed is still ours: its rows get the column empty
_REQUIRED = [f for f in FIELDS if f != "predicted_b"]
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def csv_cell(value) -> str:
    """A manifest cell a spreadsheet will show as text, never run as a formula."""
    text = "" if value is None else str(value)
    return "'" + text if text.startswith(_FORMULA_START) else text


@dataclass
class HarvestResult:
    """What a harvest did: snippets added and in the set per label, and those left out by cause.

    ``adopted`` counts files an interrupted run had copied that are now entered in the
    manifest; ``notes`` are the sessions' notes and why untrusted audio was skipped.
    """

    added: dict[str, int] = field(default_factory=dict)
    total: dict[str, int] = field(default_factory=dict)
    duplicates: int = 0
    dropped: int = 0
    unknown_skipped: int = 0
    excluded: int = 0
    broken: int = 0
    unreadable: int = 0  # sidecars that are links, not regular files, too large or not JSON
    not_sessions: int = 0
    adopted: int = 0
    notes: list[str] = field(default_factory=list)


def _read_manifest(out: Path) -> list[dict]:
    p = out / "manifest.csv"
    if not p.exists():
        return []
    try:
        text = read_regular_bytes(p).decode("utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise ScenemonError(f"{p}: cannot be read as the set's manifest ({exc})") from None
    rows = list(csv.DictReader(io.StringIO(text)))
    if rows and not set(_REQUIRED) <= set(rows[0]):
        raise ScenemonError(f"{p}: not a manifest written by scenemon harvest")
    return rows


def _check_target(out: Path, *, locked: bool = False) -> None:
    """Refuse a target that is a file, or a folder of other files.

    Before the lock a folder with our lock file passes (another harvest may be writing its
    marker); under the lock only our marker makes a non-empty folder ours."""
    if out.exists() and not out.is_dir():
        raise ScenemonError(f"{out}: exists and is not a directory")
    if not out.is_dir() or (out / MARKER).is_file():
        return
    others = [p for p in out.iterdir() if not (locked and p.name == LOCK)]
    if others and (locked or not (out / LOCK).exists()):
        raise ScenemonError(f"{out}: holds other files and is not an earlier harvest; "
                            f"choose an empty or new folder")


def harvest(sessions: list[Path], out: Path, *, include: tuple[str, ...],
            drop_unknown: bool = False, progress=None) -> HarvestResult:
    """Gather the snippets of `sessions` into the set `out` (see module docstring)."""
    _check_target(out)
    res = HarvestResult()
    loaded = []
    for sp in sessions:
        if not is_session(sp):
            res.not_sessions += 1
            continue
        s = load_session(sp)
        res.notes += [f"{sp}: {n}" for n in s.notes]
        loaded.append(s)
    out.mkdir(parents=True, exist_ok=True)
    lock_fd = os.open(out / LOCK, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW, 0o644)
    try:
        fcntl.flock(lock_fd, fcntl.LOCK_EX)  # the other harvest finishes first
        _check_target(out, locked=True)
        if not (out / MARKER).exists():
            atomic_write(out / MARKER, b"scenemon harvest\n")  # first: a killed run is still ours
        _harvest_locked(loaded, out, include, drop_unknown, progress, res)
    finally:
        os.close(lock_fd)
    return res


def _harvest_locked(loaded, out: Path, include, drop_unknown, progress,
                    res: HarvestResult) -> None:
    rows = _read_manifest(out)
    listed = {r["path"] for r in rows}
    seen = {r["audio_sha256"] for r in rows}
    for r in rows:
        res.total[r["label"]] = res.total.get(r["label"], 0) + 1
    candidates = [(s, sn) for s in loaded for sn in iter_snippets(s.dir)]
    res.unreadable = sum(count_unreadable(s.dir) for s in loaded)
    new_rows = []
    for k, (s, sn) in enumerate(candidates):
        if progress:
            progress(k + 1, len(candidates))
        m = sn.meta
        if sn.dropped:
            res.dropped += 1
            continue
        if sn.reason not in include:
            res.excluded += 1
            continue
        label = sn.label
        if drop_unknown and label == "unknown":
            res.unknown_skipped += 1
            continue
        data, why = verified_audio(sn, s.dir)
        if data is None:
            res.broken += 1
            res.notes.append(why)
            continue
        digest = hashlib.sha256(data).hexdigest()
        if digest in seen:
            res.duplicates += 1
            continue
        seen.add(digest)
        folder = safe_label(label)
        name = f"{safe_label(str(m.get('session') or s.dir.name))}-{sn.wav.stem}.wav"
        target = out / folder / name
        (out / folder).mkdir(exist_ok=True)
        if target.exists() or target.is_symlink():
            if _sha(target) == digest and f"{folder}/{name}" not in listed:
                res.adopted += 1  # copied by an interrupted run: enter it in the manifest
            else:  # never overwrite: same name, other audio
                name = f"{target.stem}-{digest[:8]}.wav"
                target = out / folder / name
                atomic_write(target, data)
        else:
            atomic_write(target, data)
        new_rows.append({
            "path": f"{folder}/{name}", "label": label, "reason": sn.reason,
            "session": m.get("session") or s.dir.name, "t0": m.get("t0"),
            "duration": m.get("duration_s"), "predicted": m.get("predicted"),
            "predicted_b": sn.predicted_b, "confidence": m.get("confidence"),
            "model_sha256": m.get("model_sha256"), "audio_sha256": digest})
        res.added[label] = res.added.get(label, 0) + 1
        res.total[label] = res.total.get(label, 0) + 1
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=FIELDS, lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({k: r.get(k) for k in FIELDS})  # as read: already neutralised
    for r in new_rows:
        w.writerow({k: csv_cell(r.get(k)) for k in FIELDS})
    atomic_write(out / "manifest.csv", buf.getvalue().encode("utf-8"))


def _sha(path: Path) -> str | None:
    try:
        return hashlib.sha256(read_regular_bytes(path)).hexdigest()
    except OSError:
        return None


def progress_bar(stream=sys.stderr):
    """A ``progress(done, total)`` callback that draws a bar on `stream`.

    It draws only on a terminal and for 20 snippets or more, so a small harvest and a pipe
    stay quiet.
    """
    width = 30

    def show(done: int, total: int) -> None:
        if total < 20 or not stream.isatty():
            return
        n = int(width * done / total)
        stream.write(f"\r  [{'#' * n}{'.' * (width - n)}] {done}/{total} snippets")
        if done == total:
            stream.write("\n")
        stream.flush()
    return show


def run_harvest(sessions: list[Path], out: Path, *, include: str | None,
                drop_unknown: bool = False) -> int:
    """`scenemon harvest`: gather, then print what was added."""
    reasons = tuple(x.strip() for x in (include or ",".join(REASONS)).split(",") if x.strip())
    bad = [x for x in reasons if x not in REASONS]
    if bad:
        raise ScenemonError(f"--include: unknown reason {bad[0]!r} (use {', '.join(REASONS)})")
    res = harvest(sessions, out, include=reasons, drop_unknown=drop_unknown,
                  progress=progress_bar())
    for n in res.notes:
        sys.stderr.write(terminal_safe(f"scenemon: note: {n}\n"))
    extra = []
    if res.not_sessions:
        extra.append(f"{res.not_sessions} path(s) that are not sessions skipped")
    if res.broken:
        extra.append(f"{res.broken} snippet(s) with untrusted or broken audio skipped")
    if res.unreadable:
        extra.append(f"{res.unreadable} unreadable or linked sidecar(s) skipped")
    sys.stdout.write(f"harvest {out}: {sum(res.added.values())} new snippet(s); "
                     f"{res.duplicates} duplicate(s), {res.dropped} dropped, "
                     f"{res.unknown_skipped} unknown left out, {res.excluded} of other reasons"
                     + "".join(f"; {x}" for x in extra) + "\n")
    for label in sorted(res.total):
        sys.stdout.write(terminal_safe(f"  {label:<24} {res.total[label]:>5}  "
                                       f"(+{res.added.get(label, 0)})\n"))
    return ExitCode.OK
