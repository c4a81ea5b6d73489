"""Frequency shifts and conversion between real passband and complex baseband samples.

Conventions (see DESIGN.md): a real passband signal is ``x(t) = Re{z(t) exp(j 2 pi f_c t)}``,
so the real tone ``A cos(2 pi f_c t + phi)`` has the complex envelope ``z = A exp(j phi)``.
A capture's ``center_frequency`` is the RF frequency that baseband 0 Hz stands for; every
operation here keeps each signal's absolute frequency (``center_frequency + offset``).

Oscillators take their phase from the absolute sample index (:func:`quadkit._capture.start_index`):
the phase of sample n is computed exactly (to ~1e-9 cycles) at every multiple of 4096 and
advanced inside each such block by a table of ``exp(j 2 pi ratio m)``, so the phase error stays
near float32 rounding (~1e-7 rad) for any n, a slice of a shifted capture equals the shift of a
slice, and the result is bit-identical whatever the chunking.

Warning: :func:`upconvert` makes real passband samples someone may send to a DAC and a
transmitter; respect your local radio regulations and licensed practice, test on a cabled
set-up with attenuators and keep within the input power limits of the receiver.
"""

from __future__ import annotations

import math
from fractions import Fraction
from typing import Any

import numpy as np
import xarray as xr

from . import _capture
from ._checks import check_finite, check_positive
from ._nco import phase_cycles

__all__ = ["shift", "downconvert", "upconvert"]
_ACCESSOR = ("shift", "downconvert", "upconvert")

_BLOCK_BITS = 12
_BLOCK = 1 << _BLOCK_BITS


def _nco(ratio: float, start: int, count: int, dtype: Any = np.complex64) -> np.ndarray:
    """``exp(j 2 pi ratio n)`` for absolute n = start .. start + count - 1.

    Block anchors at multiples of 4096 come from :func:`quadkit._nco.phase_cycles` (exact for
    any index); within a block the phasor is the anchor times a float64-accurate table, so the
    value of sample n depends on n alone (not on ``start``).
    """
    dtype = np.dtype(np.complex128 if np.dtype(dtype) == np.complex128 else np.complex64)
    if count <= 0:
        return np.empty(0, dtype)
    ratio = float(ratio)
    k0 = start >> _BLOCK_BITS
    k1 = (start + count - 1) >> _BLOCK_BITS
    # ratio * 4096 is exact (a power of two), so the anchors' phases are exact too
    anchors = np.exp(2j * np.pi * phase_cycles(ratio * _BLOCK, k0, k1 - k0 + 1))
    table = np.exp(2j * np.pi * phase_cycles(ratio, 0, _BLOCK))
    osc = np.multiply.outer(anchors.astype(dtype), table.astype(dtype))
    off = start - (k0 << _BLOCK_BITS)
    return osc.reshape(-1)[off:off + count]


def _recentred(attrs: dict, delta_hz: float) -> dict:
    """Attr updates for a capture whose 0 Hz now stands for ``delta_hz`` more than before:
    ``center_frequency`` and each retune segment's ``center_frequency``."""
    out: dict = {"center_frequency": float(attrs.get("center_frequency", 0.0)) + delta_hz}
    segs = attrs.get("segments")
    if isinstance(segs, (list, tuple)):
        out["segments"] = [
            {**s, "center_frequency": float(s["center_frequency"]) + delta_hz}
            if isinstance(s, dict) and isinstance(s.get("center_frequency"), (int, float))
            else s
            for s in segs
        ]
    return out


def _reindexed(attrs: dict, ratio: Fraction) -> dict:
    """Attr updates for a rate change by ``ratio`` (new / old): the sample indices of the
    ``annotations`` and ``segments`` attrs, rounded to the nearest new sample."""
    out: dict = {}
    if ratio == 1:
        return out
    for key, fields in (("annotations", ("start_sample", "sample_count")),
                        ("segments", ("start_sample",))):
        items = attrs.get(key)
        if not isinstance(items, (list, tuple)):
            continue
        new = []
        for item in items:
            item = dict(item) if isinstance(item, dict) else item
            if isinstance(item, dict):
                for f in fields:
                    if isinstance(item.get(f), (int, np.integer)):
                        item[f] = int(math.floor(item[f] * ratio + Fraction(1, 2)))
            new.append(item)
        out[key] = new
    return out


def _carried(attrs: dict, *, ratio: Fraction = Fraction(1), delta_hz: float = 0.0) -> dict:
    """The attr updates of an operation that changes the rate by ``ratio`` (new / old) and
    moves baseband 0 Hz up by ``delta_hz``: indices re-scaled first, then the centre
    frequencies moved, each step reading the attrs the previous one left (the one path every
    operation of :mod:`mixing` and :mod:`decimation` takes, so the updates compose)."""
    out = _reindexed(attrs, Fraction(ratio))
    if delta_hz:
        out.update(_recentred({**attrs, **out}, float(delta_hz)))
    return out


def _shift_block(x: np.ndarray, *, ratio: float, start: int, out_dtype: np.dtype,
                 block_info: Any = None) -> np.ndarray:
    first = start
    if block_info is not None:
        first = start + block_info[0]["array-location"][-1][0]
    osc = _nco(ratio, first, x.shape[-1], out_dtype)
    return np.multiply(x, osc, dtype=out_dtype)


def _complex_dtype(dtype: np.dtype) -> np.dtype:
    return np.dtype(np.complex128 if dtype in (np.float64, np.complex128) else np.complex64)


def _check_cap(func: str, cap: Any) -> None:
    if not isinstance(cap, xr.DataArray) or "time" not in cap.dims:
        raise ValueError(f"{func}: cap must be a capture (xarray.DataArray with a 'time' dim), "
                         f"got {type(cap).__name__}")


def _mix(cap: xr.DataArray, offset_hz: float) -> Any:
    """The samples of ``cap`` times exp(j 2 pi offset n / fs), n the absolute index."""
    fs = _capture.sample_rate(cap)
    ratio = offset_hz / fs
    s = _capture.start_index(cap)
    dtype = _complex_dtype(cap.dtype)
    data = cap.data
    if _capture.is_lazy(cap):
        return data.map_blocks(_shift_block, ratio=ratio, start=s, out_dtype=dtype,
                               dtype=dtype, meta=np.empty((0,) * data.ndim, dtype))
    return _shift_block(np.asarray(data), ratio=ratio, start=s, out_dtype=dtype)


def shift(cap: xr.DataArray, offset_hz: float) -> xr.DataArray:
    """Move the content of a capture up by ``offset_hz``, keeping absolute frequencies.

    ``y[n] = x[n] exp(j 2 pi offset_hz n / fs)`` with n the absolute sample index, and
    ``center_frequency`` becomes ``center_frequency - offset_hz`` (and so does each retune
    segment's): a signal at offset f (absolute ``center_frequency + f``) moves to offset
    ``f + offset_hz`` and keeps its absolute frequency.
    To bring a signal at offset f to 0 Hz, call ``shift(cap, -f)``.

    Parameters
    ----------
    cap : xarray.DataArray
        Capture, dims ``(time,)`` or ``(channel, time)``, numpy or dask (lazy stays lazy,
        chunk by chunk, no overlap needed). A real capture becomes complex.
    offset_hz : float
        Shift in Hz, ``|offset_hz| <= sample_rate / 2``. A larger shift always folds part of
        the band onto itself (the content is periodic in the sample rate), so the stated
        absolute frequencies would be wrong: it is refused. To move a signal further, change
        the rate first (:func:`upconvert`, :func:`quadkit.decimation.resample`).

    Returns
    -------
    xarray.DataArray
        complex64 for complex64 or float32 input, complex128 for 64-bit input.

    Raises
    ------
    ValueError
        If ``|offset_hz| > sample_rate / 2``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> from quadkit.mixing import shift
    >>> cap = quadkit.synth.tone(25e3, sample_rate=1e6, n_samples=1000, center_frequency=2.4e9)
    >>> y = shift(cap, -25e3)           # the tone to 0 Hz
    >>> y.attrs["center_frequency"], round(float(np.abs(y - 1).max()), 5), y.dtype
    (2400025000.0, 0.0, dtype('complex64'))
    """
    _check_cap("shift", cap)
    f = check_finite("shift", "offset_hz", offset_hz)
    fs = _capture.sample_rate(cap)
    if abs(f) > fs / 2:
        raise ValueError(
            f"shift: |offset_hz| <= sample_rate/2 = {fs / 2!r} Hz is required, got "
            f"offset_hz={f!r}: a larger shift folds part of the band onto itself and the "
            "absolute frequencies would be wrong; raise the rate first "
            "(quadkit.mixing.upconvert or quadkit.decimation.resample)"
        )
    out = _mix(cap, f)
    return _capture.like(cap, out, start_index=_capture.start_index(cap),
                         **_carried(cap.attrs, delta_hz=-f))


def downconvert(
    real_cap: xr.DataArray,
    carrier_hz: float,
    *,
    bandwidth_hz: float | None = None,
    sample_rate: float | None = None,
    stopband_db: float = 80.0,
) -> xr.DataArray:
    """Real samples to the complex envelope around ``carrier_hz`` (quadrature sampling).

    Multiplies by ``cos`` and ``-sin`` at the carrier (``exp(-j 2 pi f_c t)``, phase from the
    absolute sample index), low-passes to ``bandwidth_hz`` and scales by 2, so the real tone
    ``A cos(2 pi f_c t + phi)`` becomes ``A exp(j phi)``. The low-pass keeps
    ``|f| <= bandwidth_hz / 2`` flat (0.01 dB) and removes the image at ``-2 f_c`` (and its
    alias at ``fs - 2 f_c``) by ``stopband_db``. Implemented as one band-pass around
    ``+f_c`` followed by the exact mix to 0 Hz (see :func:`quadkit.decimation.extract_channel`).

    Parameters
    ----------
    real_cap : xarray.DataArray
        Real capture (float32/float64), numpy or dask.
    carrier_hz : float
        Carrier as a frequency of the real capture, ``0 < carrier_hz < sample_rate / 2``.
    bandwidth_hz : float, optional
        Width of the band kept; default 80 % of the widest band around the carrier that
        stays inside ``(0, fs/2)``, or of the output rate if that is smaller. The band must
        lie inside ``(0, fs/2)``.
    sample_rate : float, optional
        Output rate in Hz (default: the input rate); must exceed ``bandwidth_hz``. Integer
        divisors run in the same pass; other rates go through :func:`~quadkit.decimation.resample`.
    stopband_db : float
        Image and alias rejection (default 80 dB).

    Returns
    -------
    xarray.DataArray
        complex64 (complex128 for float64), ``center_frequency`` = old + ``carrier_hz``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> from quadkit.mixing import downconvert
    >>> x = quadkit.synth.tone(250e3, sample_rate=1e6, n_samples=20_000, amplitude=0.5,
    ...                        phase_rad=0.3, real=True)
    >>> z = downconvert(x, 250e3, sample_rate=100e3)
    >>> k = z.sizes["time"] // 2
    >>> round(abs(complex(z[k])), 4), round(float(np.angle(z[k])), 4), z.dtype
    (0.5, 0.3, dtype('complex64'))
    """
    from . import decimation as _dec

    func = "downconvert"
    _check_cap(func, real_cap)
    if real_cap.dtype.kind != "f":
        raise ValueError(f"downconvert: real_cap must hold real samples, got dtype "
                         f"{real_cap.dtype}; use quadkit.mixing.shift for complex captures")
    fs = _capture.sample_rate(real_cap)
    fc = check_finite(func, "carrier_hz", carrier_hz)
    if not 0 < fc < fs / 2:
        raise ValueError(f"downconvert: carrier_hz={fc!r} must lie in (0, sample_rate/2) = "
                         f"(0, {fs / 2!r}) Hz")
    room = 2 * min(fc, fs / 2 - fc)
    target = fs if sample_rate is None else check_positive(func, "sample_rate", sample_rate)
    bw = 0.8 * min(room, target) if bandwidth_hz is None else check_positive(
        func, "bandwidth_hz", bandwidth_hz)
    if bw >= room:
        raise ValueError(
            f"downconvert: bandwidth_hz={bw!r} is too wide: the band {fc - bw / 2!r} .. "
            f"{fc + bw / 2!r} Hz must lie inside (0, {fs / 2!r}) Hz (at most {room!r} Hz wide)"
        )
    a = check_positive(func, "stopband_db", stopband_db)
    if target <= bw:
        raise ValueError(f"downconvert: sample_rate={target!r} must exceed bandwidth_hz={bw!r}")
    factor = fs / target
    integer = abs(factor - round(factor)) < 1e-9 * factor and round(factor) >= 1
    m = int(round(factor)) if integer else 1
    rate = fs / m
    image = min(2 * fc, fs - 2 * fc) - bw / 2  # nearest image edge after the mix
    f_stop = min(image, rate / 2)
    if integer and f_stop <= bw / 2:  # pragma: no cover - excluded by the checks above
        raise ValueError(f"downconvert: sample_rate={target!r} is too low for bandwidth_hz={bw!r}")
    stages = _dec._decim_chain(fs, m, bw / 2, f_stop, a, 0.01, mod_hz=fc, func=func,
                               gain=2.0, stop_cap=image)
    out = _dec._apply(real_cap, stages, rate, delta_hz=fc)
    if not integer:
        out = _dec.resample(out, target, stopband_db=a)
    return out


def upconvert(
    cap: xr.DataArray,
    carrier_hz: float,
    *,
    sample_rate: float | None = None,
    stopband_db: float = 80.0,
) -> xr.DataArray:
    """Complex envelope to real passband samples ``Re{z(t) exp(j 2 pi f_c t)}``, the inverse of
    :func:`downconvert`.

    The envelope is interpolated to ``sample_rate`` (images ``stopband_db`` down, band
    ``|f| <= 0.4 fs`` flat) and mixed up to ``carrier_hz`` from the absolute sample index.

    Parameters
    ----------
    cap : xarray.DataArray
        Complex capture at rate fs, numpy or dask.
    carrier_hz : float
        Carrier in Hz of the real output, at least ``fs / 2`` so the band stays above 0 Hz.
    sample_rate : float, optional
        Output rate; at least ``2 * carrier_hz + fs``. Default: the smallest integer multiple
        of fs that is.
    stopband_db : float
        Image rejection of the interpolation (default 80 dB).

    Returns
    -------
    xarray.DataArray
        Real samples (float32 for complex64), ``center_frequency`` = old - ``carrier_hz``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> from quadkit.mixing import upconvert
    >>> z = quadkit.synth.tone(0.0, sample_rate=100e3, n_samples=2000, amplitude=0.5,
    ...                        phase_rad=0.3)
    >>> x = upconvert(z, 200e3, sample_rate=1e6)
    >>> t = x.time.values
    >>> ref = 0.5 * np.cos(2 * np.pi * 200e3 * t + 0.3)
    >>> x.dtype, bool(np.abs(x.values - ref)[1000:-1000].max() < 1e-4)
    (dtype('float32'), True)
    """
    from . import decimation as _dec

    func = "upconvert"
    _check_cap(func, cap)
    if cap.dtype.kind != "c":
        raise ValueError(f"upconvert: cap must be complex, got dtype {cap.dtype}")
    fs = _capture.sample_rate(cap)
    fc = check_positive(func, "carrier_hz", carrier_hz)
    if fc < fs / 2:
        raise ValueError(f"upconvert: carrier_hz={fc!r} must be at least half the sample rate "
                         f"({fs / 2!r} Hz) so the band stays above 0 Hz")
    need = 2 * fc + fs
    if sample_rate is None:
        target = fs * math.ceil(need / fs * (1 - 1e-12))
    else:
        target = check_positive(func, "sample_rate", sample_rate)
        if target < need * (1 - 1e-12):
            raise ValueError(f"upconvert: sample_rate={target!r} must be at least "
                             f"2 * carrier_hz + fs = {need!r} Hz")
    up = _dec.resample(cap, target, stopband_db=check_positive(func, "stopband_db",
                                                               stopband_db))
    mixed = _mix(up, fc)
    real = mixed.real
    # `up` already carries the attrs re-indexed to the new rate; move its centre frequencies
    return _capture.like(up, real, start_index=_capture.start_index(up),
                         **_carried(up.attrs, delta_hz=-fc))
