"""Test-suite setup.

The suite runs many tiny linear-algebra calls; a multithreaded BLAS only adds
contention for them on a small machine, so one thread is used unless the caller says
otherwise.  This must happen before numpy is first imported.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
