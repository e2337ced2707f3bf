"""scenemon: a streaming acoustic-scene monitor for small on-device audio classifiers."""

import os as _os

# The front end's matrix products are small: one BLAS thread is fastest, and idle OpenBLAS
# worker threads spin after every call (measured: live monitoring cost 33% of a core with
# the default threads, 11% with one). Only takes effect if numpy is not imported yet.
_os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

__version__ = "0.1.0"
