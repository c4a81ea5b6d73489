"""Capture files in and out: SigMF, raw binary, WAV, netCDF, Zarr and ``.npy``.

==========================  ================================  =============================
file                        read                              write
==========================  ================================  =============================
``.sigmf-meta/-data``       :func:`read_sigmf`                :func:`write_sigmf`
``.sigmf`` (tar archive)    :func:`read_sigmf`                :func:`write_sigmf`
``.wav``                    :func:`read_wav`                  :func:`write_wav`
``.nc``                     :func:`read_netcdf`               :func:`write_netcdf`
``.zarr``                   :func:`read_zarr`                 :func:`write_zarr`
``.npy``                    :func:`read_npy`                  :func:`write_npy`
anything else (raw)         :func:`read_raw` (``dtype=``,     :func:`write_raw` (``dtype=``)
                            ``sample_rate=``)
==========================  ================================  =============================

:func:`read` and :func:`write` pick by extension. Sample formats are named as SigMF names
them (:data:`DATATYPES`: ``ci16_le``, ``cf32_le``, ``cu8``, ``ri16_be``, ...); integer
samples scale to full scale 1.0 (ci16: divided by 32768; unsigned types have the mid-code
subtracted first). Writing an integer format divides the samples by the capture's
``full_scale`` first, so the file reads back with full scale 1.0 and the same dBFS (float
formats keep the samples and the ``full_scale`` attr); samples beyond full scale are clipped
with one ``RuntimeWarning``, NaN/Inf raise :class:`quadkit.CaptureError`. Every reader takes ``chunks=`` and then returns a lazy (dask-backed)
capture whose tasks each read their own piece of the file: they carry (path, byte offset,
count, datatype), not an open file, so they pickle to ``dask.distributed`` workers, and
building the graph reads nothing. Writers build the file under a temporary name beside the
target and rename it when complete, and never replace an existing file unless
``overwrite=True``. Bad files raise :class:`quadkit.CaptureError` naming the file and the
problem.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import xarray as xr

from .._errors import CaptureError
from ._atomic import FileExistsCaptureError
from ._common import MetadataLossWarning
from ._datatypes import KNOWN_DATATYPES as DATATYPES
from ._raw import read_npy, read_raw, write_npy, write_raw
from ._sigmf import read_sigmf, write_sigmf
from ._stores import read_netcdf, read_zarr, write_netcdf, write_zarr
from ._wav import read_wav, write_wav

__all__ = [
    "read", "write",
    "read_sigmf", "write_sigmf",
    "read_raw", "write_raw",
    "read_wav", "write_wav",
    "read_netcdf", "write_netcdf",
    "read_zarr", "write_zarr",
    "read_npy", "write_npy",
    "DATATYPES", "FileExistsCaptureError", "MetadataLossWarning",
]

_ACCESSOR = ("write", "write_sigmf", "write_raw", "write_wav", "write_netcdf", "write_zarr",
             "write_npy")


def _kind(path: str | os.PathLike[str]) -> str:
    name = Path(path).name.lower()
    for ext, kind in ((".sigmf-meta", "sigmf"), (".sigmf-data", "sigmf"), (".sigmf", "sigmf"),
                      (".wav", "wav"), (".nc", "netcdf"), (".zarr", "zarr"), (".npy", "npy")):
        if name.endswith(ext):
            return kind
    return "raw"


def read(path: str | os.PathLike[str], **overrides: Any) -> xr.DataArray:
    """Read a capture file, choosing the reader by extension.

    ``.sigmf-meta``, ``.sigmf-data``, ``.sigmf`` → :func:`read_sigmf`; ``.wav`` →
    :func:`read_wav`; ``.nc`` → :func:`read_netcdf`; ``.zarr`` → :func:`read_zarr`;
    ``.npy`` → :func:`read_npy` (needs ``sample_rate=``); any other extension is raw binary
    → :func:`read_raw` (needs ``dtype=`` and ``sample_rate=``). Keyword arguments go to the
    reader: ``chunks=`` for a lazy read, and attrs to set instead of the file's.

    Examples
    --------
    >>> import tempfile, pathlib, quadkit
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> cap = quadkit.synth.tone(250.0, sample_rate=1e3, n_samples=4)
    >>> quadkit.io.write(cap, folder / "tone.sigmf-data").name
    'tone.sigmf-meta'
    >>> quadkit.io.read(folder / "tone.sigmf-meta").values.round(3)
    array([ 1.+0.j,  0.+1.j, -1.+0.j, -0.-1.j], dtype=complex64)
    >>> quadkit.io.read(folder / "tone.sigmf-data", chunks=2).chunks
    ((2, 2),)
    """
    kind = _kind(path)
    if kind == "raw":
        missing = [k for k in ("dtype", "sample_rate") if k not in overrides]
        if missing:
            raise CaptureError(
                f"{path}: extension not recognised, so it is read as raw samples, which needs "
                f"{' and '.join(m + '=' for m in missing)} (e.g. dtype='ci16_le', "
                "sample_rate=2e6); known extensions: .sigmf-meta, .sigmf-data, .sigmf, .wav, "
                ".nc, .zarr, .npy"
            )
        return read_raw(path, **overrides)
    if kind == "npy" and "sample_rate" not in overrides:
        raise CaptureError(f"{path}: .npy files hold no sample rate; pass sample_rate= (Hz)")
    return {"sigmf": read_sigmf, "wav": read_wav, "netcdf": read_netcdf, "zarr": read_zarr,
            "npy": read_npy}[kind](path, **overrides)


def write(cap: xr.DataArray, path: str | os.PathLike[str], **options: Any) -> Path:
    """Write a capture, choosing the writer by extension (the same table as :func:`read`).

    Options go to the writer: ``overwrite=`` for all, ``dtype=`` for SigMF, WAV and raw
    (required for raw). Returns the path written (for SigMF the ``.sigmf-meta`` file).
    """
    kind = _kind(path)
    if kind == "raw" and "dtype" not in options:
        raise CaptureError(f"{path}: extension not recognised, so it is written as raw "
                           "samples, which needs dtype= (e.g. 'ci16_le'); or use .sigmf-meta")
    writer = {"sigmf": write_sigmf, "wav": write_wav, "netcdf": write_netcdf,
              "zarr": write_zarr, "npy": write_npy, "raw": write_raw}[kind]
    return writer(cap, path, **options)
