"""quadkit: load, isolate, measure, correct and verify IQ radio captures.

The flat namespace holds the container and the one-call summary; signal operations and
measurements live in their modules (:mod:`quadkit.io`, :mod:`quadkit.synth`,
:mod:`quadkit.mixing`, :mod:`quadkit.decimation`, :mod:`quadkit.recovery`,
:mod:`quadkit.spectral`, :mod:`quadkit.impairments`, :mod:`quadkit.modulation`), and every
function that takes a capture first is also reachable as ``cap.qk.<function>(...)``.

Examples
--------
>>> import quadkit
>>> cap = quadkit.synth.tone(10e3, sample_rate=1e6, n_samples=1000, center_frequency=915e6)
>>> cap.attrs["center_frequency"]
915000000.0
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from . import accessor as _accessor  # noqa: F401  (registers the .qk accessor)
from ._capture import capture, validate
from ._errors import CaptureError, MeasurementError
from ._results import to_json
from .summary import summarize

__version__ = "0.1.0"

__all__ = [
    "capture",
    "validate",
    "summarize",
    "to_json",
    "CaptureError",
    "MeasurementError",
    "__version__",
]

_SUBMODULES = {
    "io", "synth", "mixing", "decimation", "recovery", "spectral", "impairments",
    "modulation", "summary", "views", "widgets", "report", "testing", "cli",
}


def __getattr__(name: str) -> Any:
    # Submodules load on first use, so ``import quadkit`` stays light.
    if name in _SUBMODULES:
        return import_module(f"{__name__}.{name}")
    raise AttributeError(f"module 'quadkit' has no attribute {name!r}")
