"""`scenemon harvest`: snippets of many sessions gathered into one retraining set.

``DIR/<label>/<file>.wav`` plus ``DIR/manifest.csv`` (path, label, reason, session, t0,
duration, predicted, predicted_b, confidence, model sha256, audio sha256; ``predicted_b`` is
model B's prediction of a ``models_disagree`` snippet, empty for the others). The sidecar is
the truth about a snippet, and its newest review decision wins: a relabel (the sidecar's
``label``) puts it under that label, a dropped snippet is left out. Harvesting a session
again applies what was decided since: a snippet relabelled after the first harvest is moved
to its new label, one dropped since is taken out of the set. The manifest's ``decision``
column says which decision each row carries ("captured": not reviewed, "kept",
"relabelled").
Duplicates (same audio sha256) appear once. Re-running adds only what is new; a file's
bytes are never rewritten, and nothing is written through a link inside the set. A target folder holding anything else than an earlier
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
    iter_snippets,
    safe_label,
    unreadable_sidecars,
    verified_audio,
)

MARKER = ".scenemon-harvest"
LOCK = ".lock"
FIELDS = ["path", "label", "reason", "session", "t0", "duration", "predicted", "predicted_b",
          "confidence", "model_sha256", "audio_sha256", "decision"]
# a manifest written before predicted_b or decision existed is still ours: its rows get
# the columns empty (decision: until the snippet is harvested again)
_REQUIRED = [f for f in FIELDS if f not in ("predicted_b", "decision")]
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def csv_cell(value) -> str:
    """A manifest cell a spreadsheet will show as text, never run as a formula.

    Parameters
    ----------
    value : object
        The cell's value (None: empty).

    Returns
    -------
    str
        The text, with a leading ``'`` when it starts like a formula.

    References
    ----------
    OWASP, "CSV Injection" (prefix cells starting with ``=``, ``+``, ``-``, ``@``, tab or
    carriage return with a single quote).
    """
    text = "" if value is None else str(value)
    return "'" + text if text.startswith(_FORMULA_START) else text


@dataclass
class HarvestResult:
    """What a harvest did: snippets added and in the set per label, and those left out by cause.

    ``adopted`` counts files an interrupted run had copied that are now entered in the
    manifest; ``notes`` are the sessions' notes and why untrusted audio was skipped.

    Attributes
    ----------
    added, total : dict
        Snippets added by this harvest, and in the set, per label.
    duplicates, dropped, unknown_skipped, excluded, broken : int
        Snippets left out: already in the set, dropped, still "unknown" (with
        ``--drop-unknown``), of a reason not included, with untrusted or broken audio.
    unreadable : int
        Sidecars that cannot be read (links, not regular, not JSON, fields of the wrong type).
    not_sessions : int
        Paths given that are not sessions.
    adopted : int
        Files an interrupted run copied, now in the manifest.
    moved, retired : int
        Snippets relabelled since the last harvest (moved) or dropped since (taken out).
    unreadable_names : list of str
        The unreadable sidecars, relative to their session.
    notes : list of str
        The sessions' notes and why audio was not trusted.
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
    moved: int = 0  # relabelled since the last harvest: moved to their new label
    retired: int = 0  # dropped since the last harvest: taken out of the set
    unreadable_names: list[str] = field(default_factory=list)
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
    """Gather the snippets of `sessions` into the set `out` (see module docstring).

    Parameters
    ----------
    sessions : list of Path
        Session directories (other paths are counted and skipped).
    out : Path
        The set's folder (new, empty, or an earlier harvest).
    include : tuple of str
        The capture reasons to take.
    drop_unknown : bool
        Leave out snippets still labelled "unknown".
    progress : callable, optional
        ``progress(done, total)`` after each snippet.

    Returns
    -------
    HarvestResult
        What was done.

    Raises
    ------
    ScenemonError
        `out` is a file or a folder of other files, its manifest cannot be read or is not a
        harvest's, a file or label folder of the set is a link, or a session cannot be read.
    """
    _check_target(out)
    res = HarvestResult()
    loaded = []
    from monitor.session.runfolder import expand_runs

    for sp in expand_runs(sessions):
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


def decision_of(sn) -> str:
    """The review decision a snippet carries: "captured" (not reviewed yet), "kept" or
    "relabelled" ("dropped" snippets leave the set).

    Parameters
    ----------
    sn : SnippetFile
        The snippet, as its sidecar says now.

    Returns
    -------
    str
        The manifest's ``decision`` cell; "dropped" for a dropped snippet, which never gets
        a row.
    """
    if sn.dropped:
        return "dropped"
    before = sn.meta.get("relabeled_from")
    if before is not None and before != sn.meta.get("label"):
        return "relabelled"
    return "kept" if sn.meta.get("reviewed") is True else "captured"


def _inside(out: Path, rel: str) -> Path:
    """`out / rel` when it is a regular file inside the set reached without a link."""
    target = out / rel
    folder = target.parent
    if folder.parent != out or folder.is_symlink() or target.is_symlink():
        raise ScenemonError(f"{target}: is a link or lies outside {out}; a harvest never "
                            f"writes through links")
    return target


def _label_folder(out: Path, label: str) -> Path:
    folder = out / safe_label(label)
    if folder.is_symlink() or (folder.exists() and not folder.is_dir()):
        raise ScenemonError(f"{folder}: is a link or not a folder; a harvest never writes "
                            f"through links")
    folder.mkdir(exist_ok=True)
    return folder


def _harvest_locked(loaded, out: Path, include, drop_unknown, progress,
                    res: HarvestResult) -> None:
    rows = _read_manifest(out)
    by_sha = {r["audio_sha256"]: r for r in rows}
    listed = {r["path"] for r in rows}
    candidates = [(s, sn) for s in loaded for sn in iter_snippets(s.dir)]
    for s in loaded:
        bad = unreadable_sidecars(s.dir)
        res.unreadable += len(bad)
        res.unreadable_names += [str(p.relative_to(s.dir)) for p in bad]
    new_rows = []
    seen: set[str] = set()
    for k, (s, sn) in enumerate(candidates):
        if progress:
            progress(k + 1, len(candidates))
        m = sn.meta
        label = sn.label
        leave = (sn.dropped or sn.reason not in include
                 or (drop_unknown and label == "unknown"))
        data, why = verified_audio(sn, s.dir)
        if data is None:
            if not leave:
                res.broken += 1
                res.notes.append(why)
            continue
        digest = hashlib.sha256(data).hexdigest()
        old = by_sha.get(digest)
        if old is not None and old.get("session") == csv_cell(m.get("session") or s.dir.name):
            if sn.dropped:  # the newest decision wins: a snippet dropped since leaves the set
                target = _inside(out, old["path"])
                target.unlink(missing_ok=True)
                rows.remove(old)
                del by_sha[digest]
                res.retired += 1
                continue
            decision = decision_of(sn)
            if old.get("label") != csv_cell(label):  # relabelled since: moved to its label
                src = _inside(out, old["path"])
                dst = _label_folder(out, label) / src.name
                if dst.exists() or dst.is_symlink():
                    dst = dst.with_name(f"{dst.stem}-{digest[:8]}.wav")
                if src.is_file():
                    os.replace(src, dst)
                else:  # gone from the set meanwhile: the verified audio is copied again
                    atomic_write(dst, data)
                old["path"] = f"{dst.parent.name}/{dst.name}"
                old["label"] = csv_cell(label)
                res.moved += 1
            old["decision"] = decision
            seen.add(digest)
            continue
        if sn.dropped:
            res.dropped += 1
            continue
        if sn.reason not in include:
            res.excluded += 1
            continue
        if drop_unknown and label == "unknown":
            res.unknown_skipped += 1
            continue
        if digest in by_sha or digest in seen:
            res.duplicates += 1
            continue
        seen.add(digest)
        folder = _label_folder(out, label)
        name = f"{safe_label(str(m.get('session') or s.dir.name))}-{sn.wav.stem}.wav"
        target = folder / name
        if target.is_symlink():
            raise ScenemonError(f"{target}: is a link; a harvest never writes through links")
        if target.exists():
            if _sha(target) == digest and f"{folder.name}/{name}" not in listed:
                res.adopted += 1  # copied by an interrupted run: enter it in the manifest
            else:  # never overwrite: same name, other audio
                name = f"{target.stem}-{digest[:8]}.wav"
                target = folder / name
                atomic_write(target, data)
        else:
            atomic_write(target, data)
        new_rows.append({
            "path": f"{folder.name}/{name}", "label": label, "reason": sn.reason,
            "session": m.get("session") or s.dir.name, "t0": m.get("t0"),
            "duration": m.get("duration_s"), "predicted": m.get("predicted"),
            "predicted_b": sn.predicted_b, "confidence": m.get("confidence"),
            "model_sha256": m.get("model_sha256"), "audio_sha256": digest,
            "decision": decision_of(sn)})
        res.added[label] = res.added.get(label, 0) + 1
    res.total = {}
    for lab in [r["label"] for r in rows] + [csv_cell(r["label"]) for r in new_rows]:
        res.total[lab] = res.total.get(lab, 0) + 1
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

    Parameters
    ----------
    stream : TextIO
        Where the bar goes (standard error by default).

    Returns
    -------
    callable
        ``show(done, total)``.
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
    """`scenemon harvest`: gather, then print what was added.

    Parameters
    ----------
    sessions : list of Path
        Session directories.
    out : Path
        The set's folder.
    include : str or None
        Comma-separated reasons (None: all).
    drop_unknown : bool
        Leave out snippets still labelled "unknown".

    Returns
    -------
    int
        The exit code.

    Raises
    ------
    ScenemonError
        An unknown reason in `include`, or a set folder that is not ours.
    """
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
    if res.moved:
        extra.append(f"{res.moved} relabelled since and moved to their label")
    if res.retired:
        extra.append(f"{res.retired} dropped since and taken out")
    if res.unreadable:
        names = ", ".join(res.unreadable_names[:5]) + (", ..." if res.unreadable > 5 else "")
        extra.append(f"{res.unreadable} unreadable or linked sidecar(s) skipped ({names})")
    sys.stdout.write(terminal_safe(f"harvest {out}: {sum(res.added.values())} new snippet(s); "
                     f"{res.duplicates} duplicate(s), {res.dropped} dropped, "
                     f"{res.unknown_skipped} unknown left out, {res.excluded} of other reasons"
                     + "".join(f"; {x}" for x in extra) + "\n"))
    for label in sorted(res.total):
        sys.stdout.write(terminal_safe(f"  {label:<24} {res.total[label]:>5}  "
                                       f"(+{res.added.get(label, 0)})\n"))
    return ExitCode.OK
