"""File helpers shared by every owner of a file format: atomic writes, strict JSON, sha256
fingerprints, the session's audio segment names, and the lock a writing process holds on
its session.

Nothing here knows what a session means; `session_writer`, `session_reader`, `snippets`,
`repair` and the review commands own their files and use these helpers.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import json
import os
import stat
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

LOCK_NAME = ".lock"  # held (flock) by the process writing a session; gone with the process


def atomic_write(path: Path, data: bytes) -> None:
    """Temporary file, fsync, rename, fsync of the directory: all or nothing.

    Parameters
    ----------
    path : Path
        The file to (re)place. A symbolic link there is replaced, never followed.
    data : bytes
        The whole content.

    Raises
    ------
    OSError
        The file cannot be written (a read-only or full file system); it names the file, and
        no temporary file is left behind.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    try:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException as exc:  # a full disk, a kill: no half-written temporary file is left
        with contextlib.suppress(OSError):
            tmp.unlink()
        if isinstance(exc, OSError) and exc.filename is None:  # say which file it was
            raise OSError(exc.errno, exc.strerror, str(path)) from exc
        raise
    fsync_dir(path.parent)


def fsync_dir(d: Path) -> None:
    """fsync a directory, so that a rename in it survives a power cut.

    Parameters
    ----------
    d : Path
        The directory.
    """
    fd = os.open(d, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _json_default(o: Any) -> Any:
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")


_ENCODER = json.JSONEncoder(default=_json_default, allow_nan=False)  # one, for every line


def dumps(obj: Any, **kw: Any) -> str:
    """JSON text; numpy values and paths converted; NaN and infinity refused (not JSON).

    Without options one shared encoder does it (a window line per hop: json.dumps with
    options would build an encoder per call); the text is json.dumps's own.

    Parameters
    ----------
    obj : object
        Dicts, lists, numbers, strings, None, numpy scalars and arrays, paths.
    **kw
        Options of `json.dumps` (``indent``); without them the shared encoder is used.

    Returns
    -------
    str
        The JSON text.

    Raises
    ------
    ValueError
        A float that is NaN or infinite (JSON has no such number, RFC 8259).
    """
    if not kw:
        return _ENCODER.encode(obj)
    return json.dumps(obj, default=_json_default, allow_nan=False, **kw)


LEAN_SHA256_BYTES = 1 << 20  # below this, CPython's own sha256 beats loading OpenSSL


def sha256_hex(data: bytes) -> str:
    """Hex sha256 of `data` (a snippet's audio).

    Parameters
    ----------
    data : bytes
        The bytes.

    Returns
    -------
    str
        64 hex digits.
    """
    h = _sha256(len(data))
    h.update(data)
    return h.hexdigest()


def file_sha256(path: str | Path) -> str:
    """Hex sha256 of a file, read in 1 MiB blocks (the model and audio fingerprints).

    Parameters
    ----------
    path : str or Path
        The file.

    Returns
    -------
    str
        64 hex digits.
    """
    with open(path, "rb") as f:
        h = _sha256(os.fstat(f.fileno()).st_size)
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _sha256(size: int) -> Any:
    """A new sha256 object for `size` bytes: CPython's own below 1 MiB, else hashlib's.

    Importing hashlib loads OpenSSL: about 2.5 ms of a session's start-up, for a model of
    tens of kB. CPython's built-in module gives the same digest at about 3 ms a MiB against
    OpenSSL's 0.5, so it is the quicker one below about 1 MiB (CPython's ``random`` takes
    its sha512 the same way, as hashlib "is pretty heavy to load"); where it is missing,
    hashlib's is used.
    """
    if size < LEAN_SHA256_BYTES:
        try:
            from _sha256 import sha256  # CPython up to 3.11
        except ImportError:
            try:
                from _sha2 import sha256  # CPython 3.12 on
            except ImportError:
                sha256 = None
        if sha256 is not None:
            return sha256()
    import hashlib

    return hashlib.sha256()


def read_regular_bytes(path: Path, *, inside: Path | None = None) -> bytes:
    """The bytes of a regular file, opened without following a symbolic link.

    Parameters
    ----------
    path : Path
        The file.
    inside : Path, optional
        A folder the file must lie in (after resolving the folders above it).

    Raises
    ------
    OSError
        Not a regular file (a link, a FIFO, a device), outside `inside`, or unreadable;
        ``errno`` says which.

    Returns
    -------
    bytes
        The whole file.

    Raises
    ------
    OSError
        Missing, a link (ELOOP), not a regular file, outside `inside`, or unreadable.
    """
    path = Path(path)
    if inside is not None:
        root = Path(inside).resolve()
        parent = path.parent.resolve()
        if parent != root and root not in parent.parents:
            raise OSError(errno.EXDEV, "lies outside the session", str(path))
    fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW | os.O_NONBLOCK)
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            raise OSError(errno.EINVAL, "not a regular file", str(path))
        with os.fdopen(fd, "rb") as f:
            fd = -1
            return f.read()
    finally:
        if fd >= 0:
            os.close(fd)


def is_regular_file(path: Path) -> bool:
    """True for a regular file that is not a symbolic link.

    Parameters
    ----------
    path : Path
        The path to look at (a link is not followed).

    Returns
    -------
    bool
        True for a regular file reached without a link.
    """
    try:
        return stat.S_ISREG(os.lstat(path).st_mode)
    except OSError:
        return False


def terminal_safe(text: str, *, one_line: bool = False) -> str:
    """`text` from files someone else may have written, fit for a terminal: line breaks and
    tabs kept, every other unprintable character (an escape sequence's ESC, a carriage
    return) written as ``\\xNN`` so a label cannot move the cursor or recolour the screen.

    Parameters
    ----------
    text : str
        What to show.
    one_line : bool
        Write line breaks and tabs as ``\\xNN`` too (a label inside a line of output).

    Returns
    -------
    str
        The text with its unprintable characters spelled out.
    """
    if text.isprintable():
        return text
    keep = "" if one_line else "\n\t"
    return "".join(c if c.isprintable() or c in keep else
                   (f"\\x{ord(c):02x}" if ord(c) < 256 else f"\\u{ord(c):04x}") for c in text)


SESSION_FILES = ("session.json", "windows.jsonl", "windows.b.jsonl", "summary.json",
                 "audio.wav", "truth.tsv")


def check_output(out: Path, what: str, ours: Callable[[Path], bool]) -> None:
    """Refuse to write the file `out` over anything but an earlier `what` of ours.

    Parameters
    ----------
    out : Path
        The file a command is about to write (atomically).
    what : str
        What it is, for the message ("a report", "a profile").
    ours : callable
        ``ours(out) -> bool`` for an existing regular file: True when scenemon wrote it as
        `what` (a mark at its start, the members of its archive, ...).

    Raises
    ------
    ScenemonError
        `out` is a link or not a regular file, lies among a session's own files (its audio,
        windows, truth), or exists and is not ours.
    """
    from monitor.base.errors import ScenemonError

    if out.is_symlink() or (out.exists() and not out.is_file()):
        raise ScenemonError(f"{out}: exists and is not a regular file; choose another name")
    if (out.parent / "session.json").is_file() and (out.name in SESSION_FILES
                                                     or out.suffix.lower() in (".wav", ".jsonl")):
        raise ScenemonError(f"{out}: is one of a session's own files; choose another name")
    if out.exists() and not ours(out):
        raise ScenemonError(f"{out}: exists and is not {what} scenemon wrote; choose another "
                            f"name")


def starts_with(mark: str) -> Callable[[Path], bool]:
    """An `ours` test for `check_output`: the file's first 256 bytes hold `mark`.

    Parameters
    ----------
    mark : str
        Text an output of ours always holds near its start.

    Returns
    -------
    callable
        ``ours(path) -> bool`` for `check_output`.
    """
    def test(path: Path) -> bool:
        try:
            with open(path, "rb") as f:
                return mark.encode() in f.read(256)
        except OSError:  # unreadable: not known to be ours, so not written over
            return False
    return test


# --- audio segments ------------------------------------------------------------------------
def segment_name(k: int) -> str:
    """audio.wav, then audio-0001.wav, audio-0002.wav, ...

    Parameters
    ----------
    k : int
        The segment's number, from 0.

    Returns
    -------
    str
        Its file name.
    """
    return "audio.wav" if k == 0 else f"audio-{k:04d}.wav"


def audio_segments(session_dir: Path) -> list[Path]:
    """A session's audio files in order (session.json lists them; else what is there).

    Parameters
    ----------
    session_dir : Path
        The session directory.

    Returns
    -------
    list of Path
        The audio segment files that exist, in recording order.
    """
    d = Path(session_dir)
    try:
        names = json.loads((d / "session.json").read_text(encoding="utf-8")).get("audio_segments")
    except (OSError, ValueError, AttributeError):
        names = None
    if not isinstance(names, list) or not all(isinstance(n, str) for n in names) or not names:
        names = ["audio.wav"] + sorted(p.name for p in d.glob("audio-[0-9][0-9][0-9][0-9].wav"))
    names = [n for n in names if n == Path(n).name]  # a bare file name, never a path
    return [d / n for n in names if is_regular_file(d / n)]


# --- the writing process's lock ------------------------------------------------------------
class SessionLock:
    """An exclusive ``flock`` on ``SESSION/.lock`` while a process writes the session.

    The kernel drops the lock when the process dies (even by ``kill -9``), so "locked"
    means "being written right now".

    Parameters
    ----------
    session_dir : Path
        The session directory whose ``.lock`` is held.
    """

    def __init__(self, session_dir: Path) -> None:
        self.path = Path(session_dir) / LOCK_NAME
        self._fd: int | None = None

    def acquire(self) -> None:
        """Take the lock without waiting and write this process's id into the lock file.

        Raises
        ------
        OSError
            Another process holds the lock, or the lock file cannot be opened (a symbolic link
            there is refused, never followed).
        """
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            raise
        os.ftruncate(fd, 0)
        os.write(fd, f"{os.getpid()}\n".encode())
        self._fd = fd

    def release(self) -> None:
        """Remove the lock file, then close it (which drops the lock); a no-op when not held."""
        if self._fd is not None:
            with contextlib.suppress(OSError):
                os.unlink(self.path)
            os.close(self._fd)
            self._fd = None


def session_is_live(session_dir: Path) -> bool:
    """True while another process holds the session's lock (it is still being written).

    Parameters
    ----------
    session_dir : Path
        The session directory.

    Returns
    -------
    bool
        True when a live process holds its ``.lock``.
    """
    path = Path(session_dir) / LOCK_NAME
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NOFOLLOW)
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except OSError:
        return True
    finally:
        os.close(fd)
    return False
