"""The front end's stages, one small module each, with its config (its card keys) and code.

Owns: `keys` (how a config declares its card keys, the bounds, the ``[audio]`` table),
`base` (`Stage`), one module per stage (pcm, preemphasis, centre, framing, window,
spectrum, mel, log, dct, layout, scaling), `ctext` (the C header's pieces) and `registry`
(`STAGES`, `KINDS`, `FrontendConfig`, `frontend_from_table`, `build_stages`).
May import: ``monitor.base``, ``monitor.sound`` (16-bit PCM) and ``monitor.features.dsp``.
The names most callers need are re-exported here.
"""

from monitor.features.stages.base import Kind, Part, Stage
from monitor.features.stages.ctext import c_define, c_floats, c_ints, cfloat, sparse_bank
from monitor.features.stages.keys import (
    MAX_BANDS,
    MAX_FFT,
    MAX_SAMPLES,
    MAX_WORK,
    NO_OFF,
    PER_WINDOW_EPS,
    REQUIRED,
    AudioConfig,
    CardProblem,
    Key,
    audio_from_table,
    key,
    keys_of,
    nearest,
    show_value,
)
from monitor.features.stages.registry import (
    KINDS,
    SCALING_KEYS,
    STAGES,
    FrontendConfig,
    build_stages,
    frontend_from_table,
)
from monitor.features.stages.scaling import ScalingConfig

__all__ = [
    "MAX_BANDS", "MAX_FFT", "MAX_SAMPLES", "MAX_WORK", "NO_OFF", "PER_WINDOW_EPS", "REQUIRED",
    "AudioConfig", "CardProblem", "Key", "Kind", "Part", "Stage", "KINDS", "SCALING_KEYS",
    "STAGES", "FrontendConfig", "ScalingConfig", "audio_from_table", "build_stages", "c_define",
    "c_floats", "c_ints", "cfloat", "frontend_from_table", "key", "keys_of", "nearest",
    "show_value", "sparse_bank",
]
