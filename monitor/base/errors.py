"""The one exception tree of scenemon, and the one place that maps outcomes to exit codes.

Every message names the file (when there is one), the value, and the rule it breaks, so
the command line can print it as one sentence and exit with code 2.
"""

from __future__ import annotations

import errno
from enum import IntEnum

# an output the user named cannot be written: a sentence and exit code 2, as for a bad path
OUTPUT_ERRNOS = frozenset({errno.EROFS, errno.EACCES, errno.EPERM, errno.ENOSPC, errno.EDQUOT,
                           errno.ENAMETOOLONG, errno.ENOTDIR, errno.EISDIR, errno.ELOOP})


class ExitCode(IntEnum):
    """What a `scenemon` command returns to the shell."""

    OK = 0
    FAILURE = 1  # a runtime failure: a device lost, a disk full, a model fault
    BAD_INPUT = 2  # a file, card or flag that cannot be used
    INTERRUPTED = 130  # Ctrl-C outside a session (a session closes cleanly and returns OK)


class ScenemonError(Exception):
    """Root of every error scenemon raises on purpose (bad input: exit code 2)."""


class CardError(ScenemonError):
    """The model card (sidecar TOML) is missing, malformed or inconsistent."""


class AudioError(ScenemonError):
    """An audio file or stream cannot be used."""


class ModelError(ScenemonError):
    """A model file cannot be loaded, or does not fit its card."""


class TruthError(ScenemonError):
    """A truth annotation file is malformed."""


class DeviceError(ScenemonError):
    """An audio device cannot be found or opened."""


class SessionError(ScenemonError):
    """A session directory cannot be written or read."""


class SourceFailed(Exception):
    """The source thread died with an unexpected error (a runtime failure, exit 1)."""


def exit_code_for(exc: BaseException | None) -> ExitCode:
    """The exit code of a command that ended with `exc` (None: it ended normally).

    Parameters
    ----------
    exc : BaseException or None
        What stopped the command.

    Returns
    -------
    ExitCode
        BAD_INPUT for a `ScenemonError` and for a file that cannot be written there (a
        read-only or full file system, no permission, a name too long), INTERRUPTED for
        Ctrl-C, FAILURE for anything else.
    """
    if exc is None:
        return ExitCode.OK
    if isinstance(exc, ScenemonError):
        return ExitCode.BAD_INPUT
    if isinstance(exc, OSError) and exc.errno in OUTPUT_ERRNOS:
        return ExitCode.BAD_INPUT
    if isinstance(exc, KeyboardInterrupt):
        return ExitCode.INTERRUPTED
    return ExitCode.FAILURE


def one_sentence(exc: BaseException) -> str:
    """The line the command line prints for `exc` (after ``scenemon: ``).

    Parameters
    ----------
    exc : BaseException
        What stopped the command.

    Returns
    -------
    str
        The message of a `ScenemonError` (or of a runtime failure whose class says its message
        is one sentence: ``one_sentence = True``); for a file that cannot be written, the file
        and the system's reason; for anything else its type and text, with a pointer to
        ``--debug``.
    """
    if isinstance(exc, ScenemonError) or getattr(exc, "one_sentence", False):
        return str(exc)
    if isinstance(exc, OSError) and exc.errno in OUTPUT_ERRNOS:
        where = exc.filename if exc.filename is not None else "an output file"
        return f"{where}: cannot be written ({exc.strerror or exc})"
    return f"{type(exc).__name__}: {exc} (run with --debug for details)"


def summary_failure(summary: dict | None) -> str | None:
    """The runtime failure a finished session reports, if any (exit code 1).

    Parameters
    ----------
    summary : dict or None
        summary.json's content.

    Returns
    -------
    str or None
        The lost source, the write error or the model fault it records; None when it ran cleanly.
    """
    if not summary:
        return None
    return summary.get("source_failure") or summary.get("write_error") \
        or summary.get("model_fault")
