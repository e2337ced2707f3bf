"""The one exception tree of scenemon.

Every message names the file (when there is one), the value, and the rule it breaks, so
the command line can print it as one sentence and exit with code 2.
"""

from __future__ import annotations


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
