"""The stage registry: `STAGES`, the kinds (`KINDS`, a kind is a list of stages), the
``[frontend]`` table (`FrontendConfig`, `frontend_from_table`) and `build_stages`."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from monitor.base.records import record
from monitor.features.stages.base import Kind, Stage
from monitor.features.stages.centre import CentreConfig, CentreStage
from monitor.features.stages.dct import DctConfig, DctStage
from monitor.features.stages.framing import FramingConfig, FramingStage
from monitor.features.stages.keys import (
    NO_OFF,
    REQUIRED,
    AudioConfig,
    CardProblem,
    Key,
    keys_of,
    nearest,
    show_value,
)
from monitor.features.stages.layout import LayoutConfig, LayoutStage
from monitor.features.stages.log import LogConfig, LogStage
from monitor.features.stages.mel import MelConfig, MelStage
from monitor.features.stages.pcm import PcmConfig, PcmStage
from monitor.features.stages.preemphasis import PreemphasisConfig, PreemphasisStage
from monitor.features.stages.scaling import ScalingConfig, ScalingStage
from monitor.features.stages.spectrum import SpectrumConfig, SpectrumStage
from monitor.features.stages.window import WindowConfig, WindowStage


@record
class FrontendConfig:
    """The ``[frontend]`` table: the kind, and one config per stage (None when the kind
    does not run the stage).

    Attributes
    ----------
    kind : {"waveform", "spectrogram", "logmel", "mfcc"}
        The front end's kind (its list of stages).
    pcm, preemphasis : config
        The configs of the stages every kind runs.
    centre, framing, window, spectrum, mel, log, dct, layout : config or None
        The configs of the other stages, None where the kind does not run them.
    """

    kind: Kind
    pcm: PcmConfig
    preemphasis: PreemphasisConfig
    centre: CentreConfig | None = None
    framing: FramingConfig | None = None
    window: WindowConfig | None = None
    spectrum: SpectrumConfig | None = None
    mel: MelConfig | None = None
    log: LogConfig | None = None
    dct: DctConfig | None = None
    layout: LayoutConfig | None = None

    def stage_configs(self) -> list[tuple[str, Any]]:
        """(stage name, config) of the stages the kind runs, in order (scaling aside)."""
        return [(n, getattr(self, n)) for n in KINDS[self.kind] if n != "scaling"]

    def settings(self) -> dict[str, Any]:
        """The table as flat key = value pairs (the keys of the stages the kind runs)."""
        out: dict[str, Any] = {"kind": self.kind}
        for _, cfg in self.stage_configs():
            out.update({k: getattr(cfg, k) for k in keys_of(type(cfg))})
        return out

    def pad(self) -> int:
        """Samples of centre padding on each side of a window (0 without it)."""
        return self.centre.pad(self) if self.centre is not None else 0

    def frames(self, audio: AudioConfig) -> int:
        """Frames per window (0 for a kind without frames)."""
        if self.framing is None:
            return 0
        return self.framing.frames(audio.window_samples + 2 * self.pad())

    def bands(self) -> int:
        """Values per frame of the features (1 for a kind without frames)."""
        width = 1
        for name, cfg in self.stage_configs():
            width = STAGES[name].width(cfg, self, width)
        return width

    def band_name(self) -> str:
        """What the values of a frame are: "bins", "bands", "coefficients" ("samples")."""
        name = "samples"
        for stage, _ in self.stage_configs():
            name = STAGES[stage].band_name or name
        return name

    def time_major_shape(self, audio: AudioConfig) -> tuple[int, ...]:
        """One window's features before layout: ``(frames, bands)``, or ``(samples,)``."""
        if self.framing is None:
            return (audio.window_samples,)
        return (self.frames(audio), self.bands())

    def shape(self, audio: AudioConfig) -> tuple[int, ...]:
        """One window's model input, without batch or channel axis."""
        shape = self.time_major_shape(audio)
        if self.layout is not None and self.layout.layout == "mel_time":
            return shape[::-1]
        if self.layout is not None and self.layout.layout == "flat":
            return (shape[0] * shape[1],)
        return shape


def frontend_from_table(table: dict[str, Any], audio: AudioConfig) -> FrontendConfig:
    """Validate a ``[frontend]`` table (see `Key`); CardProblem names the key and the rule.

    Every key of a stage the kind runs is checked and a missing one that changes the numbers
    is refused; a key of a stage it does not run may only carry its off value (one without an
    off value is refused there at any value, naming the kind); an unknown key
    is refused with the nearest known one; then each stage checks its combinations.

    Parameters
    ----------
    table : dict
        The ``[frontend]`` table as parsed.
    audio : AudioConfig
        The validated ``[audio]`` table (some rules need the window).

    Returns
    -------
    FrontendConfig
        The validated table.

    Raises
    ------
    CardProblem
        A key that is unknown, missing, of the wrong type or value, set for a stage the kind
        does not run, or a combination that breaks a stage's rule.
    """
    if "kind" not in table:
        raise CardProblem(f"frontend.kind is missing: it must be one of {', '.join(KINDS)}")
    kind = Key(str, "", choices=tuple(KINDS)).check("frontend.kind", table["kind"])
    known = {"kind"}
    for st in STAGES.values():
        if st.config is not None and st.name != "scaling":
            known.update(keys_of(st.config))
    for name in table:
        if name not in known:
            raise CardProblem(f"frontend.{name} is not a card key{nearest(name, known)}")
    used = KINDS[kind]
    runs = {}
    for st in STAGES.values():
        if st.config is None or st.name == "scaling":
            continue
        ks = keys_of(st.config)
        values: dict[str, Any] = {}
        for name, k in ks.items():
            label = f"frontend.{name}"
            given = name in table
            if st.name not in used:
                if given and not k.is_off(table[name]):
                    k.check(label, table[name])
                    users = ", ".join(f'"{n}"' for n, s in KINDS.items() if st.name in s)
                    fix = "remove it" + (f" or set it to {show_value(k.off)}"
                                         if k.off is not NO_OFF else "")
                    raise CardProblem(f"{label}={show_value(table[name])} has no effect with "
                                      f"kind = \"{kind}\" (the {st.name} stage runs in kind "
                                      f"{users}); {fix}")
                continue
            needed = k.needs is None or values.get(k.needs) is True
            if not given:
                if k.default is REQUIRED or (k.needs and needed):
                    raise CardProblem(_missing(label, k, kind, k.needs))
                values[name] = k.default
                continue
            value = k.check(label, table[name])
            if not needed and value != k.off:
                raise CardProblem(f"{label}={show_value(value)} needs {k.needs} = true")
            values[name] = value
        if st.name in used:
            runs[st.name] = st.config(**values)
    fe = FrontendConfig(kind=kind, **runs)
    for _name, cfg in fe.stage_configs():
        check: Callable | None = getattr(cfg, "check", None)
        if check is not None:
            check(fe, audio)
    return fe


def _missing(label: str, k: Key, kind: str, needs: str | None) -> str:
    why = f"{needs} = true needs it" if needs else f"kind = \"{kind}\" needs it"
    return f"{label} is missing: {why} and it has no default ({k.allowed()})"


STAGES: dict[str, type[Stage]] = {s.name: s for s in (
    PcmStage, PreemphasisStage, CentreStage, FramingStage, WindowStage, SpectrumStage,
    MelStage, LogStage, DctStage, LayoutStage, ScalingStage)}

_FRAMES = ("pcm", "preemphasis", "centre", "framing", "window", "spectrum")
KINDS: dict[str, tuple[str, ...]] = {
    "waveform": ("pcm", "preemphasis", "scaling"),
    "spectrogram": (*_FRAMES, "log", "layout", "scaling"),
    "logmel": (*_FRAMES, "mel", "log", "layout", "scaling"),
    "mfcc": (*_FRAMES, "mel", "log", "dct", "layout", "scaling"),
}


def build_stages(audio: AudioConfig, fe: FrontendConfig, scaling: ScalingConfig) -> list[Stage]:
    """The stages of the front end's kind, built (active or not), in order.

    Parameters
    ----------
    audio : AudioConfig
        The card's ``[audio]`` table.
    fe : FrontendConfig
        The card's ``[frontend]`` table.
    scaling : ScalingConfig
        The card's ``[scaling]`` table.

    Returns
    -------
    list of Stage
        One built stage per stage of the kind.
    """
    return [STAGES[name](audio, fe, scaling) for name in KINDS[fe.kind]]


SCALING_KEYS = ("mean", "std", *keys_of(ScalingConfig))
