"""Assertions for captures and results, for quadkit's tests and for users' pipelines."""

from __future__ import annotations

import contextlib
from collections.abc import Iterator
from typing import Any

import numpy as np
import xarray as xr

from ._capture import is_lazy

__all__ = [
    "as_lazy",
    "random_chunks",
    "assert_captures_close",
    "assert_attrs_equal",
    "assert_units",
    "assert_lazy",
    "raise_if_dask_computes",
]


def random_chunks(n: int, rng: Any = None, *, n_chunks: int = 4) -> tuple[int, ...]:
    """Random chunk sizes that add up to ``n``, the last one shorter than the others.

    Chunk borders at random places, and a short last chunk, are where streaming code breaks.
    """
    rng = np.random.default_rng(rng)
    n_chunks = max(1, min(int(n_chunks), n))
    if n_chunks == 1:
        return (int(n),)
    cuts = np.sort(rng.choice(np.arange(1, n), size=n_chunks - 1, replace=False))
    sizes = np.diff(np.concatenate(([0], cuts, [n]))).tolist()
    sizes.sort(reverse=True)  # the shortest goes last
    return tuple(int(s) for s in sizes)


def as_lazy(cap: xr.DataArray, chunks: Any) -> xr.DataArray:
    """The same capture backed by dask, chunked along time as given (an int or sizes).

    Keeps the attrs and the absolute time axis, so streaming results can be compared with
    the in-memory ones sample for sample.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit.testing import as_lazy, random_chunks
    >>> cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000)
    >>> as_lazy(cap, random_chunks(1000, rng=0, n_chunks=3)).chunks[0][-1] < 500
    True
    """
    import dask.array as da

    from ._capture import like, start_index

    time_chunks = (int(chunks),) if isinstance(chunks, (int, np.integer)) else (tuple(chunks),)
    data = da.from_array(np.asarray(cap.values), chunks=cap.data.shape[:-1] + time_chunks)
    return like(cap, data, start_index=start_index(cap))


def assert_attrs_equal(actual: xr.DataArray, expected: xr.DataArray, *, ignore=()) -> None:
    """Assert both captures carry the same attrs (except the names in ``ignore``)."""
    a = {k: v for k, v in actual.attrs.items() if k not in ignore}
    e = {k: v for k, v in expected.attrs.items() if k not in ignore}
    if a.keys() != e.keys():
        raise AssertionError(f"attrs differ in keys: {sorted(a.keys() ^ e.keys())}")
    for key in a:
        va, ve = a[key], e[key]
        same = np.allclose(va, ve, rtol=1e-12, atol=0) if isinstance(va, float) else va == ve
        if not same:
            raise AssertionError(f"attr {key!r}: {va!r} != {ve!r}")


def assert_captures_close(
    actual: xr.DataArray,
    expected: xr.DataArray,
    *,
    atol: float = 1e-6,
    rtol: float = 0.0,
    check_dtype: bool = True,
    check_attrs: bool = True,
    check_time: bool = True,
) -> None:
    """Assert two captures hold the same samples, dims, time axis and metadata.

    ``atol`` is in units of full scale (the ``full_scale`` attr of ``expected``).
    """
    if actual.dims != expected.dims:
        raise AssertionError(f"dims differ: {actual.dims} != {expected.dims}")
    if actual.shape != expected.shape:
        raise AssertionError(f"shapes differ: {actual.shape} != {expected.shape}")
    if check_dtype and actual.dtype != expected.dtype:
        raise AssertionError(f"dtypes differ: {actual.dtype} != {expected.dtype}")
    if check_attrs:
        assert_attrs_equal(actual, expected)
    if check_time and actual.sizes["time"]:
        np.testing.assert_allclose(
            actual["time"].values, expected["time"].values, rtol=1e-12, atol=1e-15,
            err_msg="time coordinates differ",
        )
    fs = float(expected.attrs.get("full_scale", 1.0))
    a = np.asarray(actual.values)
    e = np.asarray(expected.values)
    np.testing.assert_allclose(a, e, atol=atol * fs, rtol=rtol, err_msg="samples differ")


def assert_units(result: xr.Dataset | xr.DataArray) -> None:
    """Assert every data variable carries non-empty ``units`` and ``long_name`` attrs."""
    items = result.data_vars.items() if isinstance(result, xr.Dataset) else [(result.name, result)]
    for name, var in items:
        for key in ("units", "long_name"):
            if not var.attrs.get(key) and not (key == "units" and var.attrs.get(key) == "1"):
                if key not in var.attrs:
                    raise AssertionError(f"result variable {name!r} has no {key!r} attr")


def assert_lazy(obj: Any) -> None:
    """Assert a capture or result is dask-backed (nothing computed yet)."""
    if not is_lazy(obj):
        raise AssertionError("expected a lazy (dask-backed) object, got an in-memory one")


class _ComputeCounter:
    def __init__(self, max_computes: int) -> None:
        self.max = max_computes
        self.count = 0

    def __call__(self, dsk: Any, keys: Any, **kwargs: Any) -> Any:
        import dask

        self.count += 1
        if self.count > self.max:
            raise RuntimeError(f"too many dask computations: {self.count} > {self.max}")
        return dask.get(dsk, keys, **kwargs)


@contextlib.contextmanager
def raise_if_dask_computes(max_computes: int = 0) -> Iterator[_ComputeCounter]:
    """Context in which computing any dask graph more than ``max_computes`` times raises."""
    import dask

    counter = _ComputeCounter(max_computes)
    with dask.config.set(scheduler=counter):
        yield counter
