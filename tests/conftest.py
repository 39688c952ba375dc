"""Test-suite setup.

The suite runs many tiny linear-algebra calls; a multithreaded BLAS only adds
contention for them on a small machine, so one thread is used unless the caller says
otherwise.  This must happen before numpy is first imported.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

# Property-based tests explore new random examples on every local run; in CI
# (FITDYN_CI set by .ci/run) they replay a fixed set, so a landing never depends
# on luck.
try:
    from hypothesis import settings as _hyp_settings
except ImportError:  # the property tests skip without hypothesis
    pass
else:
    _hyp_settings.register_profile("ci", derandomize=True, database=None)
    if os.environ.get("FITDYN_CI"):
        _hyp_settings.load_profile("ci")
