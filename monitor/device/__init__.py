"""Device parity: int8 quantisation (`quantize`), two models or two runtimes on the same
windows (`compare`), golden vectors with a firmware-side check (`vectors`), what a model
costs on the target (`budget`), and the portable C front end (`frontend.c`, `frontend.h`)
with its generated constants header (`constants`).

May import: the flow below (base to assembly); not the other tools (review, demo, ui).
"""

from pathlib import Path

C_SOURCES = (Path(__file__).with_name("frontend.c"), Path(__file__).with_name("frontend.h"))
Q15_SOURCE = Path(__file__).with_name("frontend_q15.c")  # the fixed-point front end


def c_sources(card) -> tuple[Path, ...]:
    """The C front end's files for `card`: ``frontend_q15.c`` in place of ``frontend.c`` when
    the card's arithmetic is "q15".

    Parameters
    ----------
    card : ModelCard
        The card.

    Returns
    -------
    tuple of Path
        The source and the header.
    """
    if card.frontend.pcm.arithmetic == "q15":
        return (Q15_SOURCE, C_SOURCES[1])
    return C_SOURCES


def source_for_header(text: str) -> Path:
    """The front end's C source a ``frontend_constants.h`` of that text is for:
    ``frontend_q15.c`` when it is a q15 card's (``SM_ARITHMETIC_Q15``), else ``frontend.c``.

    Parameters
    ----------
    text : str
        The header's text.

    Returns
    -------
    Path
        The package's source file.
    """
    return Q15_SOURCE if "#define SM_ARITHMETIC_Q15 1" in text else C_SOURCES[0]
