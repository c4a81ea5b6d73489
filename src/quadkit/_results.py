"""Building measurement results and turning them into plain JSON-able Python."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr

__all__ = ["quantity", "result", "to_json"]


def quantity(value: Any, units: str, long_name: str, dims: tuple[str, ...] | str = ()) -> xr.DataArray:
    """A result variable with its ``units`` and ``long_name`` attrs.

    ``value`` may be a scalar, a numpy/dask array (give ``dims``) or a DataArray (kept, attrs
    added).
    """
    if isinstance(dims, str):
        dims = (dims,)
    if isinstance(value, xr.DataArray):
        out = value.copy(deep=False)
    else:
        out = xr.DataArray(value, dims=dims)
    out.attrs = {**out.attrs, "units": units, "long_name": long_name}
    return out


def result(
    variables: Mapping[str, xr.DataArray],
    *,
    coords: Mapping[str, Any] | None = None,
    attrs: Mapping[str, Any] | None = None,
) -> xr.Dataset:
    """A measurement result: one data variable per figure, each with units and long_name."""
    for name, var in variables.items():
        if "units" not in var.attrs or "long_name" not in var.attrs:
            raise AssertionError(f"result variable {name!r} lacks units or long_name")
    ds = xr.Dataset(dict(variables), coords=coords, attrs=dict(attrs or {}))
    return ds


def _plain(value: Any) -> Any:
    if isinstance(value, (xr.DataArray, xr.Variable)):
        return _plain(value.values)
    if isinstance(value, np.ndarray):
        if value.ndim == 0:
            return _plain(value.item())
        return [_plain(v) for v in value]
    if isinstance(value, (np.generic,)):
        return _plain(value.item())
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, complex):
        return {"real": _plain(value.real), "imag": _plain(value.imag)}
    if isinstance(value, Mapping):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (np.datetime64,)):
        return str(value)
    if hasattr(value, "isoformat"):
        return value.isoformat()
    return str(value)


def to_json(result: Any) -> Any:
    """Turn any quadkit result into plain JSON-able Python: numbers, lists, strings, dicts.

    A Dataset becomes a dict of its data variables and coordinates (arrays become nested
    lists); a DataArray (a spectrum, say) a dict of its values under its name, its
    coordinates and its ``units``; lazy values are computed. A result may ask for a friendlier layout through two
    attrs: ``json_records`` maps an output key to a dimension (``{"tones": "tone"}``: the
    variables along ``tone`` become a list of records, their ``tone_`` prefix dropped), and
    ``json_groups`` maps an output key to a name prefix (``{"modulation": "modulation_"}``:
    those scalars become one nested dict). Attrs named in ``json_attrs`` are copied as they are. NaN and infinities become ``None`` (valid JSON ``null``);
    complex numbers become ``{"real": ..., "imag": ...}``.

    Examples
    --------
    >>> import json, numpy as np, xarray as xr, quadkit
    >>> ds = xr.Dataset({"power_dbfs": ((), np.float32(-3.0)), "tone_hz": ("tone", [1.0, 2.0])})
    >>> json.dumps(quadkit.to_json(ds), sort_keys=True)
    '{"power_dbfs": -3.0, "tone_hz": [1.0, 2.0]}'
    """
    if isinstance(result, xr.Dataset):
        return _dataset_json(result.compute())
    if isinstance(result, xr.DataArray):
        name = str(result.name) if result.name is not None else "values"
        out = _dataset_json(result.compute().to_dataset(name=name))
        if "units" in result.attrs and "units" not in out:
            out["units"] = _plain(result.attrs["units"])
        return out
    return _plain(result)


def _dataset_json(ds: xr.Dataset) -> dict[str, Any]:
    records = dict(ds.attrs.get("json_records", {}) or {})
    groups = dict(ds.attrs.get("json_groups", {}) or {})
    taken: set[str] = set()
    out: dict[str, Any] = {}
    for key, dim in records.items():
        names = [str(n) for n, v in ds.data_vars.items() if dim in v.dims]
        taken.update(names)
        size = ds.sizes.get(dim, 0)
        prefix = f"{dim}_"
        rows = []
        for i in range(size):
            row = ds[names].isel({dim: i})
            rows.append({(n[len(prefix):] if n.startswith(prefix) else n): _plain(row[n])
                         for n in names})
        out[key] = rows
    for key, prefix in groups.items():
        names = [str(n) for n in ds.data_vars if str(n).startswith(prefix)]
        taken.update(names)
        out[key] = {n[len(prefix):]: _plain(ds[n]) for n in names}
    for name, var in ds.data_vars.items():
        if str(name) not in taken:
            out[str(name)] = _plain(var)
    skip = set(records.values())
    for name, coord in ds.coords.items():
        if str(name) not in out and str(name) not in skip and not (
            any(d in skip for d in coord.dims)
        ):
            out[str(name)] = _plain(coord)
    for name in ds.attrs.get("json_attrs", ()) or ():
        out[str(name)] = _plain(ds.attrs.get(name))
    return out
