"""The ``.qk`` accessor: ``cap.qk.<function>(...)`` is ``quadkit.<module>.<function>(cap, ...)``.

It holds no logic: each module lists the functions that take a capture first in its
``_ACCESSOR`` tuple, and the accessor forwards to them. Modules are imported on first use,
so ``import quadkit`` stays light (bokeh is imported only for the view functions).
"""

from __future__ import annotations

import functools
import importlib
import inspect
from typing import Any, Callable

import xarray as xr

# Order matters only for discovery; names must not repeat across modules (tested).
_MODULES = (
    "quadkit.io",
    "quadkit.synth",
    "quadkit.mixing",
    "quadkit.decimation",
    "quadkit.recovery",
    "quadkit.spectral",
    "quadkit.impairments",
    "quadkit.modulation",
    "quadkit.summary",
    "quadkit.views",
)


def _forwarded() -> dict[str, Callable[..., Any]]:
    table: dict[str, Callable[..., Any]] = {}
    for modname in _MODULES:
        try:
            mod = importlib.import_module(modname)
        except ModuleNotFoundError as exc:  # a module not written yet, or bokeh missing
            if exc.name and (exc.name == modname or not exc.name.startswith("quadkit")):
                continue
            raise
        for name in getattr(mod, "_ACCESSOR", ()):
            table[name] = getattr(mod, name)
    return table


@functools.lru_cache(maxsize=1)
def _table() -> dict[str, Callable[..., Any]]:
    return _forwarded()


@xr.register_dataarray_accessor("qk")
class QuadkitAccessor:
    """Forward ``cap.qk.name(...)`` to the quadkit function ``name(cap, ...)``.

    Examples
    --------
    >>> import quadkit
    >>> cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000)
    >>> "add_noise" in dir(cap.qk)
    True
    """

    def __init__(self, obj: xr.DataArray) -> None:
        self._obj = obj

    def __getattr__(self, name: str) -> Callable[..., Any]:
        if name.startswith("_"):
            raise AttributeError(name)
        func = _table().get(name)
        if func is None:
            raise AttributeError(f"'.qk' has no function {name!r}; see dir(cap.qk)")

        @functools.wraps(func)
        def bound(*args: Any, **kwargs: Any) -> Any:
            return func(self._obj, *args, **kwargs)

        try:  # help(cap.qk.psd) shows psd's options without the capture
            sig = inspect.signature(func)
            bound.__signature__ = sig.replace(parameters=list(sig.parameters.values())[1:])
        except (TypeError, ValueError):
            pass
        return bound

    def __dir__(self) -> list[str]:
        return sorted(_table())
