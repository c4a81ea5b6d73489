"""Helpers shared by the file readers and writers."""

from __future__ import annotations

import json
import math
import numbers
import os
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .._capture import _check_rate, like
from .._errors import CaptureError

#: Samples written per block when a capture is written in pieces.
BLOCK_SAMPLES = 1 << 20


def existing_file(path: str | os.PathLike[str], *, what: str = "file") -> Path:
    p = Path(path)
    if not p.exists():
        raise CaptureError(f"{p}: no such {what}")
    if p.is_dir():
        raise CaptureError(f"{p}: is a folder, expected a {what}")
    return p


def check_rate(value: Any, source: Any, field: str = "sample_rate") -> float:
    """The sample rate as a float; CaptureError naming ``source`` if missing, <= 0 or NaN."""
    return _check_rate(value, source=str(source), field=field)


def check_frequency(value: Any, source: Any, field: str = "center_frequency") -> float:
    if isinstance(value, bool) or not isinstance(value, numbers.Real) \
            or not math.isfinite(float(value)):
        raise CaptureError(f"{source}: {field}={value!r} must be a finite frequency in Hz")
    return float(value)


def apply_overrides(cap: xr.DataArray, overrides: Mapping[str, Any], source: Any) -> xr.DataArray:
    """Replace attrs of a capture just read by the caller's values (the file is unchanged)."""
    if not overrides:
        return cap
    updates = dict(overrides)
    if "sample_rate" in updates:
        updates["sample_rate"] = check_rate(updates["sample_rate"], source)
    if "center_frequency" in updates:
        updates["center_frequency"] = check_frequency(updates["center_frequency"], source)
    return like(cap, cap.data, start_index=0, **updates)


def check_extent(items: list[dict], n_samples: int, source: Any, what: str) -> None:
    """CaptureError if an annotation or segment starts or ends past the last sample."""
    for k, item in enumerate(items):
        start = item.get("start_sample", 0)
        count = item.get("sample_count")
        if not isinstance(start, numbers.Integral) or start < 0:
            raise CaptureError(
                f"{source}: {what} {k} has start sample {start!r}; expected an integer >= 0"
            )
        end = start + (count if isinstance(count, numbers.Integral) else 0)
        if start >= n_samples or end > n_samples:
            raise CaptureError(
                f"{source}: {what} {k} covers samples {start} to {max(end, start + 1)} but the "
                f"data hold only {n_samples} samples; fix the metadata or the data file"
            )


def iter_blocks(cap: xr.DataArray, block: int = BLOCK_SAMPLES) -> Iterator[np.ndarray]:
    """Yield the samples in time order as ``(time, channel)``-ordered numpy blocks.

    A lazy capture is computed one dask chunk at a time, so writing never holds it whole.
    """
    data = cap.data
    n = cap.sizes["time"]
    if hasattr(data, "chunks") and data.chunks is not None and not isinstance(data, np.ndarray):
        edges = np.cumsum((0,) + tuple(data.chunks[-1]))
    else:
        edges = np.arange(0, n + block, block)
        edges[-1] = n
        edges = np.unique(np.minimum(edges, n))
    for a, b in zip(edges[:-1], edges[1:]):
        piece = np.asarray(data[..., int(a):int(b)])
        if piece.ndim == 2:
            piece = np.ascontiguousarray(piece.T)
        yield piece


def jsonable(value: Any) -> Any:
    """``value`` as plain JSON types (numpy scalars and arrays become numbers and lists)."""
    if isinstance(value, Mapping):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return jsonable(value.tolist())
    if isinstance(value, np.generic):
        return value.item()
    return value


def json_error(path: Any, exc: json.JSONDecodeError) -> CaptureError:
    return CaptureError(
        f"{path}: malformed metadata JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}"
    )
