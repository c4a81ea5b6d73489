"""netCDF and Zarr stores through xarray, lossless for complex samples.

Layout (both stores): the samples as ``iq`` when the backend holds complex numbers (Zarr),
else as two variables ``iq_real`` and ``iq_imag`` of the same float type (netCDF, which has
no complex type) -- bit-exact either way. Real captures are stored as ``iq``. The ``time``
coordinate is not stored (it is computed from ``sample_rate`` and the attr ``start_index``);
a ``channel`` coordinate is. Attrs that netCDF cannot hold (lists, dicts, booleans, None) are
stored as JSON strings, their names listed in the attr ``quadkit_json_attrs``, and restored.
"""

from __future__ import annotations

import json
import os
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .._capture import from_array, start_index
from .._errors import CaptureError
from ._atomic import atomic_path
from ._common import apply_overrides, check_rate, jsonable

__all__ = ["read_netcdf", "write_netcdf", "read_zarr", "write_zarr"]

_JSON_LIST = "quadkit_json_attrs"


def _encode_attrs(attrs: dict) -> dict:
    out: dict[str, Any] = {}
    as_json = []
    for key, value in attrs.items():
        if isinstance(value, (str, float, np.floating)) or (
                isinstance(value, (int, np.integer)) and not isinstance(value, bool)
                and -2**31 <= int(value) < 2**31):
            out[key] = value
        else:
            out[key] = json.dumps(jsonable(value))
            as_json.append(key)
    if as_json:
        out[_JSON_LIST] = " ".join(as_json)
    return out


def _decode_attrs(attrs: dict, source: Any) -> dict:
    attrs = dict(attrs)
    names = str(attrs.pop(_JSON_LIST, "")).split()
    start = int(attrs.pop("start_index", 0))
    for key in names:
        try:
            attrs[key] = json.loads(attrs[key])
        except (KeyError, json.JSONDecodeError) as exc:
            raise CaptureError(f"{source}: attr {key!r} should hold JSON: {exc}") from None
    for key, value in list(attrs.items()):
        if isinstance(value, np.generic):
            attrs[key] = value.item()
    attrs["start_index"] = start
    return attrs


def _to_dataset(cap: xr.DataArray, *, split_complex: bool) -> xr.Dataset:
    attrs = dict(cap.attrs)
    attrs["start_index"] = start_index(cap)
    data = cap.data
    dims = cap.dims
    if cap.dtype.kind == "c" and split_complex:
        variables = {"iq_real": (dims, data.real), "iq_imag": (dims, data.imag)}
    else:
        variables = {"iq": (dims, data)}
    coords = {}
    if "channel" in cap.dims:
        coords["channel"] = ("channel", np.asarray(cap["channel"].values))
    return xr.Dataset(variables, coords=coords, attrs=_encode_attrs(attrs))


def _from_dataset(ds: xr.Dataset, source: Any, overrides: dict) -> xr.DataArray:
    if "iq" in ds:
        data = ds["iq"].data
        dims = ds["iq"].dims
    elif "iq_real" in ds and "iq_imag" in ds:
        re, im = ds["iq_real"].data, ds["iq_imag"].data
        dims = ds["iq_real"].dims
        width = np.complex128 if re.dtype == np.float64 else np.complex64
        if hasattr(re, "map_blocks") and not isinstance(re, np.ndarray):
            import dask.array as da

            data = da.map_blocks(_combine, re, im, dtype=width)
        else:
            data = _combine(np.asarray(re), np.asarray(im))
    else:
        raise CaptureError(f"{source}: no samples found: expected a variable 'iq', or "
                           "'iq_real' and 'iq_imag'")
    if dims not in (("time",), ("channel", "time")):
        raise CaptureError(f"{source}: samples have dims {dims}; expected ('time',) or "
                           "('channel', 'time')")
    attrs = _decode_attrs(ds.attrs, source)
    begin = attrs.pop("start_index")
    rate = overrides.pop("sample_rate", attrs.get("sample_rate"))
    attrs["sample_rate"] = check_rate(rate, source)
    attrs.setdefault("center_frequency", 0.0)
    attrs.setdefault("full_scale", 1.0)
    channel = ds["channel"].values if "channel" in ds.coords else None
    cap = from_array(data, attrs, start_index=begin, channel=channel)
    return apply_overrides(cap, overrides, source)


def _combine(re: np.ndarray, im: np.ndarray) -> np.ndarray:
    width = np.complex128 if re.dtype == np.float64 else np.complex64
    out = np.empty(re.shape, width)
    out.real = re
    out.imag = im
    return out


def _open_chunks(chunks: Any) -> Any:
    if chunks is None:
        return None
    if isinstance(chunks, dict):
        return chunks
    return {"time": chunks}


def write_netcdf(cap: xr.DataArray, path: str | os.PathLike[str], *,
                 overwrite: bool = False, engine: str | None = None) -> Path:
    """Write a capture as netCDF (real and imaginary parts as two float variables).

    Bit-exact for complex64 and complex128; attrs restored by :func:`read_netcdf`. Written
    under a temporary name and renamed; an existing file is replaced only with
    ``overwrite=True``. Returns the path written.

    ``engine``: the xarray netCDF backend. Default: netCDF-4 through ``netCDF4`` or
    ``h5netcdf`` (with ``h5py``) when installed, else netCDF-3 (64-bit offsets) through
    scipy, which holds float32/float64 parts just as exactly.

    Examples
    --------
    >>> import tempfile, pathlib, quadkit
    >>> cap = quadkit.capture([1 + 2j, -3 - 4j], sample_rate=1e6, label="bench A")
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "pair.nc"
    >>> _ = quadkit.io.write_netcdf(cap, path)
    >>> back = quadkit.io.read_netcdf(path)
    >>> back.values, back.attrs["label"]
    (array([ 1.+2.j, -3.-4.j], dtype=complex64), 'bench A')
    """
    ds = _to_dataset(cap, split_complex=True)
    engine = engine or _netcdf_engine()
    fmt = "NETCDF3_64BIT" if engine == "scipy" else "NETCDF4"
    if engine == "scipy" and "channel" in ds.coords:
        ds = ds.assign_coords(channel=ds["channel"].astype(np.int32)) \
            if ds["channel"].dtype.kind in "iu" else ds
    with atomic_path(path, overwrite=overwrite) as tmp:
        ds.to_netcdf(tmp, engine=engine, format=fmt)
    return Path(path)


def _netcdf_engine() -> str:
    import importlib.util

    if importlib.util.find_spec("netCDF4"):
        return "netcdf4"
    if importlib.util.find_spec("h5netcdf") and importlib.util.find_spec("h5py"):
        return "h5netcdf"
    return "scipy"


def read_netcdf(path: str | os.PathLike[str], *, chunks: Any = None,
                **overrides: Any) -> xr.DataArray:
    """Read a capture written by :func:`write_netcdf` (``chunks=`` reads lazily).

    Any netCDF file with a variable ``iq`` (or ``iq_real`` + ``iq_imag``) along ``time``
    (and optionally ``channel``) and a ``sample_rate`` attr (or ``sample_rate=``) is read.
    """
    p = Path(path)
    if not p.exists():
        raise CaptureError(f"{p}: no such file")
    if p.stat().st_size == 0:
        raise CaptureError(f"{p}: the file is empty (0 bytes)")
    try:
        ds = xr.open_dataset(p, chunks=_open_chunks(chunks))
    except (OSError, ValueError) as exc:
        raise CaptureError(f"{p}: cannot be read as netCDF: {exc}") from None
    if chunks is None:
        ds = ds.load()
        ds.close()
    return _from_dataset(ds, p, dict(overrides))


def write_zarr(cap: xr.DataArray, path: str | os.PathLike[str], *,
               overwrite: bool = False) -> Path:
    """Write a capture as a Zarr store (a folder); complex samples stored as complex.

    Returns the path written.

    Examples
    --------
    >>> import tempfile, pathlib, quadkit
    >>> cap = quadkit.capture([1 + 2j, -3 - 4j], sample_rate=1e6)
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "pair.zarr"
    >>> _ = quadkit.io.write_zarr(cap, path)
    >>> quadkit.io.read_zarr(path).values
    array([ 1.+2.j, -3.-4.j], dtype=complex64)
    """
    ds = _to_dataset(cap, split_complex=False)
    with atomic_path(path, overwrite=overwrite) as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds.to_zarr(tmp, mode="w-", consolidated=False)
    return Path(path)


def read_zarr(path: str | os.PathLike[str], *, chunks: Any = None,
              **overrides: Any) -> xr.DataArray:
    """Read a capture written by :func:`write_zarr` (``chunks=`` reads lazily)."""
    p = Path(path)
    if not p.exists():
        raise CaptureError(f"{p}: no such Zarr store")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ds = xr.open_zarr(p, chunks=_open_chunks(chunks), consolidated=False)
    except Exception as exc:  # zarr raises several unrelated types for a bad store
        raise CaptureError(f"{p}: cannot be read as a Zarr store: {exc}") from None
    if chunks is None:
        ds = ds.load()
    return _from_dataset(ds, p, dict(overrides))
