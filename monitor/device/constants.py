"""`frontend_constants.h`: everything the C front end needs for one model card.

Our own format, plain C99: every size as a ``#define`` (``SM_*``), the window
coefficients, the mel filterbank as a sparse table (per band the first FFT bin and the
number of weights, then all weights packed in one array, as embedded DSP libraries store
it), the scaling arrays (``SM_SCALE_MODE`` 0: one value, 1: per mel band, 2: the full
feature shape in the model's input order) and the class names.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from monitor.card import ModelCard
from monitor.frontend import FrontEnd

LOG_KIND = {"ln": 0, "log10": 1, "db": 2}


def sparse_bank(weights: np.ndarray) -> tuple[list[int], list[int], np.ndarray]:
    """(first bins, lengths, packed weights) of a (bands, bins) filterbank."""
    first, length, packed = [], [], []
    for row in weights:
        nz = np.flatnonzero(row)
        if nz.size == 0:
            first.append(0)
            length.append(0)
            continue
        a, b = int(nz[0]), int(nz[-1]) + 1
        first.append(a)
        length.append(b - a)
        packed.append(row[a:b])
    return first, length, (np.concatenate(packed) if packed else np.zeros(0, np.float32))


def cfloat(v: float) -> str:
    """A C float literal: 9 significant digits, always with a point or an exponent."""
    text = f"{float(v):.9g}"
    if not any(ch in text for ch in ".eEn"):
        text += ".0"
    return text + "f"


def _floats(name: str, values, per_line: int = 8) -> str:
    vals = [cfloat(v) for v in np.asarray(values, dtype=np.float32).reshape(-1)]
    body = ",\n".join("    " + ", ".join(vals[i:i + per_line]) for i in range(0, len(vals), per_line))
    return f"static const float {name}[{len(vals)}] = {{\n{body}\n}};\n"


def _ints(name: str, ctype: str, values, per_line: int = 12) -> str:
    vals = [str(int(v)) for v in values]
    body = ",\n".join("    " + ", ".join(vals[i:i + per_line]) for i in range(0, len(vals), per_line))
    return f"static const {ctype} {name}[{len(vals)}] = {{\n{body}\n}};\n"


def scaling_tables(card: ModelCard) -> tuple[int, np.ndarray, np.ndarray]:
    mean, std = np.asarray(card.mean, np.float32), np.asarray(card.std, np.float32)
    shape = card.feature_shape
    if mean.size == 1 and std.size == 1:
        return 0, mean.reshape(1), (1.0 / std).reshape(1)
    if mean.size == card.mel_bands and std.size == card.mel_bands and mean.size != np.prod(shape):
        return 1, mean.reshape(-1), (1.0 / std).reshape(-1)
    full_m = np.broadcast_to(mean, shape).reshape(-1)
    full_s = np.broadcast_to(std, shape).reshape(-1)
    return 2, full_m, (1.0 / full_s)


def header(card: ModelCard, *, model_sha256: str | None = None) -> str:
    if card.kind != "logmel":
        raise ValueError("the C front end computes log-mel features; this card is a waveform model")
    fe = FrontEnd(card)
    first, length, packed = sparse_bank(fe.mel_t.T)
    mode, mean, inv_std = scaling_tables(card)
    names = ", ".join('"' + c.replace("\\", "\\\\").replace('"', '\\"') + '"' for c in card.classes)
    lines = [
        "/* frontend_constants.h: written by `scenemon vectors` for one model card.",
        f" * card: {Path(card.name).name}" + (f"\n * model sha256: {model_sha256}"
                                             if model_sha256 else ""),
        f" * {card.mel_scale} mel scale, {card.mel_triangles} triangles, norm {card.mel_norm}, "
        f"{card.window} window{' (symmetric)' if card.window_symmetric else ''}, power "
        f"{card.power:g}, log {card.log} */",
        "#ifndef SCENEMON_FRONTEND_CONSTANTS_H", "#define SCENEMON_FRONTEND_CONSTANTS_H", "",
        "#include <stdint.h>", "",
        f"#define SM_SAMPLE_RATE {card.sample_rate}",
        f"#define SM_WINDOW_SAMPLES {card.window_samples}",
        f"#define SM_HOP_SAMPLES {card.hop_samples}",
        f"#define SM_FRAME_LENGTH {card.frame_length}",
        f"#define SM_FRAME_STEP {card.frame_step}",
        f"#define SM_FFT_LENGTH {card.fft_length}",
        f"#define SM_FRAMES {card.frames_per_window}",
        f"#define SM_MEL_BANDS {card.mel_bands}",
        f"#define SM_FEATURES ({card.frames_per_window} * {card.mel_bands})",
        f"#define SM_MEL_COEFFS {packed.size}",
        f"#define SM_POWER {int(card.power)}",
        f"#define SM_LOG_KIND {LOG_KIND[card.log]} /* 0 ln, 1 log10, 2 dB */",
        f"#define SM_LOG_OFFSET {cfloat(card.log_offset)}",
        f"#define SM_LAYOUT_MEL_TIME {int(card.layout == 'mel_time')} /* 0: out[frame][band] */",
        f"#define SM_PCM_BITS {card.pcm_bits}",
        f"#define SM_SCALE_MODE {mode} /* 0 one value, 1 per band, 2 full shape */",
        f"#define SM_N_CLASSES {len(card.classes)}", "",
        _floats("sm_window", fe.window),
        _ints("sm_mel_first_bin", "int16_t", first),
        _ints("sm_mel_length", "int16_t", length),
        _floats("sm_mel_weights", packed),
        _floats("sm_scale_mean", mean),
        _floats("sm_scale_inv_std", inv_std),
        f"static const char *const sm_class_names[SM_N_CLASSES] = {{{names}}};", "",
        "#endif", "",
    ]
    return "\n".join(lines)


def c_buffers(card: ModelCard) -> dict[str, int]:
    """Bytes of every static buffer `frontend.c` keeps for this card (its RAM), by name."""
    n, half = card.fft_length, card.fft_length // 2
    return {"sm_cos": 4 * half, "sm_sin": 4 * half, "sm_bitrev": 2 * n, "sm_re": 4 * n,
            "sm_im": 4 * n, "sm_power": 4 * (half + 1), "sm_pcm": 4 * card.window_samples}


def c_tables(card: ModelCard) -> dict[str, int]:
    """Bytes of every constant table in `frontend_constants.h` for this card (its flash)."""
    fe = FrontEnd(card)
    first, length, packed = sparse_bank(fe.mel_t.T)
    mode, mean, inv_std = scaling_tables(card)
    return {"sm_window": 4 * card.frame_length, "sm_mel_first_bin": 2 * len(first),
            "sm_mel_length": 2 * len(length), "sm_mel_weights": 4 * packed.size,
            "sm_scale_mean": 4 * mean.size, "sm_scale_inv_std": 4 * inv_std.size}
