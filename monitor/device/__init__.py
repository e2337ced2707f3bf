"""Device parity: int8 quantisation (`quantize`), two models or two runtimes on the same
windows (`compare`), golden vectors with a firmware-side check (`vectors`), what a model
costs on the target (`budget`), and the portable C front end (`frontend.c`, `frontend.h`)
with its generated constants header (`constants`).

May import: the flow below (base to assembly); not the other tools (review, demo, ui).
"""

from pathlib import Path

C_SOURCES = (Path(__file__).with_name("frontend.c"), Path(__file__).with_name("frontend.h"))
