"""Audio sources that feed the ring buffer: files now, the microphone through the same path.

Threads: `FileSource.start()` runs one producer thread that reads the file in blocks,
down-mixes to mono, resamples to the model rate with soxr's streaming resampler and writes
into the ring. At real-time pace it writes each block when its time has come and never waits
for the consumer (as a microphone would, so a slow consumer loses the oldest audio); in fast
mode it waits for free space instead, so nothing is lost. Only this thread reads the file.
"""

from __future__ import annotations

import threading
import time
from pathlib import Path

import numpy as np
import soundfile as sf

from monitor.errors import AudioError
from monitor.ringbuffer import RingBuffer


class StreamResampler:
    """Mono float32 resampling that keeps its state across blocks (soxr HQ).

    Block edges leave no clicks and chunked output equals one-shot output; soxr's stop band
    is far deeper than scipy's ``resample_poly`` default (see REFERENCES.md).
    """

    def __init__(self, in_rate: int, out_rate: int) -> None:
        self.in_rate, self.out_rate = int(in_rate), int(out_rate)
        self._rs = None
        if self.in_rate != self.out_rate:
            import soxr

            self._rs = soxr.ResampleStream(self.in_rate, self.out_rate, 1, dtype="float32",
                                           quality="HQ")

    def __call__(self, x: np.ndarray, *, last: bool = False) -> np.ndarray:
        x = np.ascontiguousarray(x, dtype=np.float32)
        if self._rs is None:
            return x
        return np.asarray(self._rs.resample_chunk(x, last=last), dtype=np.float32).reshape(-1)


def downmix(block: np.ndarray) -> np.ndarray:
    """Mean of the channels; `block` is (frames,) or (frames, channels)."""
    if block.ndim == 1:
        return block.astype(np.float32, copy=False)
    if block.shape[1] == 1:
        return block[:, 0].astype(np.float32, copy=False)
    return block.mean(axis=1, dtype=np.float32)


def check_audio_file(path: str | Path, *, model_rate: int, window_samples: int,
                     allow_upsample: bool = False) -> sf._SoundFileInfo:
    """Validate an audio file before a session starts; raise AudioError naming the problem."""
    path = Path(path)
    if not path.exists():
        raise AudioError(f"{path}: audio file not found")
    if path.is_dir():
        raise AudioError(f"{path}: is a directory, not an audio file")
    if path.stat().st_size == 0:
        raise AudioError(f"{path}: audio file is empty")
    try:
        info = sf.info(str(path))
    except (sf.LibsndfileError, RuntimeError, TypeError) as exc:
        raise AudioError(f"{path}: not a readable audio file ({_first_line(exc)})") from None
    if info.frames <= 0 or info.samplerate <= 0:
        raise AudioError(f"{path}: holds no audio frames")
    if info.samplerate < model_rate and not allow_upsample:
        raise AudioError(f"{path}: sample rate {info.samplerate} Hz is below the model's "
                         f"{model_rate} Hz; upsampling would invent the top band "
                         f"(pass --allow-upsample to do it anyway)")
    if info.frames * model_rate / info.samplerate < window_samples:
        raise AudioError(f"{path}: {info.duration:.3f} s of audio is shorter than one "
                         f"{window_samples / model_rate:g} s window")
    try:
        with sf.SoundFile(str(path)) as f:
            for i, block in enumerate(f.blocks(blocksize=1 << 18, dtype="float32",
                                               always_2d=True)):
                if not np.all(np.isfinite(block)):
                    bad = int(np.argmax(~np.isfinite(block).all(axis=1)))
                    t = (i * (1 << 18) + bad) / info.samplerate
                    raise AudioError(f"{path}: holds NaN or infinite samples (first at "
                                     f"{t:.3f} s)")
    except (sf.LibsndfileError, RuntimeError) as exc:
        raise AudioError(f"{path}: cannot be read to the end ({_first_line(exc)})") from None
    return info


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0][:200] if text else type(exc).__name__


class FileSource:
    """Replays an audio file into a ring buffer from its own thread (see module docstring).

    Parameters
    ----------
    path : str or Path
        Any file libsndfile reads (WAV, FLAC, OGG, ...).
    model_rate : int
        Target rate in Hz; other rates are resampled (soxr HQ, streaming).
    window_samples : int
        One window at the model rate (files shorter than this are refused).
    realtime : bool
        Pace the file at real time (as a microphone), or as fast as the consumer takes it.
    """

    kind = "file"

    def __init__(self, path: str | Path, *, model_rate: int, window_samples: int,
                 realtime: bool = False, allow_upsample: bool = False,
                 ring_seconds: float = 16.0, block_s: float | None = None) -> None:
        self.path = Path(path)
        info = check_audio_file(self.path, model_rate=model_rate,
                                window_samples=window_samples, allow_upsample=allow_upsample)
        self.native_rate = int(info.samplerate)
        self.channels = int(info.channels)
        self.frames = int(info.frames)
        self.model_rate = int(model_rate)
        self.realtime = realtime
        self.block = int(self.native_rate * (block_s or (0.02 if realtime else 0.5)))
        cap = max(int(ring_seconds * model_rate), 4 * window_samples)
        self.ring = RingBuffer(cap)
        self.finished = threading.Event()
        self.error: BaseException | None = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def describe(self) -> dict:
        return {"kind": "file", "file": str(self.path), "native_rate": self.native_rate,
                "channels": self.channels, "pace": "realtime" if self.realtime else "fast"}

    def start(self) -> None:
        self._thread = threading.Thread(target=self._run, name="file-source", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)

    def _put(self, y: np.ndarray) -> None:
        if not self.realtime:
            while self.ring.free() < y.shape[0] and not self._stop.is_set():
                time.sleep(0.002)
        self.ring.write(y)

    def _run(self) -> None:
        try:
            resample = StreamResampler(self.native_rate, self.model_rate)
            t_start = time.monotonic()
            sent = 0
            with sf.SoundFile(str(self.path)) as f:
                for block in f.blocks(blocksize=self.block, dtype="float32", always_2d=True):
                    if self._stop.is_set():
                        return
                    if self.realtime:
                        due = t_start + sent / self.native_rate
                        delay = due - time.monotonic()
                        if delay > 0:
                            time.sleep(delay)
                    sent += block.shape[0]
                    y = resample(downmix(block))
                    if y.size:
                        self._put(y)
                tail = resample(np.zeros(0, np.float32), last=True)
                if tail.size:
                    self._put(tail)
        except BaseException as exc:  # surfaced by the engine, never swallowed
            self.error = exc
        finally:
            self.finished.set()
