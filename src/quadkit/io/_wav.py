"""WAV files: two channels are I and Q, one channel is a real capture.

Sample formats: 16- and 32-bit integer PCM (scaled to full scale 1.0: divided by 32768 and
2**31) and 32-bit float; 8-bit PCM (unsigned, mid-code 128) and 64-bit float are read too.
WAV stores the sample rate as a whole number of hertz, so only integer rates can be written.
Integer PCM is written as the capture divided by its ``full_scale`` (so it reads back with
full scale 1.0 and the same dBFS); samples beyond full scale are clipped with a
``RuntimeWarning``, and NaN/Inf raise :class:`quadkit.CaptureError`. A file shorter than its
header says raises :class:`quadkit.CaptureError`.
"""

from __future__ import annotations

import os
import struct
import warnings
from pathlib import Path
from typing import Any, Literal

import xarray as xr

from .._capture import capture
from .._checks import check_option
from .._errors import CaptureError
from ._atomic import atomic_path
from ._common import (
    MetadataLossWarning,
    apply_overrides,
    check_frequency,
    encoded_blocks,
    existing_file,
    warn_metadata_loss,
)
from ._datatypes import parse_datatype
from ._lazy import load_samples, whole_samples

__all__ = ["read_wav", "write_wav"]

_PCM, _FLOAT, _EXTENSIBLE = 1, 3, 0xFFFE
_WAV_DTYPES = {"int16": (_PCM, 16), "int32": (_PCM, 32), "float32": (_FLOAT, 32)}


def _parse(p: Path) -> tuple[int, int, int, int, int, int]:
    """(format tag, channels, rate, bits, data offset, data size) of a RIFF/WAVE file."""
    size = p.stat().st_size
    if size == 0:
        raise CaptureError(f"{p}: the file is empty (0 bytes)")
    with open(p, "rb") as fh:
        head = fh.read(12)
        if len(head) < 12 or head[:4] not in (b"RIFF", b"RIFX") or head[8:12] != b"WAVE":
            raise CaptureError(f"{p}: not a WAV file (no RIFF/WAVE header)")
        if head[:4] == b"RIFX":
            raise CaptureError(f"{p}: big-endian WAV (RIFX) is not supported")
        fmt = None
        pos = 12
        while pos + 8 <= size:
            fh.seek(pos)
            cid, clen = struct.unpack("<4sI", fh.read(8))
            if cid == b"fmt ":
                body = fh.read(min(clen, 40))
                if len(body) < 16:
                    raise CaptureError(f"{p}: WAV 'fmt ' chunk too short ({clen} bytes)")
                tag, ch, rate, _, _, bits = struct.unpack("<HHIIHH", body[:16])
                if tag == _EXTENSIBLE and len(body) >= 26:
                    tag = struct.unpack("<H", body[24:26])[0]
                fmt = (tag, ch, rate, bits)
            elif cid == b"data":
                if fmt is None:
                    raise CaptureError(f"{p}: WAV 'data' chunk comes before its 'fmt ' chunk")
                avail = size - (pos + 8)
                if clen > avail:
                    raise CaptureError(
                        f"{p}: truncated: the WAV header declares {clen} bytes of samples but "
                        f"the file holds only {avail}; {clen - avail} bytes are missing. "
                        "Copy or record the file again; to use the samples that are there, "
                        f"read them with quadkit.io.read_raw(..., offset={pos + 8})"
                    )
                return (*fmt, pos + 8, clen)
            pos += 8 + clen + (clen & 1)
    raise CaptureError(f"{p}: WAV file has no {'data' if fmt else 'fmt '} chunk")


def _datatype(p: Path, tag: int, bits: int, complex_: bool) -> str:
    c = "c" if complex_ else "r"
    if tag == _PCM and bits in (16, 32):
        return f"{c}i{bits}_le"
    if tag == _PCM and bits == 8:
        return f"{c}u8"
    if tag == _FLOAT and bits in (32, 64):
        return f"{c}f{bits}_le"
    raise CaptureError(f"{p}: WAV sample format (tag {tag}, {bits} bits) is not supported; "
                       "expected 8/16/32-bit PCM or 32/64-bit float")


def read_wav(
    path: str | os.PathLike[str],
    *,
    center_frequency: float = 0.0,
    iq: bool | None = None,
    chunks: Any = None,
    **overrides: Any,
) -> xr.DataArray:
    """Read a WAV file: two channels as I and Q, one channel as a real capture.

    Parameters
    ----------
    path : str or path-like
        The ``.wav`` file.
    center_frequency : float, default 0.0
        Hz that baseband 0 Hz stands for (WAV has no field for it).
    iq : bool, optional
        Pair channels as (I, Q). Default: only for exactly two channels. ``iq=True`` with
        2k channels gives k complex channels; ``iq=False`` keeps all channels real.
    chunks : int, sequence of int or "auto", optional
        Read lazily, piece by piece (see :func:`quadkit.io.read_raw`).
    **overrides
        Attrs to set (``description=``, ``sample_rate=`` to correct the header, ...).

    Returns
    -------
    xarray.DataArray
        complex64 (I/Q) or float32 (real); int16 divided by 32768, int32 by 2**31, float32
        as stored.

    Examples
    --------
    >>> import numpy as np, tempfile, pathlib, scipy.io.wavfile, quadkit
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "iq.wav"
    >>> scipy.io.wavfile.write(path, 48000, np.array([[16384, -8192]], np.int16))
    >>> cap = quadkit.io.read_wav(path)
    >>> cap.values, cap.attrs["sample_rate"]
    (array([0.5-0.25j], dtype=complex64), 48000.0)
    """
    p = existing_file(path)
    tag, channels, rate, bits, offset, size = _parse(p)
    if channels < 1:
        raise CaptureError(f"{p}: WAV header says {channels} channels")
    pair = channels == 2 if iq is None else bool(iq)
    if pair and channels % 2:
        raise CaptureError(f"{p}: iq=True needs an even number of channels; the file has "
                           f"{channels}")
    datatype = _datatype(p, tag, bits, pair)
    fmt = parse_datatype(datatype)
    n_ch = channels // 2 if pair else channels
    frames = whole_samples(str(p), size, fmt.sample_bytes * n_ch, what="WAV data chunk")
    if rate <= 0:
        raise CaptureError(f"{p}: WAV header gives sample rate {rate} Hz; pass sample_rate=")
    fc = check_frequency(center_frequency, p)
    data = load_samples(p, offset=offset, count=frames, datatype=datatype, channels=n_ch,
                        chunks=chunks)
    cap = capture(data, sample_rate=float(rate), center_frequency=fc, file_datatype=datatype)
    return apply_overrides(cap, overrides, p)


def write_wav(
    cap: xr.DataArray,
    path: str | os.PathLike[str],
    *,
    dtype: Literal["int16", "int32", "float32"] = "int16",
    overwrite: bool = False,
) -> Path:
    """Write a capture as WAV: complex as two channels (I, Q), real as one.

    A ``("channel", "time")`` capture writes one WAV channel per real channel, or an I and a
    Q channel per complex channel. WAV stores only the samples and an **integer** sample
    rate in Hz: a capture at a non-integer rate raises ``CaptureError`` (resample it or use
    SigMF); the centre frequency and other metadata are not stored. ``int16``/``int32``
    divide the samples by the capture's ``full_scale`` and map the result's 1.0 to 32768 /
    2**31 (rounded half to even, clipped: +1.0 becomes 32767; samples beyond full scale
    warn with ``RuntimeWarning``; NaN/Inf raise ``CaptureError``). ``float32`` writes the
    samples as they are (the ``full_scale`` is not stored). The file appears
    only when complete; an existing one is replaced only with ``overwrite=True``. Returns the
    path written.

    Examples
    --------
    >>> import tempfile, pathlib, scipy.io.wavfile, quadkit
    >>> cap = quadkit.capture([0.5 - 0.25j, 1j], sample_rate=48000)
    >>> path = pathlib.Path(tempfile.mkdtemp()) / "iq.wav"
    >>> _ = quadkit.io.write_wav(cap, path)
    >>> scipy.io.wavfile.read(path)
    (48000, array([[16384, -8192],
           [    0, 32767]], dtype=int16))
    """
    check_option("write_wav", "dtype", dtype, tuple(_WAV_DTYPES))
    fs = float(cap.attrs.get("sample_rate", 0))
    if not fs.is_integer() or not 0 < fs < 2**32:
        raise CaptureError(
            f"{path}: WAV stores the sample rate as a whole number of hertz (below 2**32); "
            f"this capture has {fs!r} Hz; resample it to an integer rate or write SigMF"
        )
    tag, bits = _WAV_DTYPES[dtype]
    complex_ = cap.dtype.kind == "c"
    fmt = parse_datatype(_datatype(Path(path), tag, bits, complex_))
    n_ch = cap.sizes.get("channel", 1) * (2 if complex_ else 1)
    data_bytes = cap.sizes["time"] * n_ch * bits // 8
    if data_bytes + 44 >= 2**32:
        raise CaptureError(f"{path}: {data_bytes} bytes of samples do not fit in a WAV file "
                           "(4 GiB limit); write SigMF instead")
    block_align = n_ch * bits // 8
    header = b"RIFF" + struct.pack("<I", 36 + data_bytes + (data_bytes & 1)) + b"WAVE"
    header += b"fmt " + struct.pack("<IHHIIHH", 16, tag, n_ch, int(fs), int(fs) * block_align,
                                    block_align, bits)
    header += b"data" + struct.pack("<I", data_bytes)
    warn_metadata_loss(cap, path, "WAV")
    if complex_ and cap.sizes.get("channel", 1) > 1:
        warnings.warn(
            f"{path}: {cap.sizes['channel']} complex channels are stored as "
            f"{n_ch} WAV channels (I, Q, I, Q, ...); read them back with read_wav(path, iq=True)",
            MetadataLossWarning, stacklevel=2)
    with atomic_path(path, overwrite=overwrite) as tmp, open(tmp, "wb") as fh:
        fh.write(header)
        for raw in encoded_blocks(cap, fmt, path):
            fh.write(raw)
        if data_bytes & 1:
            fh.write(b"\0")
    return Path(path)
