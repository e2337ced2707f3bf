"""`scenemon repair SESSION`: make a session that did not close cleanly whole again.

A killed or powered-off session keeps what it wrote, but may end in a torn last line of
`windows.jsonl`, an audio header up to a second behind its data, no `truth.tsv` (live truth
is written at the stop) and no `summary.json`. Repair drops the torn line, rewrites the WAV
so its header matches its data (via a temporary file and a rename), rebuilds `truth.tsv`
from the windows' truth when it is missing, and writes `summary.json` marked
``"recovered": true``. A complete session is left alone.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import soundfile as sf

from monitor.session import atomic_write, audio_segments, dumps, load_session
from monitor.truth import Span, format_truth


def drop_torn_line(path: Path) -> int:
    """Cut a last line that has no newline; return the bytes removed."""
    size = path.stat().st_size
    if size == 0:
        return 0
    with open(path, "rb+") as f:
        f.seek(-1, os.SEEK_END)
        if f.read(1) == b"\n":
            return 0
        data_end = size
        step = 4096
        pos = size
        while pos > 0:
            pos = max(0, pos - step)
            f.seek(pos)
            chunk = f.read(data_end - pos if pos + step > data_end else step)
            k = chunk.rfind(b"\n")
            if k >= 0:
                keep = pos + k + 1
                break
        else:
            keep = 0
        f.truncate(keep)
        f.flush()
        os.fsync(f.fileno())
    return size - keep


def fix_wav(path: Path) -> int | None:
    """Rewrite a WAV whose header lags its data; return its frames (None if unreadable)."""
    import wave

    try:
        data, sr = sf.read(str(path), dtype="int16")
    except (sf.LibsndfileError, RuntimeError):
        return None
    try:
        with wave.open(str(path)) as w:
            if w.getnframes() == len(data):
                return len(data)
    except (wave.Error, EOFError):
        pass
    tmp = path.with_name(f".{path.name}.repair")
    sf.write(str(tmp), data, sr, subtype="PCM_16", format="WAV")
    with open(tmp, "rb") as f:
        os.fsync(f.fileno())
    os.replace(tmp, path)
    return len(data)


def truth_from_windows(windows: list[dict]) -> list[Span]:
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
    from monitor.review.metrics import score

    d = Path(path)
    s = load_session(d)
    if s.complete:
        return {"session": str(d), "repaired": False, "note": "complete: nothing to repair"}
    actions = []
    jl = d / "windows.jsonl"
    if jl.exists():
        cut = drop_torn_line(jl)
        if cut:
            actions.append(f"dropped a torn last line of windows.jsonl ({cut} bytes)")
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
        spans = truth_from_windows(s.windows)
        if spans:
            atomic_write(d / "truth.tsv", format_truth(spans).encode())
            actions.append(f"rebuilt truth.tsv from the windows ({len(spans)} spans)")
    sc = score(s.windows, s.classes) if s.windows else None
    snippets = list((d / "snippets").glob("*/*.json")) if (d / "snippets").is_dir() else []
    summary = {
        "recovered": True, "clean": False, "windows": len(s.windows),
        "duration_s": s.windows[-1]["t1"] if s.windows else 0.0,
        "corrupt_lines_skipped": s.skipped_lines,
        "gap_samples": int(sum(w.get("gap", 0) for w in s.windows)),
        "decision_changes": sc.changes if sc else 0,
        "switches_per_min": sc.switches_per_min if sc else None,
        "windows_with_truth": sc.with_truth if sc else 0,
        "accuracy": sc.accuracy if sc else None,
        "audio_frames": frames, "snippets_written": len(snippets),
        "overruns": None, "dropped_samples": None, "repair": actions,
    }
    atomic_write(d / "summary.json", dumps(summary, indent=2).encode())
    actions.append("wrote summary.json (recovered)")
    return {"session": str(d), "repaired": True, "actions": actions}


def check_whole(path: str | Path) -> list[str]:
    """Problems a reader would meet in a session's files (empty when all is readable)."""
    import hashlib
    import wave

    d = Path(path)
    problems = []
    try:
        json.loads((d / "session.json").read_text())
    except (OSError, ValueError) as exc:
        problems.append(f"session.json: {exc}")
    jl = d / "windows.jsonl"
    if jl.exists():
        lines = jl.read_bytes().split(b"\n")
        for k, line in enumerate(lines[:-1]):
            try:
                json.loads(line)
            except ValueError:
                problems.append(f"windows.jsonl line {k + 1} unreadable")
    for wav in audio_segments(d):
        try:
            with wave.open(str(wav)) as w:
                w.getnframes()
            sf.info(str(wav))
        except Exception as exc:  # noqa: BLE001
            problems.append(f"{wav.name}: {exc}")
    for side in (d / "snippets").glob("*/*.json") if (d / "snippets").is_dir() else []:
        try:
            m = json.loads(side.read_text())
            data = side.with_suffix(".wav").read_bytes()
            if hashlib.sha256(data).hexdigest() != m["audio_sha256"]:
                problems.append(f"{side.name}: audio does not match its sha256")
        except (OSError, ValueError, KeyError) as exc:
            problems.append(f"{side.name}: {exc}")
    return problems


__all__ = ["repair", "check_whole", "drop_torn_line", "fix_wav"]
