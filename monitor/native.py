"""Helpers around native libraries (LiteRT, libsndfile's decoders) that print on fd 2."""

from __future__ import annotations

import contextlib
import os


@contextlib.contextmanager
def quiet_native_stderr():
    """Silence C/C++ chatter written straight to file descriptor 2 (a LiteRT delegate banner,
    an MP3 decoder's complaints): scenemon says what went wrong in one sentence itself."""
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
