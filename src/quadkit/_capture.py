"""The capture container: an :class:`xarray.DataArray` of IQ samples with its metadata.

A capture has dims ``("time",)`` or ``("channel", "time")``, a ``time`` coordinate in seconds
held by a computed :class:`xarray.indexes.RangeIndex` (no memory per sample, also for lazy
captures of any length), and SI-unit attrs: ``sample_rate`` (Hz), ``center_frequency`` (Hz, the
RF frequency that baseband 0 Hz stands for), ``full_scale`` (the sample magnitude that is
0 dBFS), and optionally ``calibration_db`` (dBm = dBFS + calibration_db), ``start_time``
(ISO 8601), ``description``, ``hardware``, ``annotations`` and ``segments``.

Annotations are dicts with the keys ``start_sample``, ``sample_count``,
``lower_frequency_hz``, ``upper_frequency_hz``, ``label`` and ``comment`` (all optional but
``start_sample``). Segments (a retune within one recording) are dicts with ``start_sample``,
``center_frequency`` and optionally ``start_time``.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr
from xarray.indexes import RangeIndex

from ._errors import CaptureError

__all__ = ["capture", "validate"]

#: Attributes every capture carries, with their defaults.
_DEFAULT_ATTRS: dict[str, Any] = {"center_frequency": 0.0, "full_scale": 1.0}
_ALLOWED_DIMS = (("time",), ("channel", "time"))


def _is_dask(data: Any) -> bool:
    return type(data).__module__.startswith("dask")


def _coerce_samples(samples: Any) -> Any:
    """Return samples as a numpy or dask array of a supported dtype."""
    if isinstance(samples, xr.DataArray):
        samples = samples.data
    if not (isinstance(samples, np.ndarray) or _is_dask(samples)):
        samples = np.asarray(samples)
        # Plain Python sequences default to 64-bit: a capture defaults to 32-bit.
        if samples.dtype.kind == "c":
            samples = samples.astype(np.complex64)
        elif samples.dtype.kind in "fiu":
            samples = samples.astype(np.float32)
    kind = samples.dtype.kind
    if kind == "c":
        if samples.dtype not in (np.complex64, np.complex128):
            samples = samples.astype(np.complex128)
    elif kind == "f":
        if samples.dtype not in (np.float32, np.float64):
            samples = samples.astype(np.float32)
    elif kind in "iu":
        samples = samples.astype(np.float32)
    else:
        raise CaptureError(
            f"capture: samples have dtype {samples.dtype}, expected complex (complex64 or "
            "complex128) or real numbers; convert them first, e.g. with quadkit.io.read_raw"
        )
    return samples


def _check_rate(value: Any, *, source: str = "capture", field: str = "sample_rate") -> float:
    if value is None:
        raise CaptureError(f"{source}: {field} is missing; give the sample rate in Hz")
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise CaptureError(f"{source}: {field}={value!r} must be a number in Hz")
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise CaptureError(f"{source}: {field}={value!r} must be a positive, finite rate in Hz")
    return value


def time_coords(n_samples: int, sample_rate: float, start_index: int = 0) -> xr.Coordinates:
    """Time coordinate (seconds) for ``n_samples`` samples starting at sample ``start_index``.

    The coordinate is computed from a :class:`~xarray.indexes.RangeIndex`, so it costs no
    memory per sample, whatever the length.
    """
    t0 = start_index / sample_rate
    index = RangeIndex.linspace(
        t0, t0 + n_samples / sample_rate, num=int(n_samples), endpoint=False,
        coord_name="time", dim="time",
    )
    coords = xr.Coordinates.from_xindex(index)
    coords["time"].attrs.update(units="s", long_name="time from the first sample")
    return coords


def capture(
    samples: Any,
    *,
    sample_rate: float,
    center_frequency: float = 0.0,
    **metadata: Any,
) -> xr.DataArray:
    """Wrap IQ samples and their metadata in a capture.

    Parameters
    ----------
    samples : array_like or dask array, shape (time,) or (channel, time)
        Complex baseband samples (complex64, or complex128 which is kept), or real samples
        for a real IF capture. Python sequences become complex64 / float32; integer arrays
        become float32 without scaling, and unless ``full_scale`` is given it is set to the
        integer range (32768 for int16), so that dBFS figures are right (use
        :mod:`quadkit.io` for interleaved IQ integer files and offset-binary codes).
    sample_rate : float
        Sample rate in Hz, positive and finite.
    center_frequency : float, optional
        RF frequency in Hz that baseband 0 Hz stands for (0 for a real capture).
    **metadata
        Further attrs: ``full_scale`` (default 1.0), ``calibration_db``, ``start_time``,
        ``description``, ``hardware``, ``annotations``, ``segments``, or your own.

    Returns
    -------
    xarray.DataArray
        dims ``("time",)`` or ``("channel", "time")``, ``time`` in seconds.

    Raises
    ------
    CaptureError
        For a missing or bad sample rate, a non-numeric dtype or more than two dimensions.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.capture(np.ones(1000, np.complex64), sample_rate=1e6,
    ...                       center_frequency=2.45e9)
    >>> cap.dims, cap.dtype, cap.attrs["sample_rate"]
    (('time',), dtype('complex64'), 1000000.0)
    >>> float(cap.time[-1])  # seconds from the first sample
    0.000999
    """
    fs = _check_rate(sample_rate)
    if isinstance(center_frequency, bool) or not isinstance(center_frequency, numbers.Real) \
            or not math.isfinite(center_frequency):
        raise CaptureError(
            f"capture: center_frequency={center_frequency!r} must be a finite number in Hz"
        )
    channel_coord = None
    if isinstance(samples, xr.DataArray) and "channel" in samples.coords:
        channel_coord = samples.coords["channel"]
    raw_dtype = getattr(getattr(samples, "dtype", None), "kind", None)
    if raw_dtype in ("i", "u") and "full_scale" not in metadata:
        # integer codes: full scale is the code range, so dBFS figures mean what they say
        metadata["full_scale"] = float(2 ** (8 * np.dtype(samples.dtype).itemsize - 1))
    data = _coerce_samples(samples)
    if data.ndim not in (1, 2):
        raise CaptureError(
            f"capture: samples have {data.ndim} dimensions (shape {data.shape}); expected "
            "(time,) or (channel, time)"
        )
    full_scale = metadata.get("full_scale", 1.0)
    if not isinstance(full_scale, numbers.Real) or not (0 < float(full_scale) < math.inf):
        raise CaptureError(f"capture: full_scale={full_scale!r} must be a positive number")
    attrs = dict(_DEFAULT_ATTRS)
    attrs.update(metadata)
    attrs["sample_rate"] = fs
    attrs["center_frequency"] = float(center_frequency)
    attrs["full_scale"] = float(full_scale)
    return from_array(data, attrs, channel=channel_coord)


def from_array(
    data: Any,
    attrs: Mapping[str, Any],
    *,
    start_index: int = 0,
    channel: Any = None,
    name: str | None = "iq",
) -> xr.DataArray:
    """Build a capture from an array whose last axis is time and a complete attrs dict."""
    fs = float(attrs["sample_rate"])
    coords = time_coords(data.shape[-1], fs, start_index)
    if data.ndim == 2:
        dims = ("channel", "time")
        if channel is None:
            channel = np.arange(data.shape[0])
        channel = np.asarray(channel)
        if channel.shape != (data.shape[0],):
            channel = np.arange(data.shape[0])
        coords = coords.assign(channel=("channel", channel))
    else:
        dims = ("time",)
    out = xr.DataArray(data, dims=dims, coords=coords, attrs=dict(attrs), name=name)
    return out


def like(
    cap: xr.DataArray,
    data: Any,
    *,
    start_index: int | None = None,
    **attr_updates: Any,
) -> xr.DataArray:
    """A new capture holding ``data`` (last axis time) with ``cap``'s attrs, updated.

    The channel coordinate is carried over. ``start_index`` (in samples of the *new* rate)
    defaults to the old first sample's time converted to the new rate, so that the time of
    sample 0 stays the same.
    """
    attrs = dict(cap.attrs)
    attrs.update(attr_updates)
    fs_new = float(attrs["sample_rate"])
    if start_index is None:
        t0 = first_time(cap)
        start_index = int(round(t0 * fs_new))
    channel = cap.coords["channel"].values if "channel" in cap.dims else None
    return from_array(data, attrs, start_index=start_index, channel=channel, name=cap.name)


def first_time(cap: xr.DataArray) -> float:
    """Time in seconds of the capture's first sample (0 unless it was sliced)."""
    if cap.sizes.get("time", 0) == 0:
        return 0.0
    index = cap.xindexes.get("time")
    if isinstance(index, RangeIndex):
        # read from the index itself: after ``cap.chunk()`` the coordinate variable is a dask
        # array, and touching its values would run a computation
        return float(index.start)
    return float(cap["time"].isel(time=0).values)


def start_index(cap: xr.DataArray) -> int:
    """Absolute index of the first sample, counted from the start of the recording.

    It is 0 for a capture as read or made, and k after ``cap.isel(time=slice(k, None))``:
    oscillators use it so that an operation on a slice equals a slice of the operation.
    """
    return int(round(first_time(cap) * float(cap.attrs["sample_rate"])))


def sample_rate(cap: xr.DataArray) -> float:
    """The capture's sample rate in Hz (checked)."""
    return _check_rate(cap.attrs.get("sample_rate"), source="capture")


def is_lazy(cap: xr.DataArray | xr.Dataset) -> bool:
    """True if the capture (or result) is backed by dask."""
    if isinstance(cap, xr.Dataset):
        return any(_is_dask(v.data) for v in cap.data_vars.values())
    return _is_dask(cap.data)


def is_complex(cap: xr.DataArray) -> bool:
    return cap.dtype.kind == "c"


def full_scale(cap: xr.DataArray) -> float:
    return float(cap.attrs.get("full_scale", 1.0))


def validate_light(cap: xr.DataArray) -> xr.DataArray:
    """The checks of :func:`validate` that do not read the samples (dims, rate, dtype)."""
    if not isinstance(cap, xr.DataArray):
        raise CaptureError(
            f"expected a capture (xarray.DataArray from quadkit.capture), got {type(cap).__name__}"
        )
    if tuple(cap.dims) not in _ALLOWED_DIMS:
        raise CaptureError(
            f"capture has dims {tuple(cap.dims)}, expected ('time',) or ('channel', 'time')"
        )
    _check_rate(cap.attrs.get("sample_rate"), source="capture")
    if cap.dtype.kind not in "cf":
        raise CaptureError(f"capture samples have dtype {cap.dtype}, expected complex or real float")
    return cap


def validate(cap: xr.DataArray) -> xr.DataArray:
    """Check that ``cap`` is a well-formed capture and return it unchanged.

    Checks the dims, the sample rate, the dtype and that every sample is finite. For a lazy
    capture the finiteness check reads the data once, chunk by chunk.

    Raises
    ------
    CaptureError
        Naming the problem: missing or non-positive sample rate, wrong dims, non-numeric
        dtype, or non-finite samples (how many, and the first one's channel and index).

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> x = np.zeros(8, np.complex64); x[5] = np.nan
    >>> quadkit.validate(quadkit.capture(x, sample_rate=1e3))
    Traceback (most recent call last):
    ...
    quadkit._errors.CaptureError: validate: 1 non-finite sample (NaN or Inf); the first is sample 5
    """
    if not isinstance(cap, xr.DataArray):
        raise CaptureError(
            f"validate: expected a capture (xarray.DataArray from quadkit.capture), "
            f"got {type(cap).__name__}"
        )
    if tuple(cap.dims) not in _ALLOWED_DIMS:
        raise CaptureError(
            f"validate: capture has dims {tuple(cap.dims)}, expected ('time',) or "
            "('channel', 'time')"
        )
    _check_rate(cap.attrs.get("sample_rate"), source="validate")
    if cap.dtype.kind not in "cf":
        raise CaptureError(
            f"validate: samples have dtype {cap.dtype}, expected complex64/complex128 or a "
            "real float type"
        )
    finite = np.isfinite(cap.data)
    bad = (~finite).sum()
    if _is_dask(cap.data):
        import dask

        (bad,) = dask.compute(bad)
    bad = int(bad)
    if bad:
        flat_first = int(np.argmin(np.asarray(finite).ravel())) if not _is_dask(cap.data) \
            else int(np.argmin(finite.ravel()).compute())
        n_time = cap.sizes["time"]
        raise CaptureError(
            "validate: " + describe_nonfinite(bad, flat_first // n_time, flat_first % n_time,
                                              multichannel=cap.ndim == 2)
        )
    return cap


def describe_nonfinite(count: int, channel: int, sample: int, *, multichannel: bool) -> str:
    """'3 non-finite samples (NaN or Inf); the first is channel 1, sample 42' (one wording)."""
    where = f"sample {sample}"
    if multichannel:
        where = f"channel {channel}, " + where
    plural = "sample" if count == 1 else "samples"
    return f"{count} non-finite {plural} (NaN or Inf); the first is {where}"
