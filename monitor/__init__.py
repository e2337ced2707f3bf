"""scenemon: a streaming acoustic-scene monitor for small on-device audio classifiers."""

import os as _os
import sys as _sys

# The front end's matrix products are small: one BLAS thread is fastest, and idle OpenBLAS
# worker threads spin after every call (measured: live monitoring cost 33% of a core with
# the default threads, 11% with one). One thread also keeps the numbers the same in every
# process: OpenBLAS splits a product differently over two threads, and the features then
# differ in the last bits from one process to another (seen as a 6th-decimal difference in
# a smoothed probability between `score` and `replay`). The environment variable takes
# effect only before numpy is imported; after it (a program that imported numpy first),
# threadpoolctl sets the running library to one thread.
_os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
if "numpy" in _sys.modules and _os.environ["OPENBLAS_NUM_THREADS"] == "1":
    try:
        from threadpoolctl import threadpool_limits as _limits

        _limits(1, user_api="blas")
    except ImportError:  # pragma: no cover - a dependency; the numbers are then the process's
        pass

__version__ = "0.1.0"
