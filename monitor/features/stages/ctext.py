"""The C header's pieces: float literals, constant tables, ``#define`` lines, sparse banks."""

from __future__ import annotations

from typing import Any

import numpy as np


def cfloat(v: float) -> str:
    """A C float literal: 9 significant digits, always with a point or an exponent.

    Parameters
    ----------
    v : float
        The value.

    Returns
    -------
    str
        The literal, ``f`` suffix included.
    """
    text = f"{float(v):.9g}"
    if not any(ch in text for ch in ".eEn"):
        text += ".0"
    return text + "f"


def c_floats(name: str, values, per_line: int = 8) -> str:
    """A C ``static const float`` table of `values` (flattened, float32), `per_line` a line.

    Parameters
    ----------
    name : str
        The C array's name.
    values : array_like
        The numbers.
    per_line : int
        Numbers per line.

    Returns
    -------
    str
        The declaration.
    """
    vals = [cfloat(v) for v in np.asarray(values, dtype=np.float32).reshape(-1)]
    body = ",\n".join("    " + ", ".join(vals[i:i + per_line]) for i in range(0, len(vals), per_line))
    return f"static const float {name}[{len(vals)}] = {{\n{body}\n}};"


def c_ints(name: str, ctype: str, values, per_line: int = 12) -> str:
    """A C ``static const`` table of type `ctype` of integer `values`, `per_line` a line.

    Parameters
    ----------
    name : str
        The C array's name.
    ctype : str
        Its element type (``int16_t``).
    values : iterable of int
        The numbers.
    per_line : int
        Numbers per line.

    Returns
    -------
    str
        The declaration.
    """
    vals = [str(int(v)) for v in values]
    body = ",\n".join("    " + ", ".join(vals[i:i + per_line]) for i in range(0, len(vals), per_line))
    return f"static const {ctype} {name}[{len(vals)}] = {{\n{body}\n}};"


def c_define(name: str, value: Any, comment: str = "") -> str:
    """A ``#define`` line (a bool as 0 or 1, a float as `cfloat`), with `comment` if given.

    Parameters
    ----------
    name : str
        The macro.
    value : object
        Its value.
    comment : str
        A comment after it.

    Returns
    -------
    str
        The line.
    """
    if isinstance(value, bool):
        value = int(value)
    if isinstance(value, float):
        value = cfloat(value)
    return f"#define {name} {value}" + (f" /* {comment} */" if comment else "")


def sparse_bank(weights: np.ndarray) -> tuple[list[int], list[int], np.ndarray]:
    """(first bins, lengths, packed weights) of a (bands, bins) filterbank, the way embedded
    DSP libraries store one.

    Parameters
    ----------
    weights : numpy.ndarray
        ``(bands, bins)``.

    Returns
    -------
    first : list of int
        Each band's first non-zero bin.
    length : list of int
        Each band's count of bins from there.
    packed : numpy.ndarray
        Every band's weights, one after the other.
    """
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
