"""Device parity: int8 quantisation, float-vs-int8 comparison, golden vectors, and the
portable C front end (`frontend.c`, `frontend.h`) with its generated constants header."""

from pathlib import Path

C_SOURCES = (Path(__file__).with_name("frontend.c"), Path(__file__).with_name("frontend.h"))
