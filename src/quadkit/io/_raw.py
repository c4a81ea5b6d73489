"""Raw interleaved binary files and ``.npy`` files."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .._capture import capture
from .._checks import check_positive_int
from .._errors import CaptureError
from ._atomic import atomic_path
from ._common import check_frequency, check_rate, encoded_blocks, existing_file, warn_metadata_loss
from ._datatypes import parse_datatype
from ._lazy import load_samples, whole_samples

__all__ = ["read_raw", "write_raw", "read_npy", "write_npy"]


def read_raw(
    path: str | os.PathLike[str],
    *,
    dtype: str,
    sample_rate: float,
    center_frequency: float = 0.0,
    offset: int = 0,
    count: int | None = None,
    chunks: Any = None,
    num_channels: int = 1,
    **metadata: Any,
) -> xr.DataArray:
    """Read a headerless file of interleaved samples.

    Parameters
    ----------
    path : str or path-like
        The file.
    dtype : str
        Sample format named as SigMF names it: ``"ci16_le"``, ``"cf32_le"``, ``"cu8"``,
        ``"ri16_be"``, ... (see :data:`quadkit.io.DATATYPES`). Integers scale to full scale
        1.0: signed b-bit values are divided by 2**(b-1); unsigned ones have the mid-code
        2**(b-1) subtracted first (cu8: (x - 128)/128).
    sample_rate : float
        Hz, positive.
    center_frequency : float, default 0.0
        Hz that baseband 0 Hz stands for.
    offset : int, default 0
        Header bytes to skip before the first sample.
    count : int, optional
        Samples (per channel) to read; default all that follow ``offset``.
    chunks : int, sequence of int or "auto", optional
        Read lazily: a dask-backed capture with chunks of this many samples along ``time``
        (the last one may be shorter). Each task reads its own piece of the file.
    num_channels : int, default 1
        Channels interleaved sample by sample (SigMF ``core:num_channels`` order); more than
        one gives dims ``("channel", "time")``.
    **metadata
        Further capture attrs (``description``, ``hardware``, ``start_time``, ...).

    Returns
    -------
    xarray.DataArray
        complex64 for integer and cf32 formats, complex128 for cf64, float32/float64 for the
        real ``r*`` formats. The attr ``file_datatype`` records ``dtype``.

    Raises
    ------
    CaptureError
        Missing or empty file, a size that is not a whole number of samples (with the bytes
        left over), an unknown datatype, a bad sample rate, or a ``count`` beyond the end.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib, quadkit
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "bench.iq"
    >>> np.array([16384, 0, -32768, 8192], "<i2").tofile(path)
    >>> cap = quadkit.io.read_raw(path, dtype="ci16_le", sample_rate=2e6)
    >>> cap.values
    array([ 0.5+0.j  , -1. +0.25j], dtype=complex64)
    """
    p = existing_file(path)
    fmt = parse_datatype(dtype, source=str(p))
    fs = check_rate(sample_rate, p)
    fc = check_frequency(center_frequency, p)
    channels = check_positive_int("read_raw", "num_channels", num_channels)
    offset = int(offset)
    if offset < 0:
        raise ValueError(f"read_raw: offset={offset} must be >= 0 bytes")
    size = p.stat().st_size
    frame = fmt.sample_bytes * channels
    if offset > size:
        raise CaptureError(f"{p}: offset={offset} bytes is past the end of the {size}-byte file")
    if count is None:
        frames = whole_samples(str(p), size - offset, frame, what="file")
    else:
        frames = check_positive_int("read_raw", "count", count)
        if offset + frames * frame > size:
            have = (size - offset) // frame
            raise CaptureError(
                f"{p}: count={frames} samples from byte {offset} need {frames * frame} bytes; "
                f"the file holds only {have} whole samples after the offset"
            )
    data = load_samples(p, offset=offset, count=frames, datatype=fmt.name, channels=channels,
                        chunks=chunks)
    metadata.setdefault("file_datatype", fmt.name)
    return capture(data, sample_rate=fs, center_frequency=fc, **metadata)


def write_raw(
    cap: xr.DataArray,
    path: str | os.PathLike[str],
    *,
    dtype: str,
    overwrite: bool = False,
) -> Path:
    """Write the samples alone, interleaved, in the SigMF-named format ``dtype``.

    Channels of a ``("channel", "time")`` capture are interleaved sample by sample. No
    metadata is stored: keep the sample rate and centre frequency yourself (or write SigMF).
    Integer formats divide the samples by the capture's ``full_scale`` and map the result's
    1.0 to the integer full scale (ci16: times 32768), round half to even and clip (a
    ``RuntimeWarning`` says how many samples were beyond full scale); NaN/Inf raise
    :class:`quadkit.CaptureError`. Float formats write the samples as they are. The file appears only when complete; an existing one is replaced only with
    ``overwrite=True``. A lazy capture is written chunk by chunk. Returns the path written.

    Examples
    --------
    >>> import tempfile, pathlib, quadkit
    >>> cap = quadkit.capture([1 + 2j, -3 - 4j], sample_rate=1e3)
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "two.cf32"
    >>> quadkit.io.write_raw(cap, path, dtype="cf32_le").name
    'two.cf32'
    >>> path.read_bytes().hex()
    '0000803f00000040000040c0000080c0'
    """
    fmt = parse_datatype(dtype, source=str(path))
    if fmt.is_complex is False and cap.dtype.kind == "c":
        raise CaptureError(
            f"{path}: datatype {fmt.name!r} is real but the capture is complex; use "
            f"'c{fmt.name[1:]}'"
        )
    warn_metadata_loss(cap, path, "a raw file")
    with atomic_path(path, overwrite=overwrite) as tmp, open(tmp, "wb") as fh:
        for raw in encoded_blocks(cap, fmt, path):
            fh.write(raw)
    return Path(path)


def _npy_header(p: Any) -> tuple[tuple[int, ...], bool, np.dtype, int]:
    with open(p, "rb") as fh:
        try:
            major, _ = np.lib.format.read_magic(fh)
            if major == 1:
                shape, fortran, dtype = np.lib.format.read_array_header_1_0(fh)
            else:
                shape, fortran, dtype = np.lib.format.read_array_header_2_0(fh)
        except ValueError as exc:
            raise CaptureError(f"{p}: not a valid .npy file ({exc})") from None
        return shape, fortran, dtype, fh.tell()


_NPY_DATATYPES = {"c8": "cf32", "c16": "cf64", "f4": "rf32", "f8": "rf64"}


def read_npy(
    path: str | os.PathLike[str],
    *,
    sample_rate: float,
    center_frequency: float = 0.0,
    chunks: Any = None,
    **metadata: Any,
) -> xr.DataArray:
    """Read a ``.npy`` array of samples, shape ``(time,)`` or ``(channel, time)``.

    ``.npy`` holds no metadata, so ``sample_rate`` is required. Loaded with
    ``allow_pickle=False``: object arrays are refused. Values are taken as they are (no
    integer scaling; integer arrays become float32). ``chunks=`` reads float and complex
    arrays lazily, piece by piece.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib, quadkit
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "x.npy"
    >>> np.save(path, np.array([1j, -1], np.complex64))
    >>> quadkit.io.read_npy(path, sample_rate=48e3).values
    array([ 0.+1.j, -1.+0.j], dtype=complex64)
    """
    p = existing_file(path)
    fs = check_rate(sample_rate, p)
    fc = check_frequency(center_frequency, p)
    if p.stat().st_size == 0:
        raise CaptureError(f"{p}: the file is empty (0 bytes)")
    shape, fortran, dtype, offset = _npy_header(p)
    if dtype.hasobject:
        raise CaptureError(f"{p}: holds Python objects; only numeric arrays are read "
                           "(pickles are never loaded)")
    if len(shape) not in (1, 2):
        raise CaptureError(f"{p}: array of shape {shape}; expected (time,) or (channel, time)")
    if 0 in shape:
        raise CaptureError(f"{p}: the array is empty (shape {shape})")
    if chunks is None:
        try:
            data = np.load(p, allow_pickle=False)
        except ValueError as exc:
            raise CaptureError(f"{p}: cannot be read as a .npy array ({exc})") from None
    else:
        code = f"{dtype.kind}{dtype.itemsize}"
        if code not in _NPY_DATATYPES or (fortran and len(shape) == 2):
            raise CaptureError(
                f"{p}: lazy reading (chunks=) needs a C-ordered float or complex array; this "
                f"one is {dtype} ({'Fortran' if fortran else 'C'} order); read it without chunks"
            )
        end = "be" if dtype.byteorder == ">" or (dtype.byteorder == "=" and
                                                  np.little_endian is False) else "le"
        datatype = f"{_NPY_DATATYPES[code]}_{end}"
        channels = shape[0] if len(shape) == 2 else 1
        n_time = shape[-1]
        expect = offset + channels * n_time * dtype.itemsize
        if p.stat().st_size < expect:
            raise CaptureError(f"{p}: truncated: {p.stat().st_size} bytes, the header "
                               f"announces {expect}")
        data = load_samples(p, offset=offset, count=n_time, datatype=datatype,
                            channels=channels, row_stride=n_time * dtype.itemsize,
                            chunks=chunks)
    return capture(data, sample_rate=fs, center_frequency=fc, **metadata)


def write_npy(cap: xr.DataArray, path: str | os.PathLike[str], *, overwrite: bool = False) -> Path:
    """Write the samples (not the metadata) as a ``.npy`` array, atomically; return the path.

    Examples
    --------
    >>> import tempfile, pathlib, numpy as np, quadkit
    >>> cap = quadkit.capture([1j, 2], sample_rate=1e3)
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "x.npy"
    >>> _ = quadkit.io.write_npy(cap, path)
    >>> np.load(path)
    array([0.+1.j, 2.+0.j], dtype=complex64)
    """
    warn_metadata_loss(cap, path, ".npy", kept=())
    with atomic_path(path, overwrite=overwrite) as tmp, open(tmp, "wb") as fh:
        np.save(fh, np.asarray(cap.values), allow_pickle=False)
    return Path(path)
