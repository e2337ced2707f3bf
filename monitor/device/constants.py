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
    for s in stages:
        lines.append(f"/* stage: {s.name} */")
        lines += s.c_lines()
        lines.append("")
    lines += [f"static const char *const sm_class_names[SM_N_CLASSES] = {{{names}}};", "",
              "#endif", ""]
    return "\n".join(lines)


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
