"""`frontend_constants.h`: everything the C front end needs for one model card.

Our own format, plain C99, one block per stage of the card's kind, each written by the stage
itself (`monitor.features.stages`: `Stage.c_lines`): every size and switch as a ``#define``
(``SM_*``; ``SM_HAS_<STAGE>`` is 1 for each stage that runs), the window coefficients, the
mel filterbank as a sparse table (per band the first FFT bin and the number of weights, then
all weights packed in one array, as embedded DSP libraries store it), the DCT matrix (the
lifter folded in), the scaling arrays (``SM_SCALE_MODE`` 0: one value, 1: per band, 2: the
full feature shape in the model's input order) and the class names.

`c_buffers(card)` and `c_tables(card)` are the bytes of ``frontend.c``'s static arrays and of
the header's tables for that card (what ``scenemon budget`` reports as RAM and flash); a
test compiles ``frontend.c`` and checks them against the object file's symbol sizes.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from monitor.features.card import ModelCard
from monitor.features.stages import (
    KINDS,
    STAGES,
    c_define,
    c_ints,
    cfloat,
    show_value,
    sparse_bank,
)

__all__ = ["header", "c_string", "c_buffers", "c_tables", "cfloat", "sparse_bank", "scaling_tables"]


_PLAIN = frozenset("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789 _-.,:;+=()[]{}")


def c_string(text: str) -> str:
    """`text` as a C99 string literal that holds its UTF-8 bytes and nothing else.

    Letters, digits and a few plain marks stand as they are; every other byte (quotes,
    backslashes, ``?`` which could start a trigraph, ``*`` and ``/``, control characters,
    UTF-8) is a three-digit octal escape, which no following character can extend (ISO C99
    6.4.4.4 escape sequences, 5.2.1.1 trigraphs).

    Parameters
    ----------
    text : str
        A class name, as the card gives it.

    Returns
    -------
    str
        The literal, quotes included.
    """
    return '"' + "".join(chr(b) if chr(b) in _PLAIN else f"\\{b:03o}"
                         for b in text.encode("utf-8")) + '"'


def _comment_safe(text: str) -> str:
    """`text` fit for the inside of a C comment: plain characters kept, others as ``_``."""
    return "".join(c if c in _PLAIN else "_" for c in text)


def header(card: ModelCard, *, model_sha256: str | None = None) -> str:
    """The text of ``frontend_constants.h`` for `card`.

    Parameters
    ----------
    card : ModelCard
        The card.
    model_sha256 : str, optional
        Noted in the header's comment.

    Returns
    -------
    str
        The header's text.
    """
    stages = card.stages()
    running = {s.name for s in stages if s.active}
    names = ", ".join(c_string(c) for c in card.classes)
    summary = ", ".join(f"{k} = {show_value(v)}" for k, v in card.frontend.settings().items())
    lines = [
        "/* frontend_constants.h: written by `scenemon vectors` for one model card.",
        f" * card: {_comment_safe(Path(card.name).name)}" + (f"\n * model sha256: {model_sha256}"
                                             if model_sha256 else ""),
        f" * {summary} */",
        "#ifndef SCENEMON_FRONTEND_CONSTANTS_H", "#define SCENEMON_FRONTEND_CONSTANTS_H", "",
        "#include <stdint.h>", "",
        c_define("SM_KIND", list(KINDS).index(card.kind),
                 ", ".join(f"{i} {k}" for i, k in enumerate(KINDS))),
        c_define("SM_SAMPLE_RATE", card.sample_rate),
        c_define("SM_WINDOW_SAMPLES", card.window_samples),
        c_define("SM_HOP_SAMPLES", card.hop_samples),
        c_define("SM_FEATURES", int(np.prod(card.feature_shape)),
                 "values of one window's model input"),
        c_define("SM_N_CLASSES", len(card.classes)), "",
        "/* the stages that run (1) */",
        *[c_define(f"SM_HAS_{name.upper()}", name in running) for name in STAGES], "",
    ]
    fixed = card.frontend.pcm.arithmetic == "q15"
    for s in stages:
        if fixed and s.name not in FIXED_KEEPS:
            continue  # its float tables: the q15 block below has the integer ones
        lines.append(f"/* stage: {s.name} */")
        lines += s.c_lines()
        lines.append("")
    if fixed:
        lines += fixed_lines(card)
    lines += [f"static const char *const sm_class_names[SM_N_CLASSES] = {{{names}}};", "",
              "#endif", ""]
    return "\n".join(lines)


# the stages whose #defines the q15 front end uses as they are (no float tables among them)
FIXED_KEEPS = ("pcm", "preemphasis", "centre", "framing", "spectrum", "layout")


def fixed_tables(card: ModelCard, fx=None) -> dict[str, tuple[str, np.ndarray]]:
    """The q15 front end's constant tables: name to (C type, values), from the very arrays
    `monitor.features.fixedpoint.FixedFrontEnd` computes with.

    Parameters
    ----------
    card : ModelCard
        A card with ``arithmetic = "q15"``.
    fx : FixedFrontEnd, optional
        Its front end, when the caller has built it already.

    Returns
    -------
    dict
        Table name to its element type and flat values.
    """
    from monitor.features.fixedpoint import FixedFrontEnd

    fx = fx if fx is not None else FixedFrontEnd(card)
    first, length, packed = sparse_bank(fx.mel)
    mode = card.stages()[-1].tables()[0]  # type: ignore[attr-defined]
    shape = card.feature_shape
    if mode == 0:
        mean, mul = fx.mean_q.reshape(-1)[:1], fx.mul_q.reshape(-1)[:1]
    elif mode == 1:
        mean, mul = fx.mean_q.reshape(-1), fx.mul_q.reshape(-1)
    else:
        mean = np.broadcast_to(fx.mean_q, shape).reshape(-1)
        mul = np.broadcast_to(fx.mul_q, shape).reshape(-1)
    out = {"sm_window_q31": ("int32_t", fx.window),
           "sm_twiddle_re": ("int32_t", fx.tw_re), "sm_twiddle_im": ("int32_t", fx.tw_im),
           "sm_bitrev": ("uint16_t", fx.bitrev),
           "sm_mel_first_bin": ("int16_t", np.array(first)),
           "sm_mel_length": ("int16_t", np.array(length)),
           "sm_mel_q15": ("uint16_t", np.asarray(packed, np.int64)),
           "sm_offset_q": ("int64_t", fx.offset_q), "sm_floor_q": ("int64_t", fx.floor_q),
           "sm_offset_bits": ("uint8_t", fx.offset_bits),
           "sm_log_const": ("int32_t", fx.log_const), "sm_log2_q24": ("int32_t", fx.table),
           "sm_scale_mean_q": ("int32_t", mean), "sm_scale_mul": ("int32_t", mul)}
    if fx.dct is not None:
        out["sm_dct_q30"] = ("int32_t", fx.dct.reshape(-1))
    return out


_C_BYTES = {"int16_t": 2, "uint16_t": 2, "int32_t": 4, "int64_t": 8, "uint8_t": 1}


def fixed_lines(card: ModelCard) -> list[str]:
    """The q15 block of ``frontend_constants.h`` (`fixed_tables` and the switches).

    Parameters
    ----------
    card : ModelCard
        A card with ``arithmetic = "q15"``.

    Returns
    -------
    list of str
        The lines.
    """
    from monitor.features.fixedpoint import FixedFrontEnd

    fx = FixedFrontEnd(card)
    low, high = fx.used_bins
    lines = ["/* the q15 front end (frontend_q15.c): integer tables, formats in its comment */",
             c_define("SM_ARITHMETIC_Q15", 1),
             c_define("SM_FFT_BITS", fx.bits),
             c_define("SM_MEL_BANDS", fx.bands),
             c_define("SM_MEL_COEFFS", int(sum(sparse_bank(fx.mel)[1]))),
             c_define("SM_MEL_LOW_BIN", low, "the bins the bands use: low .. high"),
             c_define("SM_MEL_HIGH_BIN", high),
             c_define("SM_MFCC", 0 if fx.dct is None else fx.dct.shape[0]),
             c_define("SM_DCT_BITS", fx.dct_bits, "fraction bits of the DCT table"),
             c_define("SM_LOG_FACTOR", fx.factor, "log2 to feature units, q28"),
             c_define("SM_DB_MAX", fx.db_max, "1: minus the window's maximum"),
             c_define("SM_TOP_DB_Q", fx.top_db, "top_db in q16 (0: none)"),
             c_define("SM_SCALE_MODE", card.stages()[-1].tables()[0],  # type: ignore[attr-defined]
                      "0 one value, 1 per band, 2 full shape"),
             c_define("SM_SCALE_BITS", fx.scale_bits, "scaling multiplier's fraction bits")]
    for name, (ctype, values) in fixed_tables(card, fx).items():
        vals = [int(v) for v in np.asarray(values).reshape(-1)]
        if ctype == "int64_t":
            vals_txt = [f"INT64_C({v})" for v in vals]
            body = ",\n".join("    " + ", ".join(vals_txt[i:i + 6]) for i in range(0, len(vals), 6))
            lines.append(f"static const int64_t {name}[{len(vals)}] = {{\n{body}\n}};")
        else:
            lines.append(c_ints(name, ctype, vals))
    return lines + [""]


def c_buffers(card: ModelCard) -> dict[str, int]:
    """Bytes of every static buffer `frontend.c` keeps for this card (its RAM), by name.

    Parameters
    ----------
    card : ModelCard
        The card.

    Returns
    -------
    dict
        Buffer name to bytes.
    """
    out: dict[str, int] = {}
    if card.frontend.pcm.arithmetic == "q15":  # frontend_q15.c's static arrays
        from monitor.features.fixedpoint import FixedFrontEnd

        n, frames = card.frontend.framing.fft_length, card.frames_per_window
        hist = card.stages()[0].history  # type: ignore[attr-defined]
        low, high = FixedFrontEnd(card).used_bins
        bins = high - low + 1
        return {"sm_hist": 2 * hist, "sm_filled": 4, "sm_re": 2 * n, "sm_im": 2 * n,
                "sm_power": 8 * bins,
                "sm_frames": 4 * frames * card.frontend.mel.mel_bands,
                "sm_out_q": 4 * int(np.prod(card.feature_shape))}
    for s in card.stages():
        out.update(s.c_buffers())
    return out


def c_tables(card: ModelCard) -> dict[str, int]:
    """Bytes of every constant table in `frontend_constants.h` for this card (its flash),
    by name (the class names aside: the firmware's labels, not the front end's).

    Parameters
    ----------
    card : ModelCard
        The card.

    Returns
    -------
    dict
        Table name to bytes.
    """
    if card.frontend.pcm.arithmetic == "q15":
        return {name: _C_BYTES[ctype] * int(np.asarray(values).size)
                for name, (ctype, values) in fixed_tables(card).items()}
    out: dict[str, int] = {}
    for s in card.stages():
        out.update(s.c_tables())
    return out


def scaling_tables(card: ModelCard) -> tuple[int, np.ndarray, np.ndarray]:
    """(mode, mean, 1 / std) as the C code stores the scaling (see module docstring).

    Parameters
    ----------
    card : ModelCard
        The card.

    Returns
    -------
    mode : int
        0 one value, 1 one per band, 2 the full feature shape.
    mean, inv_std : numpy.ndarray
        float32, flat.
    """
    return card.stages()[-1].tables()  # type: ignore[attr-defined]
