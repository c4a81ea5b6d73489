"""Helpers shared by the file readers and writers."""

from __future__ import annotations

import json
import math
import numbers
import os
import warnings
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .._capture import _check_rate, describe_nonfinite, full_scale, like
from .._errors import CaptureError
from ._datatypes import SampleFormat, encode

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


def encoded_blocks(cap: xr.DataArray, fmt: SampleFormat, source: Any) -> Iterator[bytes]:
    """The capture's samples encoded in ``fmt``, block by block, as bytes to write.

    Integer formats: the samples are divided by the capture's ``full_scale`` first (the
    file's full scale is the integer range, read back as full scale 1.0), so the dBFS of
    every sample is kept. Non-finite samples raise :class:`CaptureError` (naming ``source``,
    how many and the first one's index; the rest of the capture is only counted, not
    written). Samples with I or Q beyond full scale (by half an LSB or more) are clipped to
    the integer range; when the whole capture is written, one :class:`RuntimeWarning` says
    how many. Float formats take the samples as they are (NaN and Inf included).
    """
    integer = fmt.kind != "f"
    scale = full_scale(cap) if integer else 1.0
    clipped = 0
    bad = 0
    first_bad: tuple[int, int] | None = None  # (time index, channel)
    done = 0
    for block in iter_blocks(cap):
        if integer:
            finite = np.isfinite(block)
            if not finite.all():
                bad += int(block.size - np.count_nonzero(finite))
                if first_bad is None:
                    flat = int(np.argmin(finite.ravel()))
                    ch = flat % block.shape[1] if block.ndim == 2 else 0
                    t = flat // block.shape[1] if block.ndim == 2 else flat
                    first_bad = (done + t, ch)
            done += block.shape[0]
            if first_bad is not None:
                continue
            if scale != 1.0:
                block = block / block.real.dtype.type(scale)
            with np.errstate(over="ignore", invalid="ignore"):
                raw, n_clip = encode(block, fmt, count_clipped=True)
            clipped += n_clip
            yield raw.tobytes()
        else:
            yield encode(block, fmt).tobytes()
    if first_bad is not None:
        what = describe_nonfinite(bad, first_bad[1], first_bad[0], multichannel=cap.ndim == 2)
        raise CaptureError(
            f"{source}: {what}; they cannot be stored as {fmt.name}: replace them or write a "
            "float datatype such as cf32_le"
        )
    if clipped:
        total = cap.size
        plural = "sample" if clipped == 1 else "samples"
        warnings.warn(
            f"{source}: {clipped} of {total} {plural} clipped: the input exceeded full scale "
            f"(full_scale={scale:g}) and {fmt.name} cannot hold it; scale the capture down or "
            "write a float datatype such as cf32_le",
            RuntimeWarning,
            stacklevel=3,
        )


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


class MetadataLossWarning(UserWarning):
    """A file format cannot hold some of the capture's metadata, which is left out."""


_NOTABLE = ("center_frequency", "calibration_db", "start_time", "description", "hardware",
            "annotations", "segments")


def warn_metadata_loss(cap: xr.DataArray, path: Any, what: str, *,
                       kept: tuple[str, ...] = ()) -> None:
    """Warn once, naming the file and the attrs that ``what`` (a format) cannot store."""
    lost = []
    for key in _NOTABLE:
        if key in kept:
            continue
        value = cap.attrs.get(key)
        if value is None or value == [] or value == "" or (key == "center_frequency"
                                                          and float(value) == 0.0):
            continue
        lost.append(key)
    if lost:
        warnings.warn(
            f"{path}: {what} stores no {', '.join(lost)}; "
            f"{'they are' if len(lost) > 1 else 'it is'} left out (write SigMF to keep "
            f"{'them' if len(lost) > 1 else 'it'})", MetadataLossWarning, stacklevel=3)
