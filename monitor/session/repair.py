"""`scenemon repair SESSION`: make a session that did not close cleanly whole again.

A killed or powered-off session keeps what it wrote, but may end in a torn last line of
`windows.jsonl`, an audio header up to a second behind its data, no `truth.tsv` (live truth
is written at the stop) and no `summary.json`. Repair drops the torn line, rewrites each
WAV so that its header covers every whole frame on disk (the header's own frame count is
stale after a kill, and readers trust it), rebuilds `truth.tsv` from the windows' truth when
it is missing, and writes `summary.json` marked ``"recovered": true``. A complete session is
left alone; a session another process is still writing is refused.
"""

from __future__ import annotations

import json
import os
import struct
import sys
from pathlib import Path

import numpy as np

from monitor.base.errors import ExitCode, ScenemonError, SessionError
from monitor.base.files import atomic_write, audio_segments, dumps, session_is_live
from monitor.decisions.tally import tally_windows
from monitor.session.reader import Session, load_session
from monitor.session.snippets import iter_snippets, verify_all
from monitor.session.truth import Span, format_truth, load_truth


def drop_torn_line(path: Path) -> int:
    """Cut a last line that has no newline; return the bytes removed.

    Parameters
    ----------
    path : Path
        A window-lines file.

    Returns
    -------
    int
        Bytes removed (0 when the file ends with a newline).
    """
    size = path.stat().st_size
    if size == 0:
        return 0
    with open(path, "rb+") as f:
        f.seek(-1, os.SEEK_END)
        if f.read(1) == b"\n":
            return 0
        keep, pos = 0, size
        while pos > 0:
            start = max(0, pos - 4096)
            f.seek(start)
            chunk = f.read(pos - start)
            k = chunk.rfind(b"\n")
            if k >= 0:
                keep = start + k + 1
                break
            pos = start
        f.truncate(keep)
        f.flush()
        os.fsync(f.fileno())
    return size - keep


def wav_layout(path: Path) -> tuple[int, int, int, int, int] | None:
    """(data offset, header frames, frames on disk, channels, sample rate) of a PCM_16 WAV
    written by the session writer, read from its chunks; None when it is not one.

    Parameters
    ----------
    path : Path
        A WAV file.

    Returns
    -------
    tuple of int or None
        The five figures, or None.
    """
    size = path.stat().st_size
    with open(path, "rb") as f:
        head = f.read(12)
        if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
            return None
        channels = rate = width = None
        while True:
            ch = f.read(8)
            if len(ch) < 8:
                return None
            cid, clen = ch[:4], struct.unpack("<I", ch[4:])[0]
            if cid == b"fmt ":
                fmt = f.read(clen)
                if len(fmt) < 16:
                    return None
                _, channels, rate, _, _, bits = struct.unpack("<HHIIHH", fmt[:16])
                width = bits // 8
                if clen % 2:
                    f.read(1)
            elif cid == b"data":
                if not channels or width != 2:
                    return None
                start = f.tell()
                block = channels * width
                return start, clen // block, (size - start) // block, channels, rate
            else:
                f.seek(clen + (clen % 2), os.SEEK_CUR)


def fix_wav(path: Path) -> int | None:
    """Rewrite a WAV whose header lags its data; return its frames (None if unreadable).

    Parameters
    ----------
    path : Path
        An audio segment of the session.

    Returns
    -------
    int or None
        Frames on disk, or None when the file is not a WAV the writer wrote.
    """
    import soundfile as sf

    layout = wav_layout(path)
    if layout is None:
        return None
    start, header_frames, disk_frames, channels, rate = layout
    if header_frames == disk_frames:
        return disk_frames
    with open(path, "rb") as f:
        f.seek(start)
        data = np.frombuffer(f.read(disk_frames * channels * 2), dtype="<i2")
    tmp = path.with_name(f".{path.name}.repair")
    sf.write(str(tmp), data.reshape(-1, channels) if channels > 1 else data, rate,
             subtype="PCM_16", format="WAV")
    with open(tmp, "rb") as f:
        os.fsync(f.fileno())
    os.replace(tmp, path)
    return disk_frames


def given_truth(s: Session, end_s: float) -> list[Span] | None:
    """The spans of the truth file a session was given (session.json's ``truth_file``), as
    a clean close writes them: the spans that start before the session's end.

    Parameters
    ----------
    s : Session
        The session being repaired.
    end_s : float
        Seconds of audio the session holds.

    Returns
    -------
    list of Span or None
        None when the session was given no truth file, or it can no longer be read (moved,
        changed into something that is not truth): the windows' own truth is used then.
    """
    name = s.meta.get("truth_file")
    if not isinstance(name, str) or not name:
        return None
    try:
        track = load_truth(name, classes=tuple(s.classes) or None)
    except (ScenemonError, OSError, ValueError):
        return None
    return [x for x in track.spans if x.onset < end_s + 1e-9]


def truth_from_windows(windows: list[dict]) -> list[Span]:
    """Truth spans rebuilt from the windows' own truth labels, for a session without truth.tsv.

    A window extends the last span when it has that span's label and starts no later than the
    span ends (windows without truth in between do not break it); otherwise it opens a span
    that starts where the last one ends, so that overlapping windows give no overlapping spans.

    Parameters
    ----------
    windows : list of dict
        ``windows.jsonl`` records in stream order (``t0``, ``t1`` and ``truth`` are read).

    Returns
    -------
    list of Span
        In time order and non-overlapping, as `format_truth` writes them.
    """
    spans: list[Span] = []
    for w in windows:
        t = w.get("truth")
        if t is None:
            continue
        if spans and spans[-1].label == t and w["t0"] <= spans[-1].offset + 1e-9:
            spans[-1] = Span(spans[-1].onset, max(spans[-1].offset, w["t1"]), t)
        else:
            start = max(w["t0"], spans[-1].offset) if spans else w["t0"]
            spans.append(Span(start, w["t1"], t))
    return spans


def repair(path: str | Path) -> dict:
    """Make the session at `path` whole (see module docstring); what was done.

    Parameters
    ----------
    path : str or Path
        The session directory.

    Returns
    -------
    dict
        ``session``, ``repaired`` and ``actions`` (what was done, one sentence each), or a
        ``note`` when there was nothing to repair.

    Raises
    ------
    SessionError
        Not a session, or a session another process is still writing.
    TruthError
        Its ``truth.tsv`` is not UTF-8 text or not valid truth lines (`load_session`).
    """
    d = Path(path)
    if session_is_live(d):
        raise SessionError(f"{d}: is still being recorded by another process; repair it once "
                           f"that session has ended")
    s = load_session(d)
    if s.complete:
        return {"session": str(d), "repaired": False, "note": "complete: nothing to repair"}
    actions = []
    for name in ("windows.jsonl", "windows.b.jsonl"):
        jl = d / name
        if jl.exists():
            cut = drop_torn_line(jl)
            if cut:
                actions.append(f"dropped a torn last line of {name} ({cut} bytes)")
    frames = None
    for wav in audio_segments(d):
        before = wav.stat().st_mtime_ns
        n = fix_wav(wav)
        if n is None:
            actions.append(f"{wav.name} is unreadable and was left as it is")
            continue
        frames = (frames or 0) + n
        if wav.stat().st_mtime_ns != before:
            actions.append(f"rewrote the {wav.name} header ({n} frames)")
    s = load_session(d)
    if not (d / "truth.tsv").exists():
        rate = s.meta.get("sample_rate")
        end = frames / rate if frames and isinstance(rate, int) and rate > 0 else (
            s.windows[-1]["t1"] if s.windows else 0.0)
        spans = given_truth(s, end)
        if spans is not None:
            where = f"the truth file the session was given ({s.meta.get('truth_file')})"
        else:
            spans = truth_from_windows(s.windows)
            where = "the windows"
        if spans:
            atomic_write(d / "truth.tsv", format_truth(spans).encode())
            actions.append(f"rebuilt truth.tsv from {where} ({len(spans)} spans)")
    t = tally_windows(s.windows, s.classes, hop_s=s.hop_s) if s.windows else None
    summary = {
        "recovered": True, "clean": False, "windows": len(s.windows),
        "duration_s": s.windows[-1]["t1"] if s.windows else 0.0,
        "corrupt_lines_skipped": s.skipped_lines,
        "gap_samples": t.gap_samples if t else 0,
        "decision_changes": t.changes if t else 0,
        "switches_per_min": t.switches_per_min if t else None,
        "windows_with_truth": t.with_truth if t else 0,
        "accuracy": t.accuracy if t else None,
        "audio_frames": frames, "snippets_written": len(iter_snippets(d)),
        "overruns": None, "dropped_samples": None, "repair": actions,
    }
    atomic_write(d / "summary.json", dumps(summary, indent=2).encode())
    actions.append("wrote summary.json (recovered)")
    return {"session": str(d), "repaired": True, "actions": actions}


def check_whole(path: str | Path) -> list[str]:
    """Problems a reader would meet in a session's files (empty when all is readable).

    Parameters
    ----------
    path : str or Path
        The session directory.

    Returns
    -------
    list of str
        One sentence per problem.
    """
    import wave

    import soundfile as sf

    d = Path(path)
    problems = []
    try:
        json.loads((d / "session.json").read_text())
    except (OSError, ValueError) as exc:
        problems.append(f"session.json: {exc}")
    for name in ("windows.jsonl", "windows.b.jsonl"):
        jl = d / name
        if jl.exists():
            lines = jl.read_bytes().split(b"\n")
            for k, line in enumerate(lines[:-1]):
                try:
                    json.loads(line)
                except ValueError:
                    problems.append(f"{name} line {k + 1} unreadable")
    for wav in audio_segments(d):
        try:
            with wave.open(str(wav)) as w:
                w.getnframes()
            sf.info(str(wav))
        except Exception as exc:  # noqa: BLE001
            problems.append(f"{wav.name}: {exc}")
    problems += verify_all(d)
    return problems


def run_repair(session: Path) -> int:
    """`scenemon repair`: repair and say what was done.

    Parameters
    ----------
    session : Path
        The session directory.

    Returns
    -------
    int
        The exit code.
    """
    res = repair(session)
    if not res["repaired"]:
        sys.stdout.write(f"{res['session']}: {res['note']}\n")
    else:
        sys.stdout.write(f"{res['session']}: repaired\n"
                         + "".join(f"  {a}\n" for a in res["actions"]))
    return ExitCode.OK


__all__ = ["repair", "check_whole", "drop_torn_line", "fix_wav", "run_repair"]
