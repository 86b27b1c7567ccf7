"""Test-wide settings.

BLAS threads: the filter's matrix-vector products are small; on a shared
2-core machine a multithreaded BLAS makes them 10-40x slower, so the suite
(like ``casecloud`` itself, see service/cli.py) runs BLAS single-threaded.
This must happen before numpy is first imported.
"""

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
