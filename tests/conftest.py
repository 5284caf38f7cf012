"""Test-session settings.

BLAS thread pools are pinned to one thread: on a shared 2-core machine several OpenBLAS threads per
process fight for the cores and make small linear-algebra calls many times slower (common practice,
no source). This must happen before numpy is first imported, hence here.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
