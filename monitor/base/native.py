"""Helpers around native libraries: silencing those that print on fd 2 (LiteRT, libsndfile's
decoders), and the one call each to a private API of soundfile, sounddevice and LiteRT
where the public one cannot do the job (each says why)."""

from __future__ import annotations

import contextlib
import os


@contextlib.contextmanager
def quiet_native_stderr():
    """Silence C/C++ chatter written straight to file descriptor 2 (a LiteRT delegate banner,
    an MP3 decoder's complaints): scenemon says what went wrong in one sentence itself.
    Under ``--debug`` (`DEBUG`) nothing is silenced.

    Yields
    ------
    None
        While the block runs, fd 2 points at /dev/null (unless ``--debug``).
    """
    if DEBUG:
        yield
        return
    try:
        saved = os.dup(2)
    except OSError:
        yield
        return
    try:
        with open(os.devnull, "wb") as null:
            os.dup2(null.fileno(), 2)
            yield
    finally:
        os.dup2(saved, 2)
        os.close(saved)


@contextlib.contextmanager
def screen_owns_the_terminal():
    """While a full-screen UI runs, it draws on its own copy of the terminal and fd 2 points
    at /dev/null, so native libraries' chatter, and the fd-2 redirects made around loading a
    model or opening a file on other threads, never touch or swallow the screen.

    textual's Linux driver draws on ``sys.__stderr__`` (read when the app and its driver are
    made): for the duration it is a file on a duplicate of fd 2. With ``--debug`` nothing
    changes (the chatter is then wanted, screen or not).

    Yields
    ------
    None
        While the UI runs; the terminal and fd 2 are restored afterwards.
    """
    import sys

    old = sys.__stderr__
    if DEBUG or old is None:
        yield
        return
    try:
        old.flush()
        saved = os.dup(2)
    except (OSError, ValueError):
        yield
        return
    screen = os.fdopen(os.dup(2), "w", encoding=old.encoding, errors=old.errors)
    python_stderr = sys.stderr
    try:
        with open(os.devnull, "wb") as null:
            os.dup2(null.fileno(), 2)
        # Python's own error output (textual prints a crash's traceback there once the
        # screen is restored) goes to the terminal too: only native writes on fd 2 are lost
        sys.__stderr__ = sys.stderr = screen
        yield
    finally:
        sys.__stderr__, sys.stderr = old, python_stderr
        with contextlib.suppress(OSError, ValueError):
            screen.close()
        os.dup2(saved, 2)
        os.close(saved)


# libsndfile's SFC_UPDATE_HEADER_NOW command: rewrite a WAV header to match the data so far.
# soundfile has no public call for it (its flush() only fsyncs and leaves the header stale),
# so this reaches into soundfile's cffi handle; it is the one place that does.
_SFC_UPDATE_HEADER_NOW = 0x1060


def update_wav_header(sound_file) -> None:
    """Bring an open `soundfile.SoundFile`'s header up to the frames written so far.

    Raises
    ------
    OSError
        When libsndfile refuses (the disk is full, the file is gone).

    Parameters
    ----------
    sound_file : soundfile.SoundFile
        A WAV file open for writing.
    """
    import soundfile as sf

    if sf._snd.sf_command(sound_file._file, _SFC_UPDATE_HEADER_NOW, sf._ffi.NULL, 0):
        raise OSError("libsndfile could not update the WAV header")


def reinitialise_portaudio(sd) -> None:
    """Make PortAudio scan its devices again (a replugged microphone gets a new index).

    sounddevice has no public call for this: its device list is fixed at import, and only its
    private `_terminate` / `_initialize` pair re-runs PortAudio's `Pa_Initialize`.

    Parameters
    ----------
    sd : module
        The imported sounddevice module.
    """
    sd._terminate()
    sd._initialize()


def litert_nodes(interp) -> list[dict]:
    """Every node of a LiteRT interpreter's graph, in execution order: ``op_name``, ``index``,
    ``inputs`` and ``outputs`` (tensor indices; -1 for an optional input left out).

    LiteRT's public interpreter API lists tensors (``get_tensor_details``), inputs, outputs
    and signatures, but not the graph's nodes; only its private ``_get_ops_details`` does,
    so this is the one place that calls it (`budget` counts each layer's work from it).

    Parameters
    ----------
    interp : ai_edge_litert.interpreter.Interpreter
        A loaded interpreter.

    Returns
    -------
    list of dict
        One dict per node, in execution order.
    """
    return list(interp._get_ops_details())


DEBUG = False  # --debug: native chatter is shown, not swallowed


def quiet_tensorflow(debug: bool = False) -> None:
    """Keep TensorFlow's, absl's and XLA's start-up chatter off the terminal (unless --debug).

    Only environment variables: nothing is imported here (a .tflite model never loads
    TensorFlow). They must be set before TensorFlow's first import to take effect.

    Parameters
    ----------
    debug : bool
        Leave the chatter on (``--debug``).
    """
    global DEBUG
    DEBUG = debug
    if not debug:
        os.environ["TF_CPP_MIN_LOG_LEVEL"] = "3"
        os.environ.setdefault("ABSL_MIN_LOG_LEVEL", "3")  # absl's C++ logging
        os.environ.setdefault("GRPC_VERBOSITY", "ERROR")


def silence_absl() -> None:
    """absl's Python logger (used by TensorFlow's converter) to errors only."""
    try:
        import absl.logging

        absl.logging.set_verbosity(absl.logging.ERROR)
    except ImportError:
        pass


# glibc's mallopt parameters (malloc.h)
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
HEAP_KEEP_BYTES = 64 << 20


def keep_freed_memory(limit: int = HEAP_KEEP_BYTES) -> bool:
    """Let glibc's heap keep and reuse freed blocks below `limit` bytes.

    By default glibc gives every block of 128 KiB or more its own mmap and unmaps it when
    freed, so the front end's per-batch arrays (a few hundred KiB each) fault in fresh
    zeroed pages on every batch: on this machine's VM that doubled the front end's time
    in fast replay. Raising the mmap and trim thresholds (mallopt(3)) keeps those pages.
    Memory stays flat: the same few blocks are reused. Returns False where there is no
    glibc (macOS, musl), which changes nothing but speed.

    Parameters
    ----------
    limit : int
        Bytes: freed blocks below this size stay in the heap.

    Returns
    -------
    bool
        True when glibc took the setting (False elsewhere).
    """
    import ctypes

    try:  # the C library the interpreter itself is linked with (no search for its file)
        mallopt = ctypes.CDLL(None).mallopt
    except (OSError, AttributeError):
        return False
    return bool(mallopt(_M_MMAP_THRESHOLD, limit)) and bool(mallopt(_M_TRIM_THRESHOLD, 2 * limit))
