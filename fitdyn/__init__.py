"""fitdyn: linear dynamics of two interacting quantities, estimated from measured data.

Public API
----------
read      clean a two-channel recording (file, DataFrame or arrays) into a Recording
fit       estimate the system matrix, classify the equilibrium, quantify uncertainty
simulate  exact-discretisation simulator of dx = A (x - x*) dt + noise
batch     fit many recordings (in parallel if asked); one results table
plan      plan the next experiment by simulation (how long, how often, how many runs)
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

__version__ = "0.1.0"

__all__ = ["read", "fit", "simulate", "batch", "plan", "Recording", "Fit", "__version__"]

# These functions share their names with their modules: import them eagerly so that
# the attributes are the functions whatever is imported later (the modules need only
# numpy at import time).
from fitdyn.batch import batch  # noqa: E402
from fitdyn.plan import plan  # noqa: E402
from fitdyn.simulate import simulate  # noqa: E402

_LAZY = {
    "read": ("fitdyn.importer", "read"),
    "fit": ("fitdyn.analysis", "fit"),
    "Fit": ("fitdyn.analysis", "Fit"),
    "Recording": ("fitdyn.recording", "Recording"),
}


def __getattr__(name: str) -> Any:
    # Imports are deferred so that `import fitdyn` stays fast (no scipy/pandas
    # import cost until a function is used).
    if name in _LAZY:
        module, attr = _LAZY[name]
        value = getattr(import_module(module), attr)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'fitdyn' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(list(globals()) + list(_LAZY))
