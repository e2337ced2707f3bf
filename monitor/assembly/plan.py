"""What a command asks for, as plain frozen data: the plan `assemble` turns into a session.

A command (or a test, or the UI) builds a `SessionPlan` from its flags once; nothing here
loads, opens or checks a file. `assemble.run_session(plan)` does all of that, in one place.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from monitor.base.records import record
from monitor.session.capture import CaptureSettings

if TYPE_CHECKING:
    from monitor.session.runfolder import Keep

DEFAULT_SEGMENT_S = 3600.0


@record
class ModelPlan:
    """One model: its file, its card (None: the card beside it) and the runtime.

    Attributes
    ----------
    path : Path
        The model file.
    card : Path or None
        Its card (None: the card beside it).
    runtime : str
        "litert" or "micro" for a ``.tflite``.
    trust : bool
        Allow Keras Lambda layers.
    """

    path: Path
    card: Path | None = None
    runtime: str = "litert"  # "litert" | "micro" for .tflite; Keras always runs in TensorFlow
    trust: bool = False  # allow Keras Lambda layers (their code runs on loading)


@record
class FileInput:
    """A recording replayed through the chain.

    Attributes
    ----------
    path : Path
        The recording.
    realtime : bool
        Pace it at real time (else as fast as the CPU allows).
    allow_upsample : bool
        Accept a rate below the model's.
    speed : float
        With `realtime`, the pace's clock runs this many times faster (a simulated long run).
    """

    path: Path
    realtime: bool = True  # paced as a microphone; False: as fast as the CPU allows
    allow_upsample: bool = False
    speed: float = 1.0


@record
class MicInput:
    """An input device (PortAudio).

    Attributes
    ----------
    device : str or None
        An index or part of a name; None: the preferred default.
    latency : str or float
        PortAudio's suggested latency ("high", "low" or seconds).
    blocksize : int or None
        Frames per callback (None: about 50 ms; 0: PortAudio's choice).
    seconds : float or None
        Stop after this much audio.
    reopen_tries : int
        Tries to reopen a lost device by name before the session ends.
    reopen_wait_s : float
        The longest wait between two tries (they double from 1 s).
    """

    device: str | None = None  # an index or part of a name; None: the preferred default
    latency: str | float = "high"
    blocksize: int | None = None  # None: about 50 ms; 0: PortAudio's choice
    seconds: float | None = None  # stop after this much audio
    reopen_tries: int = 3  # about 2 s; a field run waits longer within its session
    reopen_wait_s: float = 1.0


@record
class OutputPlan:
    """Where and what the session writes.

    Attributes
    ----------
    dir : Path or None
        The session directory (None: a new one under recordings/).
    name : str
        The session's name in a new directory's name.
    audio : bool
        Keep the audio.
    segment_s : float
        Seconds per audio file.
    """

    dir: Path | None = None  # None: recordings/<date>-<time>-<name>
    name: str = "session"
    audio: bool = True
    segment_s: float = DEFAULT_SEGMENT_S


@record
class SessionPlan:
    """Everything one session needs (see module docstring).

    ``decision`` holds only the decision settings given on the command line (the rest come
    from each card's ``[decision]`` table); ``capture`` None turns capture off.

    Attributes
    ----------
    source : FileInput, MicInput or Source
        What to listen to.
    models : tuple of ModelPlan
        One model, or two (A, B).
    output : OutputPlan
        Where and what to write.
    decision : dict
        Decision settings from the command line.
    capture : CaptureSettings or None
        When snippets are taken (None: never).
    truth : Path or None
        A truth file.
    live_truth : bool
        The truth is told with keys.
    keep_features : bool
        Each window's features travel to the observers.
    prepare : callable or None
        Run before the source opens (making the demo tour).
    prepare_note : str
        Shown while `prepare` runs.
    """

    source: FileInput | MicInput | Any  # or a built `engine.Source` (tests, embedding programs)
    models: tuple[ModelPlan, ...]
    output: OutputPlan = field(default_factory=OutputPlan)
    decision: dict[str, Any] = field(default_factory=dict)
    capture: CaptureSettings | None = field(default_factory=CaptureSettings)
    truth: Path | None = None
    live_truth: bool = False  # the truth comes from key presses (the terminal UI)
    keep_features: bool = False  # each window's features travel to the observers
    prepare: Callable[[], None] | None = field(default=None, compare=False)
    prepare_note: str = "preparing the input …"  # shown while `prepare` runs


def _no_budget() -> Keep:
    """An unlimited `Keep`: the run folder's module is imported by a field run only."""
    from monitor.session.runfolder import Keep

    return Keep()


@record
class FieldPlan:
    """An unattended run: sessions one after another in a run folder (`assembly.field`).

    Attributes
    ----------
    run : Path
        The run folder.
    session : SessionPlan
        Each session's plan (its output's folder is chosen by the run).
    keep : Keep
        The disk budget.
    session_s : float
        Seconds of audio per session before the next one starts (a live input).
    status_every_s : float
        Seconds between rewrites of ``status.json``.
    reserve_bytes : int
        Free space left to the rest of the disk: below it, audio stops (window lines go on).
    max_backoff_s : float
        The longest wait between attempts to reopen a lost input device.
    sessions : int or None
        Stop after this many sessions (None: until stopped); a test's or benchmark's bound.
    """

    run: Path
    session: SessionPlan
    keep: Keep = field(default_factory=_no_budget)
    session_s: float = 86400.0
    status_every_s: float = 5.0
    reserve_bytes: int = 200 * 10**6
    max_backoff_s: float = 60.0
    sessions: int | None = None
