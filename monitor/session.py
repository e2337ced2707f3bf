"""The session directory: its writer (own thread) and its reader.

Threads: `SessionWriter` owns one thread, "session-writer", which does every disk write of
a session after `session.json`: window records, audio, truth and the summary. The engine's
compute thread only puts items on an unbounded queue (`put` never blocks), so disk speed
never stalls the audio or compute path.

Layout (DESIGN.md): ``session.json``, ``windows.jsonl`` (one line per window, flushed as it
happens, one ``write`` per record), ``truth.tsv``, ``audio.wav`` (PCM_16 at the model rate,
header brought up to date about once a second so a killed process leaves a WAV any reader
opens), ``snippets/``, and ``summary.json`` only at a clean stop.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import queue
import shutil
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from monitor.errors import SessionError
from monitor.truth import Span, TruthTrack, format_truth, parse_truth

SFC_UPDATE_HEADER_NOW = 0x1060  # libsndfile's command; soundfile's flush() only fsyncs
HEADER_EVERY_S = 1.0
FSYNC_EVERY_S = 5.0
SESSION_FILES = ("session.json", "windows.jsonl", "summary.json", "audio.wav")
SEGMENT_S = 3600.0  # a new audio file every hour keeps each one far below WAV's 4 GB


def segment_name(k: int) -> str:
    """audio.wav, then audio-0001.wav, audio-0002.wav, ..."""
    return "audio.wav" if k == 0 else f"audio-{k:04d}.wav"


def audio_segments(session_dir: Path) -> list[Path]:
    """The session's audio files in order (session.json lists them; else what is there)."""
    d = Path(session_dir)
    try:
        names = json.loads((d / "session.json").read_text()).get("audio_segments")
    except (OSError, ValueError):
        names = None
    if not names:
        names = ["audio.wav"] + sorted(p.name for p in d.glob("audio-[0-9][0-9][0-9][0-9].wav"))
    return [d / n for n in names if (d / n).is_file()]


def atomic_write(path: Path, data: bytes) -> None:
    """Temporary file, fsync, rename, fsync of the directory: all or nothing."""
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "wb") as f:
        f.write(data)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)
    fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def to_pcm16(x: np.ndarray) -> np.ndarray:
    return np.clip(np.round(x * 32768.0), -32768, 32767).astype(np.int16)


def _json_default(o: Any) -> Any:
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


def dumps(obj: Any, **kw: Any) -> str:
    return json.dumps(obj, default=_json_default, allow_nan=False, **kw)


def prepare_dir(out: Path) -> Path:
    """Create a session directory; refuse one that already holds a session."""
    if out.exists() and not out.is_dir():
        raise SessionError(f"{out}: exists and is not a directory")
    if out.is_dir() and any((out / name).exists() for name in SESSION_FILES):
        raise SessionError(f"{out}: already holds a session; choose another --out")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise SessionError(f"{out}: cannot create the session directory ({exc.strerror})") from None
    return out


class SessionWriter:
    """Writes one session directory from its own thread (see module docstring)."""

    def __init__(self, out: str | Path, meta: dict[str, Any], *, sample_rate: int,
                 audio: bool = True, segment_s: float = SEGMENT_S) -> None:
        self.dir = prepare_dir(Path(out))
        self.sample_rate = int(sample_rate)
        self.write_audio = audio
        self.meta = {**meta, "session_id": meta.get("session_id") or self.dir.name,
                     "audio_segments": ["audio.wav"] if audio else [],
                     "audio_segment_s": segment_s}
        atomic_write(self.dir / "session.json", dumps(self.meta, indent=2).encode())
        self._q: queue.SimpleQueue = queue.SimpleQueue()
        self._thread = threading.Thread(target=self._run, name="session-writer", daemon=True)
        self.error: BaseException | None = None
        self.error_text: str | None = None
        self.dropped_items = 0
        self.audio_frames = 0
        self.segment_frames = max(1, int(segment_s * sample_rate))
        self.segments: list[str] = ["audio.wav"] if audio else []
        self.windows_written = 0
        self.snippets_written: list[Path] = []
        self._thread.start()

    # called from the compute thread: never blocks
    def on_audio(self, chunk: np.ndarray, gap: int) -> None:
        self._q.put(("audio", chunk, gap))

    def on_window(self, result: Any) -> None:
        """Queue a `WindowResult`; it is serialised on the writer's thread."""
        self._q.put(("window", result))

    def on_snippet(self, snippet: dict[str, Any]) -> None:
        """Queue a snippet from the capture policy (its "audio" is float32 at the model rate)."""
        self._q.put(("snippet", snippet))

    def _write_snippet(self, snip: dict[str, Any]) -> None:
        from monitor.capture import safe_label

        label_dir = self.dir / "snippets" / safe_label(snip["label"])
        label_dir.mkdir(parents=True, exist_ok=True)
        name = f"s{int(round(snip['t0'] * 1000)):09d}-{snip['reason']}"
        k = 1
        while (label_dir / f"{name}.json").exists():
            k += 1
            name = f"s{int(round(snip['t0'] * 1000)):09d}-{snip['reason']}-{k}"
        buf = io.BytesIO()
        sf.write(buf, to_pcm16(snip["audio"]), self.sample_rate, subtype="PCM_16", format="WAV")
        data = buf.getvalue()
        side = {k: v for k, v in snip.items() if k != "audio"}
        side.update({
            "session": self.meta["session_id"], "file": f"{name}.wav",
            "duration_s": round(len(snip["audio"]) / self.sample_rate, 4),
            "model_sha256": self.meta.get("model", {}).get("sha256"),
            "audio_sha256": hashlib.sha256(data).hexdigest(),
        })
        atomic_write(label_dir / f"{name}.wav", data)  # audio first: the sidecar is the commit
        atomic_write(label_dir / f"{name}.json", dumps(side, indent=2).encode())
        self.snippets_written.append(label_dir / f"{name}.json")

    def close(self, summary: dict[str, Any] | None, truth: list[Span] | None = None) -> None:
        """Finish: write truth and (when given) summary.json, close files, join the thread."""
        self._q.put(("close", summary, truth))
        self._thread.join()

    def _run(self) -> None:
        jl = wav = None
        try:
            jl = open(self.dir / "windows.jsonl", "a", encoding="utf-8")
            if self.write_audio:
                wav = self._open_segment(0)
        except OSError as exc:
            self._fail(exc)
        last_sync = time.monotonic()
        last_header = 0.0  # the first audio write brings the header up to date too
        while True:
            item = self._q.get()
            kind = item[0]
            if kind == "close":
                self._close(jl, wav, item[1], item[2])
                return
            if self.error is not None:  # after a write error (disk full): drop, never tear
                self.dropped_items += 1
                continue
            try:
                if kind == "window":
                    jl.write(dumps(item[1].record()) + "\n")
                    jl.flush()
                    self.windows_written += 1
                elif kind == "audio" and wav is not None:
                    _, chunk, gap = item
                    pcm = to_pcm16(chunk)
                    if gap:
                        pcm = np.concatenate((np.zeros(gap, np.int16), pcm))
                    while pcm.size:
                        room = self.segment_frames - self._segment_used
                        if room <= 0:  # next segment: close this one cleanly first
                            wav.close()
                            wav = self._open_segment(len(self.segments))
                            continue
                        wav.write(pcm[:room])
                        self._segment_used += min(room, pcm.size)
                        self.audio_frames += min(room, pcm.size)
                        pcm = pcm[room:]
                    now = time.monotonic()
                    if now - last_header >= HEADER_EVERY_S:
                        if sf._snd.sf_command(wav._file, SFC_UPDATE_HEADER_NOW, sf._ffi.NULL, 0):
                            raise OSError("libsndfile could not update the WAV header")
                        last_header = now
                    if now - last_sync >= FSYNC_EVERY_S:
                        wav.flush()
                        os.fsync(jl.fileno())
                        last_sync = now
                elif kind == "snippet":
                    self._write_snippet(item[1])
            except Exception as exc:  # noqa: BLE001 - disk full, I/O error: stop writing
                self._fail(exc)

    def _open_segment(self, k: int):
        """Open audio segment k (listing it in session.json) with a complete empty header,
        so a kill in its first second still leaves a valid WAV."""
        name = segment_name(k)
        if k:
            self.segments.append(name)
            self.meta["audio_segments"] = list(self.segments)
            atomic_write(self.dir / "session.json", dumps(self.meta, indent=2).encode())
        wav = sf.SoundFile(str(self.dir / name), "w", samplerate=self.sample_rate, channels=1,
                           subtype="PCM_16", format="WAV")
        sf._snd.sf_command(wav._file, SFC_UPDATE_HEADER_NOW, sf._ffi.NULL, 0)
        self._segment_used = 0
        return wav

    def _fail(self, exc: BaseException) -> None:
        """First write error: stop writing (monitoring goes on); say it once."""
        if self.error is None:
            self.error = exc
            reason = getattr(exc, "strerror", None) or str(exc)
            try:  # libsndfile says only "System error." when the disk is full
                if shutil.disk_usage(self.dir).free < 1 << 16:
                    reason = "No space left on device"
            except OSError:
                pass
            self.error_text = (f"{self.dir}: writing stopped ({reason}); windows, audio and "
                               f"snippets after this point are not kept, what was written is intact")

    def _close(self, jl, wav, summary, truth) -> None:
        for f in (jl, wav):
            try:
                if f is not None:
                    f.close()
            except Exception as exc:  # noqa: BLE001
                self._fail(exc)
        try:
            if truth is not None:
                atomic_write(self.dir / "truth.tsv", format_truth(truth).encode())
            if summary is not None:
                summary = {**summary, "audio_frames": self.audio_frames,
                           "audio_segments": list(self.segments),
                           "snippets_written": len(self.snippets_written),
                           "write_error": self.error_text, "items_not_written": self.dropped_items}
                atomic_write(self.dir / "summary.json", dumps(summary, indent=2).encode())
        except Exception as exc:  # noqa: BLE001 - the disk is still full
            self._fail(exc)
            for name in ("truth.tsv", "summary.json"):
                tmp = self.dir / f".{name}.tmp"
                if tmp.exists():
                    try:
                        tmp.unlink()
                    except OSError:
                        pass


@dataclass
class Session:
    """A session read back from disk."""

    dir: Path
    meta: dict[str, Any]
    windows: list[dict[str, Any]]
    truth: TruthTrack | None
    summary: dict[str, Any] | None
    skipped_lines: int = 0
    notes: list[str] = field(default_factory=list)

    @property
    def complete(self) -> bool:
        return self.summary is not None

    @property
    def classes(self) -> list[str]:
        return list(self.meta.get("card", {}).get("classes", []))


def load_session(path: str | Path) -> Session:
    """Read a session directory; a torn or corrupt windows line is skipped and counted."""
    d = Path(path)
    if not d.is_dir():
        raise SessionError(f"{d}: not a session directory")
    try:
        meta = json.loads((d / "session.json").read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SessionError(f"{d}: no session.json, not a session directory") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise SessionError(f"{d / 'session.json'}: not valid JSON ({exc})") from None
    windows, skipped = [], 0
    jl = d / "windows.jsonl"
    if jl.exists():
        with open(jl, encoding="utf-8", errors="replace") as f:
            for line in f:
                try:
                    rec = json.loads(line)
                    if isinstance(rec, dict) and "t0" in rec:
                        windows.append(rec)
                    else:
                        skipped += 1
                except json.JSONDecodeError:
                    skipped += 1
    truth = None
    tp = d / "truth.tsv"
    if tp.exists():
        truth = parse_truth(tp.read_text(encoding="utf-8"), where=str(tp))
    summary = None
    sp = d / "summary.json"
    if sp.exists():
        try:
            summary = json.loads(sp.read_text(encoding="utf-8"))
        except json.JSONDecodeError:
            summary = None
    notes = []
    if summary is None:
        notes.append("incomplete: no summary.json (the session did not close cleanly; "
                     "scenemon repair SESSION makes it whole)")
    if skipped:
        notes.append(f"{skipped} unreadable line(s) in windows.jsonl skipped")
    return Session(d, meta, windows, truth, summary, skipped, notes)


def percentile(values: list[float], q: float) -> float | None:
    if not values:
        return None
    v = float(np.percentile(np.asarray(values, dtype=np.float64), q))
    return v if math.isfinite(v) else None
