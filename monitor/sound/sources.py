"""Audio sources that feed the ring buffer: files now, the microphone through the same path.

Threads: `FileSource.start()` runs one producer thread that reads the file in blocks,
down-mixes to mono, resamples to the model rate with soxr's streaming resampler and writes
into the ring. At real-time pace it writes each block when its time has come and never waits
for the consumer (as a microphone would, so a slow consumer loses the oldest audio); in fast
mode it waits for free space instead, so nothing is lost. Only this thread reads the file.
"""

from __future__ import annotations

import sys
import threading
import time
from pathlib import Path

import numpy as np
import soundfile as sf

from monitor.base.errors import AudioError, DeviceError
from monitor.base.native import quiet_native_stderr, reinitialise_portaudio
from monitor.sound.ringbuffer import RingBuffer
from monitor.sound.samples import downmix


class StreamResampler:
    """Mono float32 resampling that keeps its state across blocks (soxr HQ).

    Block edges leave no clicks and chunked output equals one-shot output (soxr's
    ``ResampleStream`` documentation); soxr's HQ stop band is far deeper than the Kaiser
    window of scipy's ``resample_poly`` default.

    Parameters
    ----------
    in_rate : int
        Hz of the input.
    out_rate : int
        Hz of the output (the model's rate).
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


def check_audio_file(path: str | Path, *, model_rate: int, window_samples: int,
                     allow_upsample: bool = False) -> sf._SoundFileInfo:
    """Validate an audio file before a session starts; raise AudioError naming the problem.

    Parameters
    ----------
    path : str or Path
        The file.
    model_rate : int
        Hz; a file below it is refused unless `allow_upsample`.
    window_samples : int
        A file shorter than one window is refused.

    Returns
    -------
    soundfile info
        Rate, channels, frames and format of the file.

    Raises
    ------
    AudioError
        Missing, a folder, a pipe or device, empty, unreadable, no frames, below the model's
        rate without `allow_upsample`, shorter than a window, or holding NaN or infinity.
    """
    import stat

    path = Path(path)
    if not path.exists():
        raise AudioError(f"{path}: audio file not found")
    if path.is_dir():
        raise AudioError(f"{path}: is a directory, not an audio file")
    if not stat.S_ISREG(path.stat().st_mode):
        raise AudioError(f"{path}: not a regular file (a pipe or a device); give a recording")
    if path.stat().st_size == 0:
        raise AudioError(f"{path}: audio file is empty")
    try:
        with quiet_native_stderr():
            info = sf.info(str(path))
    except (sf.LibsndfileError, RuntimeError, TypeError) as exc:
        why = _first_line(exc).split("': ", 1)[-1].rstrip(".")  # the file is named already
        if "does not exist" in why or "possibly a pipe" in why:
            # libsndfile's words for a regular file whose content it cannot parse (a
            # non-audio file named .mp3): the file exists and is regular, checked above
            why = "its content is not audio in a format libsndfile reads"
        raise AudioError(f"{path}: not a readable audio file ({why})") from None
    if info.frames <= 0 or info.samplerate <= 0:
        raise AudioError(f"{path}: holds no audio frames")
    if info.samplerate < model_rate and not allow_upsample:
        raise AudioError(f"{path}: sample rate {info.samplerate} Hz is below the model's "
                         f"{model_rate} Hz; upsampling would invent the top band "
                         f"(pass --allow-upsample to do it anyway)")
    if info.frames * model_rate / info.samplerate < window_samples:
        raise AudioError(f"{path}: {info.duration:.3f} s of audio is shorter than one "
                         f"{window_samples / model_rate:g} s window")
    if info.subtype not in ("FLOAT", "DOUBLE"):  # integer PCM cannot hold NaN or infinity
        return info
    try:
        with quiet_native_stderr(), sf.SoundFile(str(path)) as f:
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


def read_resampled(paths, model_rate: int, *, block: int = 1 << 16,
                   native_rate: int | None = None):
    """Yield audio as mono float32 blocks at `model_rate` (down-mix, soxr HQ), with the
    native frames each block came from.

    `paths` is one file or several files of one recording at one rate (a session's audio
    segments), read in turn through one resampler. The one path from a file to the model's
    rate: file replay, `score` and the device tools all read through it, so they see
    identical samples.

    Parameters
    ----------
    paths : str, Path or list of them
        One file, or the files of one recording in order.
    model_rate : int
        Hz of the output.
    block : int
        Native frames read at a time.
    native_rate : int, optional
        The files' rate, when known (else read from the first file).

    Yields
    ------
    frames : int
        Native frames the block came from (0 for the resampler's tail).
    samples : numpy.ndarray
        Mono float32 at `model_rate`.
    """
    paths = [paths] if isinstance(paths, (str, Path)) else list(paths)
    rate = native_rate or sf.info(str(paths[0])).samplerate
    resample = StreamResampler(rate, model_rate)
    for path in paths:
        with sf.SoundFile(str(path)) as f:
            for blk in f.blocks(blocksize=block, dtype="float32", always_2d=True):
                y = resample(downmix(blk))
                if y.size:
                    yield blk.shape[0], y
    tail = resample(np.zeros(0, np.float32), last=True)
    if tail.size:
        yield 0, tail


def check_audio_files(paths, *, model_rate: int, window_samples: int,
                      allow_upsample: bool = False):
    """`check_audio_file` for one file or the files of one recording (same rate; the whole
    must hold a window). Returns the first file's info and the total frames.

    Parameters
    ----------
    paths : str, Path or list of them
        One file, or the files of one recording in order.
    model_rate : int
        Hz; a rate below it is refused unless `allow_upsample`.
    window_samples : int
        The whole recording must hold one window at the model's rate.
    allow_upsample : bool
        Accept a rate below the model's.

    Returns
    -------
    info : soundfile info
        The first file's rate, channels and format.
    frames : int
        Native frames of all the files together.

    Raises
    ------
    AudioError
        A file fails `check_audio_file`, the files' rates differ, or together they
        are shorter than a window.
    """
    paths = [paths] if isinstance(paths, (str, Path)) else list(paths)
    if len(paths) == 1:
        info = check_audio_file(paths[0], model_rate=model_rate, window_samples=window_samples,
                                allow_upsample=allow_upsample)
        return info, int(info.frames)
    infos = [check_audio_file(p, model_rate=model_rate, window_samples=1,
                              allow_upsample=allow_upsample) for p in paths]
    for p, i in zip(paths[1:], infos[1:]):
        if i.samplerate != infos[0].samplerate:
            raise AudioError(f"{p}: {i.samplerate} Hz, but {paths[0]} is {infos[0].samplerate} "
                             f"Hz; the files of one recording must share a rate")
    total = sum(int(i.frames) for i in infos)
    if total * model_rate / infos[0].samplerate < window_samples:
        raise AudioError(f"{paths[0]}: its {len(paths)} files together are shorter than one "
                         f"{window_samples / model_rate:g} s window")
    return infos[0], total


def load_audio(paths, *, model_rate: int, window_samples: int) -> np.ndarray:
    """A whole checked recording as mono float32 at `model_rate`, exactly as replay feeds the
    ring (several files of one recording are joined).

    Parameters
    ----------
    paths : str, Path or list of them
        One file, or the files of one recording in order.
    model_rate : int
        Hz.
    window_samples : int
        A recording shorter than one window is refused.

    Returns
    -------
    numpy.ndarray
        ``(samples,)`` float32 at `model_rate`.

    Raises
    ------
    AudioError
        The file is missing, unreadable, too short, below the model's rate, or damaged
        past its header.
    """
    info, _ = check_audio_files(paths, model_rate=model_rate, window_samples=window_samples)
    try:
        with quiet_native_stderr():
            parts = [y for _, y in read_resampled(paths, model_rate, native_rate=info.samplerate)]
    except (sf.LibsndfileError, RuntimeError) as exc:  # damaged past its header
        first = paths if isinstance(paths, (str, Path)) else list(paths)[0]
        raise AudioError(f"{first}: cannot be read to the end ({_first_line(exc)})") from None
    return np.concatenate(parts) if parts else np.zeros(0, np.float32)


class FileSource:
    """Replays an audio file into a ring buffer from its own thread (see module docstring).

    Parameters
    ----------
    path : str or Path, or a list of them
        Any file libsndfile reads (WAV, FLAC, OGG, ...); several files of one recording
        (a session's audio segments) are replayed one after the other as one stream.
    model_rate : int
        Target rate in Hz; other rates are resampled (soxr HQ, streaming).
    window_samples : int
        One window at the model rate (files shorter than this are refused).
    realtime : bool
        Pace the file at real time (as a microphone), or as fast as the consumer takes it.
    speed : float
        With `realtime`, how many times faster than real time the clock runs (a long field
        run simulated through the live path); 1.0 is real time.

    Raises
    ------
    AudioError
        The file fails `check_audio_files`, or `speed` is not above 0.
    """

    realtime: bool
    failure: str | None = None  # a file source has no runtime failure it survives

    def __init__(self, path, *, model_rate: int, window_samples: int,
                 realtime: bool = False, allow_upsample: bool = False,
                 ring_seconds: float = 16.0, block_s: float | None = None,
                 speed: float = 1.0) -> None:
        if not speed > 0:
            raise AudioError(f"speed={speed} must be above 0")
        self.speed = float(speed)
        self.paths = [Path(p) for p in ([path] if isinstance(path, (str, Path)) else path)]
        self.path = self.paths[0]
        info, frames = check_audio_files(self.paths, model_rate=model_rate,
                                         window_samples=window_samples,
                                         allow_upsample=allow_upsample)
        self.native_rate = int(info.samplerate)
        self.channels = int(info.channels)
        self.frames = frames
        self.model_rate = int(model_rate)
        self.realtime = realtime
        self.block = int(self.native_rate * (block_s or (0.05 * self.speed if realtime else 4.0)))
        cap = max(int(ring_seconds * model_rate), 4 * window_samples)
        self.ring = RingBuffer(cap)
        self.finished = threading.Event()
        self.error: BaseException | None = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def describe(self) -> dict:
        """session.json's ``source`` entry: origin "file", first file, native rate, channels, pace.

        A recording of several files also lists them all under ``files``.
        """
        d = {"origin": "file", "file": str(self.path), "native_rate": self.native_rate,
             "channels": self.channels, "pace": "realtime" if self.realtime else "fast"}
        if self.realtime and self.speed != 1.0:
            d["speed"] = self.speed
        if len(self.paths) > 1:
            d["files"] = [str(p) for p in self.paths]
        return d

    def stats(self) -> dict:
        """No figures of its own for summary.json: an empty dict."""
        return {}

    def start(self) -> None:
        """Start the "file-source" producer thread and return at once."""
        self._thread = threading.Thread(target=self._run, name="file-source", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Ask the producer thread to stop and join it (for at most 5 s)."""
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
            t_start = time.monotonic()
            sent = 0
            for frames, y in read_resampled(self.paths, self.model_rate, block=self.block,
                                            native_rate=self.native_rate):
                if self._stop.is_set():
                    return
                if self.realtime and frames:
                    # the block is due when its first frame would have arrived live
                    delay = t_start + sent / self.native_rate / self.speed - time.monotonic()
                    if delay > 0:
                        time.sleep(delay)
                sent += frames
                self._put(y)
        except BaseException as exc:  # surfaced by the engine, never swallowed
            self.error = exc
        finally:
            self.finished.set()


# --------------------------------------------------------------------------------------
# The microphone
# --------------------------------------------------------------------------------------
PREFERRED_LINUX_DEVICES = ("pipewire", "pulse", "default")
PUMP_PERIOD_S = 0.1  # how often the pump moves raw frames on: latency against wake-ups
MAX_GAPS_KEPT = 1000  # gaps listed in summary.json; beyond them only counted (memory stays flat)


def import_sounddevice():
    """sounddevice, imported only when a device is needed (replay works without PortAudio).

    Returns
    -------
    module
        The sounddevice module.

    Raises
    ------
    DeviceError
        sounddevice or the PortAudio library is not installed.
    """
    try:
        import sounddevice as sd
    except OSError as exc:  # the wheel loads the system PortAudio on Linux
        raise DeviceError(f"PortAudio library not found ({exc}): install the system package "
                          f"libportaudio2 (e.g. apt-get install libportaudio2)") from None
    return sd


def input_devices(sd) -> list[dict]:
    """Every device with input channels: index, name, host API, channels, default rate.

    Parameters
    ----------
    sd : module
        The sounddevice module.

    Returns
    -------
    list of dict
        One dict per input device: index, name, hostapi, channels, rate, default.
    """
    apis = sd.query_hostapis()
    try:
        default_in = sd.default.device[0]
    except Exception:  # noqa: BLE001 - no default device
        default_in = -1
    out = []
    for i, d in enumerate(sd.query_devices()):
        if d["max_input_channels"] > 0:
            out.append({"index": i, "name": d["name"], "hostapi": apis[d["hostapi"]]["name"],
                        "channels": d["max_input_channels"],
                        "default_rate": float(d["default_samplerate"]),
                        "default": i == default_in})
    return out


def device_table() -> str:
    """`scenemon devices`: every input device, one line each, the default marked ``*``.

    Returns
    -------
    str
        The table's lines.
    """
    devs = input_devices(import_sounddevice())
    if not devs:
        return "no audio input devices\n"
    lines = [f"  {'index':>5}  {'name':<32} {'host API':<12} {'channels':>8}  rate"]
    for d in devs:
        mark = "*" if d["default"] else " "
        lines.append(f"{mark} {d['index']:>5}  {d['name'][:32]:<32} {d['hostapi'][:12]:<12} "
                     f"{d['channels']:>8}  {d['default_rate']:.0f} Hz")
    lines.append("* = the system's default input")
    return "\n".join(lines) + "\n"


def _listing(devs: list[dict]) -> str:
    return "; ".join(f"[{d['index']}] {d['name']}" for d in devs) or "no input devices"


def resolve_device(sd, spec: str | int | None) -> dict:
    """Pick an input device: an index, a case-insensitive name fragment, or the default.

    With no `spec` on Linux, a ``pipewire``, ``pulse`` or ``default`` device is preferred.
    Raises DeviceError listing the devices when `spec` is unknown or ambiguous.

    Parameters
    ----------
    sd : module
        The sounddevice module.
    spec : str, int or None
        A device index, a case-insensitive part of its name, or None for the default.

    Returns
    -------
    dict
        The device, as `input_devices` lists it.

    Raises
    ------
    DeviceError
        No input device, no device with that index, or no match or several for the name
        (every match listed as "[index] name").
    """
    devs = input_devices(sd)
    if not devs:
        raise DeviceError("no audio input device found (is a microphone connected, or a sound "
                          "server running?)")
    if spec is None or spec == "":
        if sys.platform.startswith("linux"):
            for name in PREFERRED_LINUX_DEVICES:
                for d in devs:
                    if d["name"].lower() == name:
                        return d
        for d in devs:
            if d["default"]:
                return d
        return devs[0]
    text = str(spec).strip()
    if text.isdigit():
        for d in devs:
            if d["index"] == int(text):
                return d
        raise DeviceError(f"input device {text} does not exist; input devices: {_listing(devs)}")
    exact = [d for d in devs if d["name"].lower() == text.lower()]
    if len(exact) == 1:
        return exact[0]
    hits = [d for d in devs if text.lower() in d["name"].lower()]
    if len(hits) == 1:
        return hits[0]
    if not hits:
        raise DeviceError(f"no input device matches {text!r}; input devices: {_listing(devs)}")
    raise DeviceError(f"input device {text!r} is ambiguous: it matches {_listing(hits)}")


class MicSource:
    """Live input through PortAudio, feeding the same ring as a file source.

    Threads:

    - the PortAudio callback (PortAudio's thread) copies each block, as it comes, into a
      preallocated ring of raw native-rate frames and counts input-overflow flags. It
      allocates nothing, takes no lock, logs nothing. An exception there is caught, flagged
      and surfaced like a lost device (PortAudio would otherwise just stop calling it);
    - "mic-pump" (own thread) down-mixes and resamples the raw frames to the model rate
      (soxr HQ, streaming) into `ring`, and keeps the watchdog: no frames for `watchdog_s`
      or an inactive stream means the input is lost. It then counts a gap, tries to reopen
      the device by name (indices shift after a replug) `reopen_tries` times, waiting 0.2 s,
      then 1, 2, 4 ... seconds (at most `reopen_wait_s`) between tries, and otherwise
      ends the source with `failure` set, so the session closes with its files intact.

    Parameters
    ----------
    device : str, int or None
        An index, a part of the device's name, or None for the default input.
    model_rate : int
        Hz the ring delivers (soxr HQ from the device's own rate).
    window_samples : int
        One window at the model's rate.
    latency : str or float
        PortAudio's suggested latency: "high", "low" or seconds.
    blocksize : int, optional
        Frames per callback (None: PortAudio's choice).
    ring_seconds : float
        Seconds of audio the model-rate ring holds.
    watchdog_s : float
        Seconds without frames after which the device counts as lost.
    reopen_tries : int
        Times a lost device is reopened by name before the source gives up.
    reopen_wait_s : float
        The longest wait between two tries (the waits double from 1 s up to it).
    max_seconds : float, optional
        Stop after this many seconds of audio.

    Raises
    ------
    DeviceError
        The device cannot be found or opened.
    """

    realtime = True

    def __init__(self, device: str | int | None = None, *, model_rate: int,
                 window_samples: int, latency: str | float = "high", blocksize: int | None = None,
                 ring_seconds: float = 16.0, watchdog_s: float = 2.0, reopen_tries: int = 3,
                 reopen_wait_s: float = 1.0,
                 max_seconds: float | None = None) -> None:
        self.sd = sd = import_sounddevice()
        dev = resolve_device(sd, device)
        self.device = dev
        self.native_rate = int(dev["default_rate"])
        self.channels = min(int(dev["channels"]), 2)
        try:
            sd.check_input_settings(device=dev["index"], samplerate=self.native_rate,
                                    channels=self.channels, dtype="float32")
        except Exception as exc:  # noqa: BLE001 - PortAudio's many error kinds
            raise DeviceError(f"input device [{dev['index']}] {dev['name']} cannot record "
                              f"{self.channels} channel(s) at {self.native_rate} Hz ({exc})") from None
        self.model_rate = int(model_rate)
        # About 50 ms per callback unless asked otherwise. PortAudio's own choice (0) is
        # the most flexible, but on ALSA it calls back every ~10-25 ms, and that alone cost
        # 3.6% of a core here against about 0.7% at 50 ms blocks (benchmarks/bench_live.py).
        self.latency = latency
        self.blocksize = self.native_rate // 20 if blocksize is None else int(blocksize)
        self.watchdog_s, self.reopen_tries = watchdog_s, reopen_tries
        self.reopen_wait_s = float(reopen_wait_s)
        self.max_seconds = max_seconds
        self.ring = RingBuffer(max(int(ring_seconds * model_rate), 4 * window_samples))
        # raw frames from the callback, interleaved; room for a few seconds
        self._raw = RingBuffer(int(4 * self.native_rate) * self.channels)
        self.finished = threading.Event()
        self.error: BaseException | None = None
        self.failure: str | None = None
        self.callback_error: BaseException | None = None
        self.reopens = 0
        self.lost_s = 0.0
        self.gaps: list[dict] = []  # {start_s, end_s, cause, wall_start, wall_end}, bounded
        self.gaps_not_listed = 0
        self._stop = threading.Event()
        self._stream = None
        self._thread: threading.Thread | None = None

    def stats(self) -> dict:
        """summary.json's source figures: reopens, seconds of input lost, and the failure, if any.

        ``source_failure`` is the sentence that ended the source, None when it did not fail.
        """
        return {"reopens": self.reopens, "lost_s": round(self.lost_s, 3),
                "source_failure": self.failure, "input_gaps": list(self.gaps),
                "input_gaps_not_listed": self.gaps_not_listed}

    def _record_gap(self, start_s: float, end_s: float | None, cause: str,
                    wall_start: float, wall_end: float | None) -> None:
        """One gap in the input: where on the session clock, when by the wall clock, why."""
        if len(self.gaps) >= MAX_GAPS_KEPT:
            self.gaps_not_listed += 1
            return
        self.gaps.append({"start_s": round(start_s, 3),
                          "end_s": None if end_s is None else round(end_s, 3), "cause": cause,
                          "wall_start": round(wall_start, 3),
                          "wall_end": None if wall_end is None else round(wall_end, 3)})

    def describe(self) -> dict:
        """session.json's ``source`` entry: device, host API, rate, channels, blocksize, latency."""
        return {"origin": "mic", "device": self.device["name"], "index": self.device["index"],
                "hostapi": self.device["hostapi"], "native_rate": self.native_rate,
                "channels": self.channels, "pace": "realtime", "blocksize": self.blocksize,
                "latency": self.latency}

    # PortAudio's thread: copy and count, nothing else
    def _callback(self, indata, frames, time_info, status) -> None:
        try:
            if status.input_overflow:
                self.ring.producer_overflows += 1
            self._raw.write(indata.reshape(-1))
        except BaseException as exc:  # noqa: BLE001 - surfaced by the pump thread
            self.callback_error = exc
            raise self.sd.CallbackAbort from None

    def _open(self) -> None:
        self._stream = self.sd.InputStream(
            samplerate=self.native_rate, blocksize=self.blocksize, device=self.device["index"],
            channels=self.channels, dtype="float32", latency=self.latency,
            callback=self._callback)
        self._stream.start()

    def _close_stream(self) -> None:
        s, self._stream = self._stream, None
        if s is not None:
            try:
                s.abort()
                s.close()
            except Exception:  # noqa: BLE001 - the device may already be gone
                pass

    def start(self) -> None:
        """Open the input stream and start the "mic-pump" thread.

        Raises
        ------
        DeviceError
            The device cannot be opened; `assemble.run_session` then removes the empty session
            directory again.
        """
        try:
            self._open()
        except Exception as exc:  # noqa: BLE001
            self._close_stream()
            raise DeviceError(f"input device [{self.device['index']}] {self.device['name']} "
                              f"cannot be opened ({exc})") from None
        self._thread = threading.Thread(target=self._pump, name="mic-pump", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Stop the pump thread (joined for at most 10 s), then abort and close the stream."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=10)
        self._close_stream()

    def _reopen(self) -> bool:
        """Re-scan PortAudio's devices and reopen ours by name; True on success."""
        name = self.device["name"]
        for attempt in range(self.reopen_tries):
            wait = 0.2 if attempt == 0 else min(self.reopen_wait_s, 2.0 ** (attempt - 1))
            if self._stop.wait(wait):
                return False
            self._close_stream()
            try:
                reinitialise_portaudio(self.sd)
                dev = resolve_device(self.sd, name)
                if int(dev["default_rate"]) != self.native_rate:
                    continue
                self.device = dev
                self._open()
                self.reopens += 1
                return True
            except Exception:  # noqa: BLE001 - try again, then give up
                continue
        return False

    def _pump(self) -> None:
        resample = StreamResampler(self.native_rate, self.model_rate)
        ch = self.channels
        last_frames_t = time.monotonic()
        got = 0  # native frames taken
        carry = np.zeros(0, np.float32)  # a partial frame left by a torn read
        try:
            while not self._stop.is_set():
                raw, lost = self._raw.read()
                now = time.monotonic()
                if lost:
                    carry = np.zeros(0, np.float32)
                    if lost % ch:  # keep the channels aligned after an overrun
                        skip = ch - lost % ch
                        raw, lost = raw[skip:], lost + skip
                    self.ring.skip(int(round(lost / ch * self.model_rate / self.native_rate)))
                if raw.size:
                    last_frames_t = now
                    if carry.size:
                        raw = np.concatenate((carry, raw))
                    whole = raw.size - raw.size % ch
                    carry = raw[whole:]
                    frames = raw[:whole].reshape(-1, ch)
                    limit = None if self.max_seconds is None else \
                        int(round(self.max_seconds * self.native_rate))
                    if limit is not None and got + frames.shape[0] >= limit:
                        # exactly `max_seconds` of audio, the resampler's tail included
                        frames = frames[:limit - got]
                        y = np.concatenate((resample(downmix(frames)),
                                            resample(np.zeros(0, np.float32), last=True)))
                        if y.size:
                            self.ring.write(y)
                        return
                    got += frames.shape[0]
                    y = resample(downmix(frames))
                    if y.size:
                        self.ring.write(y)
                    continue
                stream = self._stream
                problem = None
                if self.callback_error is not None:
                    problem = f"the audio callback failed ({self.callback_error!r})"
                elif stream is None or not stream.active:
                    problem = "the input stream stopped"
                elif now - last_frames_t > self.watchdog_s:
                    problem = f"no audio arrived for {self.watchdog_s:g} s"
                if problem is None:
                    time.sleep(PUMP_PERIOD_S)
                    continue
                t_lost = time.monotonic()
                # the gap starts where the audio stopped: the ring's end on the session clock
                start_s = self.ring.written / self.model_rate
                wall_start = time.time() - (t_lost - last_frames_t)
                if self.callback_error is None and self._reopen():
                    gap = time.monotonic() - last_frames_t
                    self.lost_s += gap
                    self.ring.skip(int(gap * self.model_rate))
                    self._record_gap(start_s, self.ring.written / self.model_rate, problem,
                                     wall_start, time.time())
                    last_frames_t = time.monotonic()
                    continue
                self.lost_s += time.monotonic() - t_lost
                self._record_gap(start_s, None, problem, wall_start, None)
                self.failure = (f"input device {self.device['name']!r} was lost ({problem}) and "
                                f"could not be reopened; the session was closed with everything "
                                f"captured so far")
                return
        except BaseException as exc:  # noqa: BLE001 - surfaced by the engine
            self.error = exc
        finally:
            self.finished.set()
