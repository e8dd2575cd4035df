"""Test-suite settings.

Linear algebra in the fits runs on tiny matrices, where a multithreaded BLAS only
competes with numba's threads for the two cores; one BLAS thread is much faster.
This must be set before numpy is first imported.
"""

import os

for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(var, "1")
