"""The session directory's writer (own thread).

Threads: `SessionWriter` owns one thread, "session-writer", which does every disk write of
a session after `session.json`: window records, audio, snippets, truth and the summary. The
compute thread only puts items on a queue, so disk speed does not stall the audio or compute
path; only the audio waiting in that queue is bounded (`MAX_BACKLOG_BYTES`, minutes of sound):
a disk slower than the sound for that long makes the compute thread wait for it rather than
fill memory (a fast replay then goes at the disk's pace; a live source's ring buffer counts
what it could not hold as dropped audio). The writing process holds the session's lock
(`files.SessionLock`) from the start to the close, so `repair` and the start-up notice can
tell a session being written from one that was killed.

Layout (the README's session directory): ``session.json``, ``windows.jsonl`` (one line per window, flushed as it
happens, one ``write`` per batch of windows; ``windows.b.jsonl`` for a second model), ``truth.tsv``,
``audio.wav`` (PCM_16 at the model rate, header brought up to date about once a second so a
killed process leaves a WAV any reader opens; later segments ``audio-0001.wav``...),
``snippets/``, and ``summary.json`` only at a clean stop.

Audio alone can stop while the windows go on: `stop_audio(reason)` (a disk that another
program is filling) or a full disk met while writing audio or a snippet closes the audio
file cleanly (its header up to date), and the summary says why under ``audio_stopped``;
snippets are audio too and stop with it (counted in ``snippets_not_written``); window lines,
truth and the summary are still written while they fit.
"""

from __future__ import annotations

import errno
import os
import queue
import shutil
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import soundfile as sf

from monitor.base.errors import SessionError
from monitor.base.files import SESSION_FILES, SessionLock, atomic_write, dumps, segment_name
from monitor.base.native import update_wav_header
from monitor.decisions.contract import ObserverBase
from monitor.session.snippets import write_snippet
from monitor.session.truth import Span, format_truth
from monitor.sound.samples import to_pcm16

HEADER_EVERY_S = 1.0
FSYNC_EVERY_S = 5.0
# also synced after this many frames (4 MiB of 16-bit audio): a fast replay writes megabytes
# a second, and syncing as it goes lets the disk work beside the computing, not at the close
FSYNC_EVERY_FRAMES = (4 << 20) // 2
SEGMENT_S = 3600.0  # a new audio file every hour keeps each one far below WAV's 4 GB
MAX_BACKLOG_BYTES = 8 << 20  # queued audio (float32): about 2 minutes at 16 kHz
WINDOW_FILES = ("windows.jsonl", "windows.b.jsonl")  # model A, model B
ZERO_BLOCK = 1 << 16  # a gap's silence is written this many samples at a time (memory stays flat)


def line_of(result: Any) -> str:
    """The windows.jsonl line of a result (the writer's serialisation, on its thread).

    Parameters
    ----------
    result : WindowResult
        One model's result of one window.

    Returns
    -------
    str
        One JSON line with its newline (`WindowResult.json_line`).
    """
    return result.json_line()


def prepare_dir(out: Path, *, truth_file: Path | None = None) -> Path:
    """Create a session directory; refuse one that already holds a session's files.

    A ``truth.tsv`` already in `out` is refused too (the session would write its own),
    unless it is the very truth file this session replays (`truth_file`), which is then
    left exactly as it is.

    Parameters
    ----------
    out : Path
        The session directory to create (or an empty one to use).
    truth_file : Path, optional
        The truth file this session replays.

    Returns
    -------
    Path
        The directory.

    Raises
    ------
    SessionError
        `out` is a file, already holds a session's files or another truth.tsv, or cannot be
        created.
    """
    if out.exists() and not out.is_dir():
        raise SessionError(f"{out}: exists and is not a directory")
    if out.is_dir():
        for name in SESSION_FILES:
            p = out / name
            if not (p.exists() or p.is_symlink()):
                continue
            if name == "truth.tsv" and truth_file is not None and _same_file(p, truth_file):
                continue
            what = "already holds a session" if name != "truth.tsv" else "already holds a truth.tsv"
            raise SessionError(f"{out}: {what}; choose another --out")
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise SessionError(f"{out}: cannot create the session directory ({exc.strerror})") from None
    return out


def _audio_bytes(snippet: dict[str, Any]) -> int:
    audio = snippet.get("audio")
    return int(getattr(audio, "nbytes", 0))


def _disk_full(d: Path) -> bool:
    try:
        return shutil.disk_usage(d).free < 1 << 16
    except OSError:
        return False


def _same_file(a: Path, b: Path) -> bool:
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


class SessionWriter(ObserverBase):
    """Writes one session directory from its own thread (see module docstring).

    Parameters
    ----------
    out : str or Path
        The session directory (created; refused when it holds a session).
    meta : dict
        The session.json contents (the assembler's description of the session).
    sample_rate : int
        Hz of the audio and snippets.
    audio : bool
        Keep the session's audio.
    segment_s : float
        Seconds per audio file before the next segment starts (> 0).
    truth_file : Path, optional
        The truth file being replayed; when it is ``out/truth.tsv`` it is kept, not rewritten.
    max_backlog_bytes : int
        Bytes of audio (chunks and snippets) that may wait in the queue before the compute
        thread waits for the disk.

    Raises
    ------
    SessionError
        `segment_s` is not above 0, the directory cannot be made or already holds a session
        (`prepare_dir`), or another process holds its lock.
    """

    def __init__(self, out: str | Path, meta: dict[str, Any], *, sample_rate: int,
                 audio: bool = True, segment_s: float = SEGMENT_S,
                 truth_file: Path | None = None,
                 max_backlog_bytes: int = MAX_BACKLOG_BYTES) -> None:
        if not segment_s > 0:
            raise SessionError(f"segment length {segment_s} s must be > 0")
        self.dir = prepare_dir(Path(out), truth_file=truth_file)
        self._keep_truth = truth_file is not None and _same_file(self.dir / "truth.tsv", truth_file)
        self.lock = SessionLock(self.dir)
        try:
            self.lock.acquire()
        except OSError as exc:
            raise SessionError(f"{self.dir}: another process is writing this session "
                               f"({exc.strerror})") from None
        self.sample_rate = int(sample_rate)
        self.write_audio = audio
        self.meta = {**meta, "session_id": meta.get("session_id") or self.dir.name,
                     "audio_segments": ["audio.wav"] if audio else [],
                     "audio_segment_s": segment_s}
        atomic_write(self.dir / "session.json", dumps(self.meta, indent=2).encode())
        self._q: queue.SimpleQueue = queue.SimpleQueue()
        self._windows: list = []  # this batch's results, handed over by `on_status`
        self.max_backlog_bytes = int(max_backlog_bytes)
        self.backlog_bytes = 0  # audio queued and not yet written (under `_room`)
        self.peak_backlog_bytes = 0
        self._room = threading.Condition()
        self._thread = threading.Thread(target=self._run, name="session-writer", daemon=True)
        self.error: BaseException | None = None
        self.error_text: str | None = None
        self.dropped_items = 0
        self.unserialisable = 0
        self.audio_frames = 0
        self.segment_frames = max(1, int(segment_s * sample_rate))
        self._segment_used = 0
        self.segments: list[str] = ["audio.wav"] if audio else []
        self.windows_written = 0
        self.snippets_written = 0  # a count, not a list: a week of snippets keeps memory flat
        self.audio_stopped: str | None = None  # why the audio stopped while windows go on
        self.snippets_not_written = 0  # snippets dropped after the audio stopped
        self._thread.start()

    # --- observer interface: called from the compute thread, never blocks ------------------
    def on_audio(self, chunk: np.ndarray, gap: int) -> None:
        """Queue a chunk and the `gap` before it for the audio file; compute thread.

        The chunk is queued without a copy: the ring's `read` has already made one. Waits
        only while `max_backlog_bytes` of audio are already queued.
        """
        self._reserve(chunk.nbytes)
        self._q.put(("audio", chunk, gap))

    def on_window(self, result: Any) -> None:
        """Keep a `WindowResult` (and its second model's, if any) for this batch's hand-over."""
        self._windows.append(result)

    def on_status(self, status: Any) -> None:
        """After each batch: hand its windows to the writer's thread in one queue item.

        One hand-over per batch, not per window: a fast replay makes thousands of windows a
        second, and each item woke the writer to contend for the interpreter lock.
        """
        if self._windows:
            batch, self._windows = self._windows, []
            self._q.put(("windows", batch))

    def on_snippet(self, snippet: dict[str, Any]) -> None:
        """Queue a snippet from the capture policy (its "audio" is float32 at the model rate)."""
        self._reserve(_audio_bytes(snippet))
        self._q.put(("snippet", snippet))

    def stop_audio(self, reason: str) -> None:
        """Close the audio file cleanly and keep no more audio; windows go on (any thread).

        Parameters
        ----------
        reason : str
            One sentence for the summary's ``audio_stopped``.
        """
        self._q.put(("stop_audio", reason))

    def _reserve(self, nbytes: int) -> None:
        """Count `nbytes` of queued audio, first waiting while the backlog is full.

        The writer's thread frees room as it writes; once it has stopped (a write error) or
        died, nothing waits.
        """
        with self._room:
            while (self.backlog_bytes and self.backlog_bytes + nbytes > self.max_backlog_bytes
                   and self.error is None and self._thread.is_alive()):
                self._room.wait(0.1)
            self.backlog_bytes += nbytes
            self.peak_backlog_bytes = max(self.peak_backlog_bytes, self.backlog_bytes)

    def _release(self, nbytes: int) -> None:
        with self._room:
            self.backlog_bytes -= nbytes
            self._room.notify_all()

    def close(self, summary: dict[str, Any] | None, truth: list[Span] | None = None) -> None:
        """Finish: write truth and (when given) summary.json, close files, join the thread."""
        self.on_status(None)  # windows of a batch whose status never came
        self._q.put(("close", summary, truth))
        self._thread.join()
        self.lock.release()

    # --- the writer's thread -------------------------------------------------------------------
    def _run(self) -> None:
        jl: list = []
        wav = None
        try:
            jl.append(open(self.dir / WINDOW_FILES[0], "a", encoding="utf-8"))
            if self.write_audio:
                wav = self._open_segment(0)
        except OSError as exc:
            self._fail(exc)
        last_sync, synced_frames = time.monotonic(), 0
        last_header = 0.0  # the first audio write brings the header up to date too
        while True:
            item = self._q.get()
            op = item[0]
            if op == "close":
                self._close(jl, wav, item[1], item[2])
                return
            if op == "audio":
                self._release(item[1].nbytes)
            elif op == "snippet":
                self._release(_audio_bytes(item[1]))
            if op == "stop_audio":
                wav = self._stop_audio(wav, item[1])
                continue
            if self.error is not None:  # after a write error (disk full): drop, never tear
                self.dropped_items += len(item[1]) if op == "windows" else 1
                continue
            if op == "audio" and wav is None:
                continue
            if op == "snippet" and self.audio_stopped is not None:  # a full disk: no audio
                self.snippets_not_written += 1
                continue
            try:
                if op == "windows":
                    self._write_windows(jl, item[1])
                elif op == "audio" and wav is not None:
                    wav = self._write_audio(wav, item[1], item[2])
                    now = time.monotonic()
                    if now - last_header >= HEADER_EVERY_S:
                        update_wav_header(wav)
                        last_header = now
                    if (now - last_sync >= FSYNC_EVERY_S
                            or self.audio_frames - synced_frames >= FSYNC_EVERY_FRAMES):
                        wav.flush()
                        for f in jl:
                            os.fsync(f.fileno())
                        last_sync, synced_frames = now, self.audio_frames
                elif op == "snippet":
                    write_snippet(self.dir, item[1], session_id=self.meta["session_id"],
                                  model_sha256=self.meta.get("model", {}).get("sha256"),
                                  sample_rate=self.sample_rate)
                    self.snippets_written += 1
                if self._q.empty():  # window lines flushed as they happen (a burst at once)
                    for f in jl:
                        f.flush()
            except OSError as exc:
                if op in ("audio", "snippet") and exc.errno in (errno.ENOSPC, errno.EDQUOT):
                    wav = self._stop_audio(wav, f"the disk is full ({exc.strerror}); audio "
                                                f"stopped, window lines go on while they fit")
                else:
                    self._fail(exc)
            except Exception as exc:  # noqa: BLE001 - disk full, I/O error: stop writing
                if op in ("audio", "snippet") and _disk_full(self.dir):  # libsndfile: "System error."
                    wav = self._stop_audio(wav, "the disk is full; audio stopped, window lines "
                                                "go on while they fit")
                else:
                    self._fail(exc)

    def _stop_audio(self, wav, reason: str):
        """Close the audio segment (header brought up to the frames written); keep no more."""
        if self.audio_stopped is None:
            self.audio_stopped = reason
        if wav is not None:
            try:
                update_wav_header(wav)
                wav.close()
            except Exception:  # noqa: BLE001 - the disk is full: repair fixes the header
                pass
        self.write_audio = False
        return None

    def _write_windows(self, jl: list, batch: list) -> None:
        """A batch's window lines, one write per file (model A's and B's)."""
        per_file: list[list[str]] = [[], []]
        for result in batch:
            records = [result, *getattr(result, "others", ())]
            try:
                lines = [line_of(r) for r in records]
            except (TypeError, ValueError):  # a record that is not JSON: a bug, not the disk
                self.unserialisable += 1
                continue
            for k, line in enumerate(lines):
                per_file[k].append(line)
            self.windows_written += 1
        for k, lines in enumerate(per_file):
            if not lines:
                continue
            while len(jl) <= k:
                jl.append(open(self.dir / WINDOW_FILES[len(jl)], "a", encoding="utf-8"))
            jl[k].write("".join(lines))

    def _write_audio(self, wav, chunk: np.ndarray, gap: int):
        while gap > 0:  # a device gap of hours: silence in bounded pieces
            n = min(gap, ZERO_BLOCK)
            wav = self._write_pcm(wav, np.zeros(n, np.int16))
            gap -= n
        return self._write_pcm(wav, to_pcm16(chunk))

    def _write_pcm(self, wav, pcm: np.ndarray):
        while pcm.size:
            room = self.segment_frames - self._segment_used
            if room <= 0:  # next segment: close this one cleanly first
                wav.close()
                wav = self._open_segment(len(self.segments))
                continue
            n = min(room, pcm.size)
            wav.write(pcm[:n])
            self._segment_used += n
            self.audio_frames += n
            pcm = pcm[n:]
        return wav

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
        update_wav_header(wav)
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

    def _close(self, jl: list, wav, summary, truth) -> None:
        for f in (*jl, wav):
            try:
                if f is not None:
                    f.close()
            except Exception as exc:  # noqa: BLE001
                self._fail(exc)
        try:
            if truth is not None and not self._keep_truth:
                atomic_write(self.dir / "truth.tsv", format_truth(truth).encode())
            if summary is not None:
                summary = {**summary, "audio_frames": self.audio_frames,
                           "audio_segments": list(self.segments),
                           "snippets_written": self.snippets_written,
                           "audio_stopped": self.audio_stopped,
                           "snippets_not_written": self.snippets_not_written,
                           "write_error": self.error_text, "items_not_written": self.dropped_items}
                if self.unserialisable:
                    summary["records_not_serialisable"] = self.unserialisable
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
