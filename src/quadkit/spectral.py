"""Spectra and spectral measurements: PSD, spectrogram, peaks, channel power, OBW, ACLR, ADC figures.

Conventions (see DESIGN.md):

- A complex capture gives a two-sided spectrum on an ascending axis from -fs/2 to +fs/2
  (``offset``), a real capture a one-sided spectrum from 0 to fs/2 (every bin but DC and
  Nyquist doubled). The ``frequency`` coordinate is absolute: ``center_frequency + offset``.
- Levels are in dB relative to full scale: a complex tone of magnitude ``full_scale`` is
  0 dBFS, a real full-scale sine (captured as real samples) is -3.01 dBFS. With a
  ``calibration_db`` attr the spectrum is in dBm/Hz or dBm (dBm = dBFS + calibration_db).
- Windows are the periodic ("DFT-even") cosine-sum forms, ``w[n] = sum_m (-1)^m a_m
  cos(2 pi m n / N)`` for n = 0 .. N-1, which is what Welch averaging with 50 % overlap wants
  and what :func:`scipy.signal.get_window` returns by default. Supported: ``"rectangular"``,
  ``"hann"``, ``"hamming"``, ``"blackman"``, ``"blackmanharris"`` (4-term) and ``"flattop"``
  (the five-term flat top of :mod:`scipy.signal`).
- No per-segment detrending: a DC offset (carrier leakage) shows in the spectrum.

Lazy (dask-backed) captures are analysed chunk by chunk: each task takes the Welch segments
that *start* in one chunk of ``time`` together with the ``nperseg - 1`` samples that follow it
(from the next chunks), so the set of segments, and so the result, is the same whatever the
chunking; ``time`` is never merged into one chunk. :func:`psd` and :func:`spectrogram` return
lazy results for lazy captures; the measurements compute the (small) spectrum they need.

Examples
--------
>>> import quadkit
>>> from quadkit import spectral
>>> cap = quadkit.synth.tone(125e3, sample_rate=1e6, n_samples=65536, amplitude=0.5,
...                          center_frequency=915e6)
>>> spec = spectral.psd(cap, nperseg=1024, scaling="power")
>>> f = float(spec.frequency[int(spec.argmax("frequency"))])
>>> f, round(float(spec.max()), 2)  # 915.125 MHz at 20 log10(0.5) dBFS
(915125000.0, -6.02)
"""

from __future__ import annotations

import math
from typing import Any, Literal

import numpy as np
import scipy.fft as _fft
import xarray as xr
from numpy.lib.stride_tricks import sliding_window_view

from . import _capture
from ._checks import (
    check_finite,
    check_fraction,
    check_option,
    check_positive,
    check_positive_int,
)
from ._errors import MeasurementError
from ._results import quantity, result

__all__ = [
    "psd",
    "spectrogram",
    "find_peaks",
    "noise_floor",
    "channel_power",
    "occupied_bandwidth",
    "aclr",
    "tone_quality",
    "window_properties",
]
_ACCESSOR = ("psd", "spectrogram", "find_peaks", "channel_power", "occupied_bandwidth", "aclr",
             "tone_quality")

# Cosine-sum coefficients a_m of the periodic windows (Harris, Proc. IEEE 66(1), 1978;
# the flat top is the one scipy.signal.windows.flattop uses).
_WINDOWS: dict[str, tuple[float, ...]] = {
    "rectangular": (1.0,),
    "hann": (0.5, 0.5),
    "hamming": (0.54, 0.46),
    "blackman": (0.42, 0.5, 0.08),
    "blackmanharris": (0.35875, 0.48829, 0.14128, 0.01168),
    "flattop": (0.21557895, 0.41663158, 0.277263158, 0.083578947, 0.006947368),
}
_AVERAGES = ("mean", "median", "max")
_SCALINGS = ("density", "power")
_DEFAULT_NPERSEG = 4096
# Segments per FFT batch: ~2 MB of complex64 per batch keeps the batch in cache.
_BATCH_SAMPLES = 1 << 18

Window = Literal["rectangular", "hann", "hamming", "blackman", "blackmanharris", "flattop"]


# --------------------------------------------------------------------------------------------
# windows
# --------------------------------------------------------------------------------------------

def _window(name: str, n: int, dtype: Any = np.float64) -> np.ndarray:
    coeffs = _WINDOWS[name]
    k = np.arange(n) * (2 * np.pi / n)
    w = np.zeros(n)
    for m, a in enumerate(coeffs):
        w += (-1) ** m * a * np.cos(m * k)
    return w.astype(dtype)


def _dirichlet(u: np.ndarray, n: int) -> np.ndarray:
    """sum_{k<n} exp(-j 2 pi u k / n) for real u (in bins)."""
    u = np.asarray(u, dtype=float)
    s = np.sin(np.pi * u / n)
    near = np.abs(s) < 1e-12
    ratio = np.where(near, n * np.cos(np.pi * u) / np.where(near, np.cos(np.pi * u / n), 1.0),
                     np.sin(np.pi * u) / np.where(near, 1.0, s))
    return np.exp(-1j * np.pi * u * (n - 1) / n) * ratio


def _window_dtft(name: str, n: int, nu: Any) -> np.ndarray:
    """DTFT of the periodic window at ``nu`` bins: sum_k w[k] exp(-j 2 pi nu k / n), closed form."""
    nu = np.asarray(nu, dtype=float)
    coeffs = _WINDOWS[name]
    out = coeffs[0] * _dirichlet(nu, n)
    for m, a in enumerate(coeffs[1:], start=1):
        out = out + (-1) ** m * a / 2 * (_dirichlet(nu - m, n) + _dirichlet(nu + m, n))
    return out


def _window_sums(name: str, n: int) -> tuple[float, float]:
    """sum(w) and sum(w^2) of the periodic window; closed form N a0, N (a0^2 + sum a_m^2 / 2)
    once N exceeds twice the number of terms (no aliasing of the cosines)."""
    coeffs = _WINDOWS[name]
    if n <= 2 * len(coeffs):
        w = _window(name, n)
        return float(w.sum()), float(np.sum(w**2))
    return n * coeffs[0], n * (coeffs[0] ** 2 + sum(a * a for a in coeffs[1:]) / 2)


def _lobe_bins(name: str) -> int:
    # The first zero of an M-term cosine-sum window lies M bins from the centre.
    return len(_WINDOWS[name])


def window_properties(window: Window = "hann", nperseg: int = 4096) -> xr.Dataset:
    """Coherent gain, equivalent noise bandwidth and scalloping loss of a periodic window.

    Parameters
    ----------
    window : str
        One of ``"rectangular"``, ``"hann"``, ``"hamming"``, ``"blackman"``,
        ``"blackmanharris"``, ``"flattop"`` (periodic form, see the module docstring).
    nperseg : int
        Window length N in samples.

    Returns
    -------
    xarray.Dataset
        ``coherent_gain`` (sum(w)/N), ``enbw_bins`` (N sum(w^2)/sum(w)^2), ``scalloping_loss_db``
        (the drop of a tone half a bin off centre, -20 log10 |W(1/2)|/|W(0)|), and
        ``mainlobe_half_width_bins``.

    Examples
    --------
    >>> from quadkit import spectral
    >>> p = spectral.window_properties("hann", 1024)
    >>> float(p.coherent_gain), float(p.enbw_bins), round(float(p.scalloping_loss_db), 3)
    (0.5, 1.5, 1.424)
    """
    check_option("window_properties", "window", window, _WINDOWS)
    n = check_positive_int("window_properties", "nperseg", nperseg, minimum=2)
    w = _window(window, n)
    cg = w.sum() / n
    enbw = n * np.sum(w**2) / w.sum() ** 2
    w0 = abs(_window_dtft(window, n, 0.0))
    wh = abs(_window_dtft(window, n, 0.5))
    return result({
        "coherent_gain": quantity(float(cg), "1", "coherent gain (mean of the window)"),
        "enbw_bins": quantity(float(enbw), "bins", "equivalent noise bandwidth"),
        "scalloping_loss_db": quantity(float(-20 * np.log10(wh / w0)), "dB",
                                       "scalloping loss at half a bin"),
        "mainlobe_half_width_bins": quantity(_lobe_bins(window), "bins",
                                             "distance of the first window zero"),
    }, attrs={"window": window, "window_form": "periodic", "nperseg": n})


# --------------------------------------------------------------------------------------------
# the kernel: Welch segment powers over the last axis
# --------------------------------------------------------------------------------------------

def _segment_powers(x: np.ndarray, win: np.ndarray, step: int, mode: str,
                    workers: int = -1) -> np.ndarray:
    """|FFT(w * segment)|^2 of every segment of ``x`` (shape (C, n)), in natural FFT order.

    ``mode`` is ``"sum"`` (float64 sum over segments, shape (C, nfreq)), ``"max"`` (maximum,
    shape (C, nfreq)) or ``"all"`` (float32 per segment, shape (C, nseg, nfreq)). Segments are
    strided views of ``x``; each batch is windowed into one reused buffer and transformed in
    place (float32 FFTs for single-precision input).
    """
    x = np.asarray(x)
    nper = win.size
    real = x.dtype.kind == "f"
    single = x.dtype in (np.complex64, np.float32)
    cdt = np.complex64 if single else np.complex128
    rdt = np.float32 if single else np.float64
    win = win.astype(rdt)
    nfreq = nper // 2 + 1 if real else nper
    if x.shape[-1] < nper:
        nseg = 0
    else:
        nseg = 1 + (x.shape[-1] - nper) // step
    C = x.shape[0]
    if mode == "all":
        out = np.empty((C, nseg, nfreq), dtype=np.float32 if single else np.float64)
    elif mode == "max":
        out = np.full((C, nfreq), -np.inf)
    else:
        out = np.zeros((C, nfreq))
    if nseg == 0:
        return out
    batch = max(1, _BATCH_SAMPLES // nper)
    buf = np.empty((min(batch, nseg), nper), dtype=rdt if real else cdt)
    pbuf = np.empty((min(batch, nseg), nfreq), dtype=rdt)
    for c in range(C):
        view = sliding_window_view(x[c], nper)[::step][:nseg]
        for i in range(0, nseg, batch):
            seg = view[i:i + batch]
            b = buf[: seg.shape[0]]
            np.multiply(seg, win, out=b)
            if real:
                X = _fft.rfft(b, axis=-1, workers=workers)
            else:
                X = _fft.fft(b, axis=-1, workers=workers, overwrite_x=True)
            pw = pbuf[: seg.shape[0]]
            np.abs(X, out=pw)
            np.square(pw, out=pw)
            if mode == "sum":
                out[c] += pw.sum(axis=0)
            elif mode == "max":
                np.maximum(out[c], pw.max(axis=0), out=out[c])
            else:
                out[c, i:i + seg.shape[0]] = pw
    return out


def _median_bias(k: int) -> float:
    """Mean of the sample median of k i.i.d. unit exponentials (order statistics, Renyi).

    E[X_(j)] = sum_{i=k-j+1}^{k} 1/i; numpy's median averages the two middle values for even k.
    """
    def order(j: int) -> float:
        return float(np.sum(1.0 / np.arange(k - j + 1, k + 1)))

    if k % 2:
        return order((k + 1) // 2)
    return 0.5 * (order(k // 2) + order(k // 2 + 1))


def _median_rows(block: np.ndarray) -> np.ndarray:
    return np.median(block, axis=1).astype(np.float64)


def _plan(func: str, n: int, fs: float, window: str, nperseg: int | None, rbw_hz: float | None,
          overlap: float) -> tuple[int, int, int]:
    check_option(func, "window", window, _WINDOWS)
    overlap = check_finite(func, "overlap", overlap)
    if not 0 <= overlap < 1:
        raise ValueError(f"{func}: overlap={overlap!r} must lie in [0, 1)")
    if nperseg is not None and rbw_hz is not None:
        raise ValueError(f"{func}: give rbw_hz= or nperseg=, not both")
    if rbw_hz is not None:
        rbw_hz = check_positive(func, "rbw_hz", rbw_hz)
        w = _window(window, 4096)
        enbw = 4096 * np.sum(w**2) / w.sum() ** 2
        nperseg = _fft.next_fast_len(int(math.ceil(enbw * fs / rbw_hz)))
        if nperseg > n:
            raise MeasurementError(
                f"{func}: rbw_hz={rbw_hz:g} needs segments of {nperseg} samples, but the "
                f"capture has only {n}; ask for a wider RBW or a longer capture"
            )
    elif nperseg is None:
        nperseg = min(n, _DEFAULT_NPERSEG)
    else:
        nperseg = check_positive_int(func, "nperseg", nperseg, minimum=2)
    if nperseg < 2 or nperseg > n:
        raise MeasurementError(
            f"{func}: the capture has {n} samples, fewer than the {max(nperseg, 2)} one "
            "segment needs; give a smaller nperseg or a longer capture"
        )
    step = nperseg - int(math.floor(overlap * nperseg))
    nseg = 1 + (n - nperseg) // step
    return nperseg, step, nseg


def _join(blocks: list) -> np.ndarray:
    return blocks[0] if len(blocks) == 1 else np.concatenate(blocks, axis=0)


def _chunk_powers(main: list, heads: list, takes: list, start: int, count: int,
                  win: np.ndarray, step: int, mode: str) -> np.ndarray:
    """Segment powers of ``count`` segments starting at ``start`` in one chunk of ``time``.

    ``main`` is the chunk (a list of its channel blocks); ``heads`` are the following chunks,
    of which the first ``takes`` samples are needed by the segments that run past the end.
    Segments inside the chunk are strided views of it (no copy); only the few that cross
    its end are copied into a short buffer.
    """
    nper = win.size
    x = _join(main)[:, start:]
    n_in = 0 if x.shape[-1] < nper else min(count, 1 + (x.shape[-1] - nper) // step)
    pieces = []
    if n_in:
        pieces.append(_segment_powers(x[:, : (n_in - 1) * step + nper], win, step, mode, 1))
    if n_in < count:
        tail = [x[:, n_in * step:]] + [_join(h)[:, :t] for h, t in zip(heads, takes)]
        pieces.append(_segment_powers(np.concatenate(tail, axis=-1), win, step, mode, 1))
    if len(pieces) == 1:
        return pieces[0]
    if mode == "sum":
        return pieces[0] + pieces[1]
    if mode == "max":
        return np.maximum(pieces[0], pieces[1])
    return np.concatenate(pieces, axis=1)


def _lazy_parts(data, nperseg: int, step: int, nseg: int, win: np.ndarray, mode: str):
    """One delayed task per chunk of ``time``: the segments that start in that chunk.

    A task gets its own chunk and, when its last segments run past the chunk's end, the
    first samples of the following chunks (fewer than ``nperseg`` in all); the union over
    all chunks is exactly the eager set of segments, whatever the chunking. The blocks come
    from one ``to_delayed`` graph, so the graph grows linearly with the number of chunks.
    """
    import dask

    blocks = data.to_delayed()
    bounds = np.cumsum((0,) + tuple(data.chunks[-1]))
    parts = []
    for i, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
        a, b = int(a), int(b)
        k_lo = -(-a // step)
        k_hi = min(-(-b // step), nseg)
        if k_lo >= k_hi:
            continue
        hi = (k_hi - 1) * step + nperseg
        heads, takes = [], []
        j = i + 1
        while hi > b and j < len(bounds) - 1 and int(bounds[j]) < hi:
            heads.append(list(blocks[:, j]))
            takes.append(min(int(bounds[j + 1]), hi) - int(bounds[j]))
            j += 1
        task = dask.delayed(_chunk_powers, pure=True)(
            list(blocks[:, i]), heads, takes, k_lo * step - a, k_hi - k_lo, win, step, mode)
        parts.append((k_lo, k_hi, task))
    return parts


def _to_db(lin: np.ndarray, offset_db: float, dtype: Any) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return (10 * np.log10(lin) + offset_db).astype(dtype)


def _db(lin, offset_db: float, dtype: Any):
    if _capture._is_dask(lin):
        return lin.map_blocks(_to_db, offset_db, dtype, dtype=dtype)
    return _to_db(lin, offset_db, dtype)


def _freq_coords(cap: xr.DataArray, nperseg: int, fs: float, real: bool) -> dict[str, Any]:
    if real:
        off = _fft.rfftfreq(nperseg, 1.0 / fs)
    else:
        off = _fft.fftshift(_fft.fftfreq(nperseg, 1.0 / fs))
    fc = float(cap.attrs.get("center_frequency", 0.0))
    return {
        "frequency": ("frequency", fc + off, {"units": "Hz", "long_name": "frequency"}),
        "offset": ("frequency", off, {"units": "Hz", "long_name": "baseband offset"}),
    }


def _onesided_factor(nperseg: int) -> np.ndarray:
    f = np.full(nperseg // 2 + 1, 2.0)
    f[0] = 1.0
    if nperseg % 2 == 0:
        f[-1] = 1.0
    return f


def _common(cap: xr.DataArray, func: str, window: str, average: str | None, scaling: str):
    if not isinstance(cap, xr.DataArray) or "time" not in cap.dims:
        raise ValueError(f"{func}: expected a capture (DataArray with a 'time' dim), "
                         f"got {type(cap).__name__}")
    check_option(func, "window", window, _WINDOWS)
    if average is not None:
        check_option(func, "average", average, _AVERAGES)
    check_option(func, "scaling", scaling, _SCALINGS)
    fs = _capture.sample_rate(cap)
    data = cap.transpose(..., "time").data
    if data.ndim == 1:
        data = data[None, :]
    return fs, data


def _units(cap: xr.DataArray, scaling: str) -> tuple[str, float]:
    cal = cap.attrs.get("calibration_db")
    base = "dBm" if cal is not None else "dBFS"
    return (base + "/Hz" if scaling == "density" else base), float(cal or 0.0)


def _spectrum_attrs(cap, win, *, units, window, nperseg, overlap, scaling, average,
                    n_averages, fs, real, full_scale) -> dict[str, Any]:
    """The attrs every spectrum carries (psd and spectrogram alike)."""
    enbw = nperseg * np.sum(win**2) / np.sum(win) ** 2
    return {
        "units": units,
        "long_name": "power spectral density" if scaling == "density" else "power spectrum",
        "rbw_hz": float(enbw * fs / nperseg),
        "enbw_bins": float(enbw),
        "window": window,
        "window_form": "periodic",
        "nperseg": int(nperseg),
        "overlap": float(overlap),
        "scaling": scaling,
        "average": average,
        "n_averages": int(n_averages),
        "sample_rate": fs,
        "center_frequency": float(cap.attrs.get("center_frequency", 0.0)),
        "onesided": bool(real),
        "full_scale": full_scale,
    }


def psd(
    cap: xr.DataArray,
    *,
    rbw_hz: float | None = None,
    nperseg: int | None = None,
    window: Window = "hann",
    overlap: float = 0.5,
    average: Literal["mean", "median", "max"] = "mean",
    scaling: Literal["density", "power"] = "density",
) -> xr.DataArray:
    """Power spectrum of a capture by Welch's method (no detrending).

    Parameters
    ----------
    cap : xarray.DataArray
        Capture, dims ``("time",)`` or ``("channel", "time")``; numpy- or dask-backed.
    rbw_hz : float, optional
        Resolution bandwidth in Hz. The segment length is then the smallest fast FFT length
        with ``enbw_bins * fs / nperseg <= rbw_hz``. Give this or ``nperseg``, not both.
    nperseg : int, optional
        Segment (FFT) length in samples. Default ``min(4096, n_samples)``.
    window : str
        Periodic cosine-sum window (see the module docstring); default ``"hann"``.
    overlap : float
        Overlap of successive segments as a fraction of ``nperseg``, in [0, 1); the step is
        ``nperseg - floor(overlap * nperseg)`` samples (as :func:`scipy.signal.welch`).
    average : {"mean", "median", "max"}
        Mean of the segment periodograms (Welch), their median (divided by the median's bias
        for exponential noise, so that noise reads at its mean level; a steady tone then reads
        high by the same factor, recorded in attr ``median_bias``), or the maximum (max-hold).
        The median needs every periodogram at once (float32, nperseg values per segment;
        for a lazy capture they are regrouped by frequency, not by time), so it costs about
        as much memory as the capture itself at 50 % overlap; mean and max-hold cost one
        spectrum per chunk.
    scaling : {"density", "power"}
        ``"density"``: power spectral density in dBFS/Hz (a bin is |X|^2 / (fs sum w^2));
        ``"power"``: power per bin in dBFS (|X|^2 / (sum w)^2), so a tone's peak is its power.

    Returns
    -------
    xarray.DataArray
        Named ``psd``, dims ``("frequency",)`` or ``("channel", "frequency")``, values in dB
        (dBFS/Hz, dBFS, or dBm/Hz, dBm when the capture has ``calibration_db``), float32 for
        single-precision captures. Coordinates ``frequency`` (absolute Hz, ascending) and
        ``offset`` (baseband Hz). A complex capture gives ``nperseg`` bins from -fs/2 to
        fs/2 - fs/nperseg, a real one ``nperseg // 2 + 1`` bins from 0 to fs/2. attrs
        ``units``, ``long_name``, ``rbw_hz`` (= enbw_bins * fs / nperseg), ``enbw_bins``,
        ``window``, ``window_form``, ``nperseg``, ``overlap``, ``scaling``, ``average``,
        ``n_averages``, ``sample_rate``, ``center_frequency``, ``onesided``, ``full_scale``
        and ``calibration_db`` when the capture has one. Lazy for a lazy capture (one task per
        chunk of ``time``, see the module docstring); the values do not depend on the chunking.

    Raises
    ------
    MeasurementError
        When the capture is shorter than one segment.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> from quadkit import spectral
    >>> cap = quadkit.synth.noise(sample_rate=1e6, n_samples=2**16, power_dbfs=-30, rng=0)
    >>> spec = spectral.psd(cap, nperseg=256)
    >>> spec.attrs["units"], spec.attrs["rbw_hz"], spec.attrs["n_averages"]
    ('dBFS/Hz', 5859.375, 511)
    >>> round(float(10 * np.log10(np.mean(10 ** (spec / 10)))), 1)  # -30 dBFS over 1 MHz
    -90.0
    """
    fs, data = _common(cap, "psd", window, average, scaling)
    n = data.shape[-1]
    nperseg, step, nseg = _plan("psd", n, fs, window, nperseg, rbw_hz, overlap)
    real = data.dtype.kind == "f"
    win = _window(window, nperseg)
    mode = {"mean": "sum", "max": "max", "median": "all"}[average]
    lazy = _capture._is_dask(data)
    C = data.shape[0]
    nfreq = nperseg // 2 + 1 if real else nperseg
    if lazy:
        import dask.array as da

        parts = _lazy_parts(data, nperseg, step, nseg, win, mode)
        if mode == "all":
            pdt = np.float32 if data.dtype in (np.complex64, np.float32) else np.float64
            stack = da.concatenate([
                da.from_delayed(p, shape=(C, hi - lo, nfreq), dtype=pdt) for lo, hi, p in parts
            ], axis=1)
            col = max(1, min(nfreq, (1 << 23) // max(1, nseg)))
            stack = stack.rechunk({0: 1, 1: -1, 2: col})
            raw = stack.map_blocks(_median_rows, drop_axis=1, dtype=np.float64)
        else:
            stack = da.stack([da.from_delayed(p, shape=(C, nfreq), dtype=np.float64)
                              for _, _, p in parts])
            raw = stack.sum(axis=0) if mode == "sum" else stack.max(axis=0)
    else:
        raw = _segment_powers(np.asarray(data), win, step, mode)
        if mode == "all":
            raw = np.median(raw, axis=1).astype(np.float64)
    fsc = _capture.full_scale(cap)
    norm = fsc**2 * (fs * np.sum(win**2) if scaling == "density" else np.sum(win) ** 2)
    if mode == "sum":
        norm = norm * nseg
    bias = _median_bias(nseg) if average == "median" else 1.0
    factor = 1.0 / (norm * bias)
    if real:
        factor = factor * _onesided_factor(nperseg)
    lin = raw * factor
    if not real:
        lin = lin[:, _fft.fftshift(np.arange(nperseg))]
    units, cal = _units(cap, scaling)
    out_dtype = np.float32 if data.dtype in (np.complex64, np.float32) else np.float64
    values = _db(lin, cal, out_dtype)
    if cap.ndim == 1:
        values = values[0]
        dims: tuple[str, ...] = ("frequency",)
        coords = _freq_coords(cap, nperseg, fs, real)
    else:
        dims = ("channel", "frequency")
        coords = _freq_coords(cap, nperseg, fs, real)
        coords["channel"] = ("channel", cap.coords["channel"].values if "channel" in cap.coords
                             else np.arange(C))
    attrs = _spectrum_attrs(cap, win, units=units, window=window, nperseg=nperseg,
                            overlap=overlap, scaling=scaling, average=average,
                            n_averages=int(nseg), fs=fs, real=real, full_scale=fsc)
    if "calibration_db" in cap.attrs:
        attrs["calibration_db"] = float(cap.attrs["calibration_db"])
    if average == "median":
        attrs["median_bias"] = bias
    return xr.DataArray(values, dims=dims, coords=coords, attrs=attrs, name="psd")


def spectrogram(
    cap: xr.DataArray,
    *,
    rbw_hz: float | None = None,
    nperseg: int | None = None,
    window: Window = "hann",
    overlap: float = 0.5,
    scaling: Literal["density", "power"] = "density",
) -> xr.DataArray:
    """Short-time spectrum: one Welch segment per row, in dB.

    Parameters are those of :func:`psd` (each row is one segment's periodogram, so there is
    no averaging); the default ``nperseg`` is ``min(1024, n_samples)``.

    Returns
    -------
    xarray.DataArray
        Named ``spectrogram``, dims ``("time", "frequency")`` or ``("channel", "time",
        "frequency")``. ``time`` is the absolute time in seconds of each segment's centre, on
        the capture's own time axis (seconds from the first sample of the recording; a slice
        keeps its times), ``frequency`` absolute Hz with ``offset`` beside it. attrs as
        :func:`psd` (``n_averages`` is 1) plus ``start_time`` when the capture has one. A lazy
        capture gives a lazy result, chunked along ``time`` like the capture.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import spectral
    >>> cap = quadkit.synth.chirp(-200e3, 200e3, sample_rate=1e6, n_samples=10240)
    >>> sg = spectral.spectrogram(cap, nperseg=512, overlap=0)
    >>> sg.dims, sg.shape
    (('time', 'frequency'), (20, 512))
    >>> row = sg.isel(time=0)  # centred at 256 us, where the sweep is at -189.76 kHz
    >>> float(sg.time[0]), float(row.offset[int(row.argmax("frequency"))])
    (0.000256, -189453.125)
    """
    fs, data = _common(cap, "spectrogram", window, None, scaling)
    n = data.shape[-1]
    if nperseg is None and rbw_hz is None:
        nperseg = min(n, 1024)
    nperseg, step, nseg = _plan("spectrogram", n, fs, window, nperseg, rbw_hz, overlap)
    real = data.dtype.kind == "f"
    win = _window(window, nperseg)
    C = data.shape[0]
    nfreq = nperseg // 2 + 1 if real else nperseg
    pdt = np.float32 if data.dtype in (np.complex64, np.float32) else np.float64
    if _capture._is_dask(data):
        import dask.array as da

        parts = _lazy_parts(data, nperseg, step, nseg, win, "all")
        raw = da.concatenate([
            da.from_delayed(p, shape=(C, hi - lo, nfreq), dtype=pdt) for lo, hi, p in parts
        ], axis=1)
    else:
        raw = _segment_powers(np.asarray(data), win, step, "all")
    fsc = _capture.full_scale(cap)
    norm = fsc**2 * (fs * np.sum(win**2) if scaling == "density" else np.sum(win) ** 2)
    factor = 1.0 / norm
    if real:
        factor = factor * _onesided_factor(nperseg)
    lin = raw * factor.astype(pdt) if isinstance(factor, np.ndarray) else raw * pdt(factor)
    if not real:
        lin = lin[:, :, _fft.fftshift(np.arange(nperseg))]
    units, cal = _units(cap, scaling)
    values = _db(lin, cal, pdt)
    t0 = _capture.first_time(cap)
    times = t0 + (np.arange(nseg) * step + nperseg / 2) / fs
    coords = _freq_coords(cap, nperseg, fs, real)
    coords["time"] = ("time", times, {"units": "s", "long_name": "time of the segment centre"})
    if cap.ndim == 1:
        values = values[0]
        dims: tuple[str, ...] = ("time", "frequency")
    else:
        dims = ("channel", "time", "frequency")
        coords["channel"] = ("channel", cap.coords["channel"].values)
    attrs = _spectrum_attrs(cap, win, units=units, window=window, nperseg=nperseg,
                            overlap=overlap, scaling=scaling, average="none", n_averages=1,
                            fs=fs, real=real, full_scale=fsc)
    for key in ("calibration_db", "start_time"):
        if key in cap.attrs:
            attrs[key] = cap.attrs[key]
    return xr.DataArray(values, dims=dims, coords=coords, attrs=attrs, name="spectrogram")


# --------------------------------------------------------------------------------------------
# working on a spectrum
# --------------------------------------------------------------------------------------------

def _is_spectrum(obj: Any) -> bool:
    return isinstance(obj, xr.DataArray) and "frequency" in obj.dims and "scaling" in obj.attrs


def _as_spectrum(obj: Any, func: str, psd_options: dict[str, Any]) -> xr.DataArray:
    if _is_spectrum(obj):
        if psd_options:
            raise ValueError(f"{func}: {sorted(psd_options)} apply to a capture, not a spectrum")
        return obj
    if isinstance(obj, xr.DataArray) and "time" in obj.dims:
        return psd(obj, **psd_options)
    raise ValueError(f"{func}: expected a capture or a spectrum from quadkit.spectral.psd, "
                     f"got {type(obj).__name__}")


def _density(spec: xr.DataArray) -> np.ndarray:
    """Linear density in full-scale^2 per Hz, shape (C, nfreq), calibration undone."""
    if "time" in spec.dims:
        raise ValueError("expected a spectrum (psd), not a spectrogram")
    v = np.asarray(spec.transpose(..., "frequency").values, dtype=np.float64)
    v = np.atleast_2d(v)
    lin = 10 ** ((v - float(spec.attrs.get("calibration_db", 0.0))) / 10)
    if spec.attrs["scaling"] == "power":
        lin = lin / float(spec.attrs["rbw_hz"])
    return lin


def _effective_averages(spec: xr.DataArray) -> float:
    """Welch's equivalent number of independent averages (Welch 1967, variance of the mean).

    K_eff = K / (1 + 2 sum_j (1 - j/K) rho(j)^2), rho(j) the window's overlap correlation at a
    lag of j steps.
    """
    k = int(spec.attrs.get("n_averages", 1))
    nper = int(spec.attrs["nperseg"])
    step = nper - int(math.floor(float(spec.attrs.get("overlap", 0.0)) * nper))
    w = _window(spec.attrs["window"], nper)
    w2 = np.sum(w**2)
    den = 1.0
    j = 1
    while j < k and j * step < nper:
        rho = np.dot(w[j * step:], w[: nper - j * step]) / w2
        den += 2 * (1 - j / k) * rho**2
        j += 1
    return k / den


def _floor_bias(spec: xr.DataArray) -> float:
    """Median / mean of a noise bin: Gamma(K_eff, 1/K_eff) for mean averaging, else 1."""
    if spec.attrs.get("average", "mean") != "mean":
        return 1.0
    from scipy.special import gammaincinv

    keff = _effective_averages(spec)
    return float(gammaincinv(keff, 0.5) / keff)


def noise_floor(spectrum: xr.DataArray) -> xr.DataArray:
    """Noise floor of a spectrum: the median bin, corrected to the mean noise level.

    The median over frequency ignores tones and spurs as long as they cover less than half of
    the band. For a mean-averaged Welch spectrum a noise bin is (nearly) Gamma distributed
    with K_eff degrees of freedom (Welch's equivalent number of averages for the window and
    overlap), whose median lies below its mean; the result divides by that ratio, so white
    noise of density N0 reads N0. For median- or max-averaged spectra no correction is made
    (a median spectrum is already corrected; a max-hold one reads its max-hold level).

    Parameters
    ----------
    spectrum : xarray.DataArray
        A result of :func:`psd`.

    Returns
    -------
    xarray.DataArray
        Named ``noise_floor``, in the spectrum's units (dBFS/Hz for a density), dims
        ``()`` or ``("channel",)``.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import spectral
    >>> cap = quadkit.synth.noise(sample_rate=1e6, n_samples=2**16, power_dbfs=-40, rng=3)
    >>> round(float(spectral.noise_floor(spectral.psd(cap, nperseg=512))), 1)  # -40 - 60
    -100.0
    """
    if not _is_spectrum(spectrum):
        raise ValueError("noise_floor: expected a spectrum from quadkit.spectral.psd")
    lin = 10 ** (np.atleast_2d(np.asarray(spectrum.transpose(..., "frequency").values,
                                          dtype=np.float64)) / 10)
    med = np.median(lin, axis=-1) / _floor_bias(spectrum)
    val = 10 * np.log10(med)
    dims: tuple[str, ...] = ("channel",) if "channel" in spectrum.dims else ()
    if not dims:
        val = val[0]
    out = xr.DataArray(val, dims=dims, name="noise_floor",
                       attrs={"units": spectrum.attrs["units"],
                              "long_name": "noise floor (bias-corrected median)"})
    if dims:
        out = out.assign_coords(channel=spectrum.channel.values)
    return out


def _local_floor(lin: np.ndarray, circular: bool, bias: float) -> np.ndarray:
    """Running median of width min(nf / 8, 513) bins (at least 33), bias-corrected.

    The median is taken every quarter width and interpolated linearly in between, which
    costs O(nf) instead of O(nf * width) and follows the floor just as well.
    """
    nf = lin.shape[-1]
    width = min(nf, max(33, min(513, nf // 8)))
    if width >= nf or nf < 64:
        return np.broadcast_to(np.median(lin, axis=-1, keepdims=True), lin.shape) / bias
    half = width // 2
    hop = max(1, width // 4)
    centres = np.arange(0, nf, hop)
    ext = np.pad(lin, ((0, 0), (half, half)), mode="wrap" if circular else "reflect")
    windows = sliding_window_view(ext, 2 * half + 1, axis=-1)[:, centres, :]
    med = np.median(windows, axis=-1)
    bins = np.arange(nf)
    if circular:
        out = np.stack([np.interp(bins, centres, m, period=nf) for m in med])
    else:
        out = np.stack([np.interp(bins, centres, m) for m in med])
    return out / bias


def _ratio_delta(window: str, nper: int, ratio: float) -> float:
    """Fractional bin offset delta in [0, 0.5] from |W(1-delta)|^2 / |W(delta)|^2 = ratio."""
    def r(d: float) -> float:
        return float(abs(_window_dtft(window, nper, 1 - d)) ** 2
                     / abs(_window_dtft(window, nper, d)) ** 2)

    lo, hi = r(0.0), 1.0
    if not ratio > lo:
        return 0.0
    if ratio >= hi:
        return 0.5
    from scipy.optimize import brentq

    return float(brentq(lambda d: r(d) - ratio, 0.0, 0.5, xtol=1e-9))


def _component(lin, floor, k, window, nper, circular, delta=None):
    """Power of the component nearest bin k and its fractional offset (in bins).

    Sums density minus floor over the main lobe (+-M bins, M the window's term count) and
    divides by the fraction of the window's energy those bins hold for the tone's offset
    delta (closed-form window transform), so the result does not depend on where between
    bins the tone falls. Returns (power_fs2, delta, bins).
    """
    nf = lin.size
    L = _lobe_bins(window)
    if delta is None:
        left = lin[(k - 1) % nf] if (circular or k > 0) else 0.0
        right = lin[(k + 1) % nf] if (circular or k < nf - 1) else 0.0
        fl = floor[k]
        pk = max(lin[k] - fl, 1e-300)
        if right >= left:
            delta = _ratio_delta(window, nper, max(right - fl, 0.0) / pk)
        else:
            delta = -_ratio_delta(window, nper, max(left - fl, 0.0) / pk)
    idx = np.arange(k - L, k + L + 1)
    if circular:
        idx = idx % nf
        rel = np.arange(-L, L + 1)
    else:
        keep = (idx >= 0) & (idx < nf)
        idx = idx[keep]
        rel = np.arange(-L, L + 1)[keep]
    frac = np.sum(abs(_window_dtft(window, nper, rel - delta)) ** 2) / (
        nper * _window_sums(window, nper)[1])
    return idx, float(delta), float(frac)


#: A tone stands this much (power ratio, 6 dB) above the spectrum just outside its main lobe.
_TONE_SHAPE_RATIO = 4.0


def _tone_shaped(p: np.ndarray, floor: float, k: int, lobe: int, circular: bool) -> bool:
    """True if the peak at bin k falls off beyond its main lobe, as a steady tone does.

    The shoulders are the bins 1 and 2 past the main lobe (lobe + 1, lobe + 2) on each side. A
    tone's window leakage there is at least 13 dB down (rectangular side lobe, Harris 1978),
    30 dB and more for the other windows; the flat top of a noise-like carrier is not.
    """
    nf = p.size
    idx = np.array([k - lobe - 2, k - lobe - 1, k + lobe + 1, k + lobe + 2])
    if circular:
        idx %= nf
    else:
        idx = idx[(idx >= 0) & (idx < nf)]
    if idx.size == 0:
        return True
    shoulder = float(np.max(p[idx])) - floor
    return (p[k] - floor) > _TONE_SHAPE_RATIO * max(shoulder, 0.0)


def find_peaks(
    spectrum: xr.DataArray,
    *,
    threshold_db: float = 10.0,
    max_peaks: int = 20,
    dynamic_range_db: float | None = None,
    **psd_options: Any,
) -> xr.Dataset:
    """Tones and spurs standing out of the local noise floor: a spur table in one call.

    A peak is a local maximum at least ``threshold_db`` above the local noise floor (a running
    median over an eighth of the band, at least 33 and at most 513 bins, bias-corrected as in
    :func:`noise_floor`) and above the predicted leakage (window side lobes) of every stronger
    peak already accepted, at more than a main-lobe half width from it. It must also be shaped
    like a tone: 6 dB or more above the spectrum one and two bins past its main lobe on both
    sides, so the flat top of a noise-like or modulated carrier is not listed as tones (a tone
    sitting on such a carrier still is). Two tones closer than about three main-lobe half widths
    may hide the weaker one: ask for a finer ``rbw_hz``. For each peak:

    - the frequency is interpolated from the ratio of the two largest bins, inverted through
      the window's exact transform (exact for a steady tone whatever its offset in the bin);
    - the power is the tone's total power (the sum of the main-lobe bins minus the floor,
      divided by the share of the window's energy they hold), so a complex tone of amplitude
      A reads 20 log10(A) dBFS and a real one 20 log10(A) - 3.01 dBFS, whatever the RBW.

    Parameters
    ----------
    spectrum : xarray.DataArray
        A result of :func:`psd` (any scaling; mean, median or max averaging), or a capture,
        whose :func:`psd` is then computed with ``psd_options``.
    threshold_db : float
        Minimum height above the local floor (and leakage), in dB.
    max_peaks : int
        At most this many peaks per channel, the strongest first.
    dynamic_range_db : float, optional
        Peaks further than this below the strongest one are not listed. The default follows
        the precision of the samples: 130 dB for single precision (complex64 rounding leaves
        spurs about 150 dB down, which are artefacts of the number format, not of the
        signal), 280 dB for double precision.

    Returns
    -------
    xarray.Dataset
        Dim ``tone`` (strongest first; per channel in turn, with a ``channel`` coordinate
        along ``tone`` for multi-channel spectra): ``frequency_hz`` (absolute), ``offset_hz``,
        ``power_dbfs`` (and ``power_dbm`` when calibrated), ``prominence_db`` (peak bin over
        the local floor) and ``floor_dbfs_hz`` (the local floor density). No peak gives
        ``tone`` of length 0.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import spectral
    >>> cap = quadkit.synth.multitone([-123.4e3, 250.7e3], sample_rate=1e6, n_samples=2**16,
    ...                               amplitudes=[0.5, 0.01], center_frequency=2.4e9)
    >>> cap = quadkit.synth.add_noise(cap, snr_db=60, rng=0)
    >>> t = spectral.find_peaks(spectral.psd(cap, nperseg=2048))
    >>> [round(float(f) / 1e3, 1) for f in t.offset_hz], [round(float(p), 2) for p in t.power_dbfs]
    ([-123.4, 250.7], [-6.02, -40.0])
    """
    spectrum = _as_spectrum(spectrum, "find_peaks", psd_options)
    threshold_db = check_finite("find_peaks", "threshold_db", threshold_db)
    max_peaks = check_positive_int("find_peaks", "max_peaks", max_peaks)
    attrs = spectrum.attrs
    window, nper = attrs["window"], int(attrs["nperseg"])
    circular = not attrs.get("onesided", False)
    lin = _density(spectrum)
    if attrs.get("average") == "median":
        # A steady tone is not exponentially distributed: undo the noise bias correction.
        lin_tone = lin * float(attrs.get("median_bias", 1.0))
    else:
        lin_tone = lin
    floor = _local_floor(lin, circular, _floor_bias(spectrum))
    fs = float(attrs["sample_rate"])
    df = fs / nper
    off = np.asarray(spectrum.offset.values, dtype=float)
    fc = float(attrs.get("center_frequency", 0.0))
    sumw2 = _window_sums(window, nper)[1]
    L = _lobe_bins(window)
    thr = 10 ** (threshold_db / 10)
    if dynamic_range_db is None:
        dynamic_range_db = 130.0 if spectrum.dtype == np.float32 else 280.0
    dynamic_range_db = check_positive("find_peaks", "dynamic_range_db", dynamic_range_db)
    span = 10 ** (-dynamic_range_db / 10)
    rows: list[tuple] = []
    channels = spectrum.channel.values if "channel" in spectrum.dims else [None]
    for c, ch in enumerate(channels):
        p, fl = lin[c], floor[c]
        pt = lin_tone[c]
        nf = p.size
        if circular:
            left, right = np.roll(p, 1), np.roll(p, -1)
        else:
            left = np.concatenate(([-np.inf], p[:-1]))
            right = np.concatenate((p[1:], [-np.inf]))
        cand = np.flatnonzero((p >= left) & (p > right) & (p > thr * fl))
        cand = cand[np.argsort(-p[cand], kind="stable")][: 10 * max_peaks + 100]
        accepted: list[tuple[float, float]] = []  # (position in bins, power)
        for k in cand:
            if len(accepted) >= max_peaks:
                break
            leak = 0.0
            too_close = False
            for pos, pw in accepted:
                d = k - pos
                if circular:
                    d = (d + nf / 2) % nf - nf / 2
                if abs(d) <= L:
                    too_close = True
                    break
                leak += pw * abs(_window_dtft(window, nper, d)) ** 2 / (fs * sumw2)
            if too_close or not p[k] > thr * (fl[k] + leak):
                continue
            if not _tone_shaped(p, fl[k], int(k), L, circular):
                continue
            idx, delta, frac = _component(pt, fl, int(k), window, nper, circular)
            power = float(np.sum(pt[idx] - fl[idx]) * df / frac)
            if not power > 0 or (accepted and power < span * accepted[0][1]):
                continue
            pos = k + delta
            accepted.append((pos, power))
            offset = off[int(k)] + delta * df
            if circular and offset >= fs / 2:
                offset -= fs
            rows.append((ch, fc + offset, offset, 10 * np.log10(power),
                         10 * np.log10(p[k] / fl[k]), 10 * np.log10(fl[k])))
    cols = list(zip(*rows)) if rows else [[]] * 6
    variables = {
        "frequency_hz": quantity(np.asarray(cols[1], float), "Hz", "tone frequency", "tone"),
        "offset_hz": quantity(np.asarray(cols[2], float), "Hz", "tone baseband offset", "tone"),
        "power_dbfs": quantity(np.asarray(cols[3], float), "dBFS", "tone power", "tone"),
        "prominence_db": quantity(np.asarray(cols[4], float), "dB",
                                  "peak bin over the local noise floor", "tone"),
        "floor_dbfs_hz": quantity(np.asarray(cols[5], float), "dBFS/Hz",
                                  "local noise floor density", "tone"),
    }
    if "calibration_db" in attrs:
        variables["power_dbm"] = quantity(np.asarray(cols[3], float)
                                          + float(attrs["calibration_db"]), "dBm",
                                          "tone power", "tone")
    coords = {}
    if channels[0] is not None:
        coords["channel"] = ("tone", np.asarray(cols[0]))
    return result(variables, coords=coords,
                  attrs={"threshold_db": threshold_db, "rbw_hz": float(attrs["rbw_hz"])})


# --------------------------------------------------------------------------------------------
# channel power, occupied bandwidth, ACLR
# --------------------------------------------------------------------------------------------

def _cumulative(spec: xr.DataArray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bin edges (offset Hz), cumulative power at the edges (C, nfreq + 1), density."""
    lin = _density(spec)
    off = np.asarray(spec.offset.values, dtype=float)
    df = float(spec.attrs["sample_rate"]) / int(spec.attrs["nperseg"])
    edges = np.concatenate((off - df / 2, [off[-1] + df / 2]))
    cum = np.concatenate((np.zeros((lin.shape[0], 1)), np.cumsum(lin * df, axis=-1)), axis=-1)
    return edges, cum, lin


def _band_power(edges, cum, lo, hi) -> np.ndarray:
    """Power between offsets lo and hi (Hz), density taken flat inside each bin."""
    return np.array([np.interp(hi, edges, c) - np.interp(lo, edges, c) for c in cum])


def _db_of(p: np.ndarray, func: str, what: str) -> np.ndarray:
    if np.any(p <= 0):
        raise MeasurementError(f"{func}: no power in the {what}; check the frequencies")
    return 10 * np.log10(p)


def _resolve_offset(spec, func, offset_hz, frequency_hz, default=None) -> float:
    if offset_hz is not None and frequency_hz is not None:
        raise ValueError(f"{func}: give offset_hz= or frequency_hz=, not both")
    if frequency_hz is not None:
        return check_finite(func, "frequency_hz", frequency_hz) \
            - float(spec.attrs.get("center_frequency", 0.0))
    if offset_hz is not None:
        return check_finite(func, "offset_hz", offset_hz)
    if default is None:
        raise ValueError(f"{func}: give the channel centre as offset_hz= or frequency_hz=")
    return default


def _span(spec) -> tuple[float, float]:
    fs = float(spec.attrs["sample_rate"])
    if spec.attrs.get("onesided"):
        return 0.0, fs / 2
    return -fs / 2, fs / 2


def _check_band(spec, func, lo, hi, what):
    a, b = _span(spec)
    slack = 1e-9 * float(spec.attrs["sample_rate"])
    if lo < a - slack or hi > b + slack:
        raise MeasurementError(
            f"{func}: the {what} [{lo:g}, {hi:g}] Hz (baseband) leaves the spectrum's band "
            f"[{a:g}, {b:g}] Hz"
        )


def _channel_result(spec, variables, extra_attrs):
    if "channel" in spec.dims:
        coords = {"channel": spec.channel.values}
    else:
        coords = None
    return result(variables, coords=coords, attrs=extra_attrs)


def _per_channel(spec, value, units, long_name):
    if "channel" in spec.dims:
        return quantity(np.asarray(value, float), units, long_name, "channel")
    return quantity(float(np.asarray(value).ravel()[0]), units, long_name)


def _cal_vars(spec, name, dbfs, long_name, out):
    if "calibration_db" in spec.attrs:
        out[name.replace("_dbfs", "_dbm")] = _per_channel(
            spec, dbfs + float(spec.attrs["calibration_db"]), "dBm", long_name)


def channel_power(
    obj: xr.DataArray,
    *,
    bandwidth_hz: float,
    offset_hz: float | None = None,
    frequency_hz: float | None = None,
    **psd_options: Any,
) -> xr.Dataset:
    """Power in a channel: the PSD integrated over ``bandwidth_hz`` around the channel centre.

    Parameters
    ----------
    obj : xarray.DataArray
        A capture (its :func:`psd` is computed with ``psd_options``) or a spectrum from
        :func:`psd` (density or power scaling).
    bandwidth_hz : float
        Channel width in Hz (a rectangular measurement filter; edge bins count in part).
    offset_hz, frequency_hz : float
        Channel centre, as a baseband offset or an absolute frequency (default offset 0 for a
        complex capture).

    Returns
    -------
    xarray.Dataset
        ``channel_power_dbfs`` (and ``channel_power_dbm`` when calibrated), dims ``()`` or
        ``("channel",)``; attrs ``offset_hz``, ``frequency_hz``, ``bandwidth_hz``.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import spectral
    >>> cap = quadkit.synth.noise(sample_rate=1e6, n_samples=2**16, power_dbfs=-20, rng=0)
    >>> r = spectral.channel_power(cap, bandwidth_hz=250e3, nperseg=1024)  # a quarter band
    >>> round(float(r.channel_power_dbfs), 1)  # -20 + 10 log10(1/4)
    -26.0
    """
    spec = _as_spectrum(obj, "channel_power", psd_options)
    bw = check_positive("channel_power", "bandwidth_hz", bandwidth_hz)
    default = None if spec.attrs.get("onesided") else 0.0
    f0 = _resolve_offset(spec, "channel_power", offset_hz, frequency_hz, default)
    _check_band(spec, "channel_power", f0 - bw / 2, f0 + bw / 2, "channel")
    edges, cum, _ = _cumulative(spec)
    p = _db_of(_band_power(edges, cum, f0 - bw / 2, f0 + bw / 2), "channel_power", "channel")
    out = {"channel_power_dbfs": _per_channel(spec, p, "dBFS", "channel power")}
    _cal_vars(spec, "channel_power_dbfs", p, "channel power", out)
    fc = float(spec.attrs.get("center_frequency", 0.0))
    return _channel_result(spec, out, {"offset_hz": f0, "frequency_hz": fc + f0,
                                       "bandwidth_hz": bw})


def _crossing(edges: np.ndarray, cum: np.ndarray, target: float) -> float:
    """Smallest offset where the cumulative power reaches ``target`` (linear inside a bin)."""
    i = int(np.searchsorted(cum, target, side="left"))
    i = min(max(i, 1), cum.size - 1)
    c0, c1 = cum[i - 1], cum[i]
    t = 0.0 if c1 <= c0 else (target - c0) / (c1 - c0)
    return float(edges[i - 1] + t * (edges[i] - edges[i - 1]))


def occupied_bandwidth(
    obj: xr.DataArray,
    *,
    fraction: float = 0.99,
    **psd_options: Any,
) -> xr.Dataset:
    """Occupied bandwidth: the band holding ``fraction`` of the power, (1 - fraction)/2 outside each edge.

    This is the definition of the ITU Radio Regulations (No. 1.153) and ITU-R SM.328: the
    lower edge is where the cumulative power from the bottom of the band reaches
    ``(1 - fraction) / 2`` of the total, the upper edge where the power above it is that
    much. The cumulative power is the PSD integrated bin by bin, linear inside each bin.

    Parameters
    ----------
    obj : xarray.DataArray
        A capture (its :func:`psd` is computed with ``psd_options``) or a spectrum.
    fraction : float
        Share of the total power inside the band, in (0, 1); 0.99 by default.

    Returns
    -------
    xarray.Dataset
        ``occupied_bandwidth_hz``, ``lower_frequency_hz``, ``upper_frequency_hz`` (absolute),
        ``lower_offset_hz``, ``upper_offset_hz``, ``total_power_dbfs``; a ``channel`` dim for
        multi-channel input.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import spectral
    >>> cap = quadkit.synth.noise(sample_rate=1e6, n_samples=2**18, bandwidth_hz=400e3, rng=0)
    >>> r = spectral.occupied_bandwidth(cap, nperseg=8192)
    >>> round(float(r.occupied_bandwidth_hz) / 1e3)  # 0.99 * 400 kHz
    396
    """
    spec = _as_spectrum(obj, "occupied_bandwidth", psd_options)
    fraction = check_fraction("occupied_bandwidth", "fraction", fraction)
    edges, cum, _ = _cumulative(spec)
    lows, highs, totals = [], [], []
    for c in cum:
        total = c[-1]
        if not total > 0:
            raise MeasurementError("occupied_bandwidth: the spectrum holds no power")
        tail = (1 - fraction) / 2 * total
        lows.append(_crossing(edges, c, tail))
        # From the top: where the power above reaches the tail.
        above = total - c[::-1]
        highs.append(-_crossing(-edges[::-1], above, tail))
        totals.append(total)
    lo, hi = np.asarray(lows), np.asarray(highs)
    fc = float(spec.attrs.get("center_frequency", 0.0))
    out = {
        "occupied_bandwidth_hz": _per_channel(spec, hi - lo, "Hz", "occupied bandwidth"),
        "lower_frequency_hz": _per_channel(spec, fc + lo, "Hz", "lower band edge"),
        "upper_frequency_hz": _per_channel(spec, fc + hi, "Hz", "upper band edge"),
        "lower_offset_hz": _per_channel(spec, lo, "Hz", "lower band edge, baseband"),
        "upper_offset_hz": _per_channel(spec, hi, "Hz", "upper band edge, baseband"),
        "total_power_dbfs": _per_channel(spec, 10 * np.log10(totals), "dBFS", "total power"),
    }
    return _channel_result(spec, out, {"fraction": fraction})


def _rc_weight(f: np.ndarray, rate: float, rolloff: float) -> np.ndarray:
    """Raised-cosine power response |H_rrc(f)|^2 of unit peak, symbol rate ``rate``."""
    a = np.abs(f)
    f1 = (1 - rolloff) * rate / 2
    f2 = (1 + rolloff) * rate / 2
    out = np.where(a <= f1, 1.0, 0.0)
    if rolloff > 0:
        mid = (a > f1) & (a <= f2)
        out = np.where(mid, 0.5 * (1 + np.cos(np.pi / (rolloff * rate) * (a - f1))), out)
    return out


def aclr(
    obj: xr.DataArray,
    *,
    channel_bandwidth_hz: float,
    spacing_hz: float,
    offset_hz: float | None = None,
    frequency_hz: float | None = None,
    adjacent_bandwidth_hz: float | None = None,
    rolloff: float | None = None,
    **psd_options: Any,
) -> xr.Dataset:
    """Adjacent-channel leakage ratio: power in the assigned channel over that in each neighbour.

    Parameters
    ----------
    obj : xarray.DataArray
        A capture (its :func:`psd` is computed with ``psd_options``) or a spectrum.
    channel_bandwidth_hz : float
        Measurement bandwidth of the assigned channel, Hz.
    spacing_hz : float
        Distance between the channel centres, Hz.
    offset_hz, frequency_hz : float
        Centre of the assigned channel (default offset 0 for a complex capture).
    adjacent_bandwidth_hz : float, optional
        Measurement bandwidth of the adjacent channels (default ``channel_bandwidth_hz``).
    rolloff : float, optional
        Without it the measurement filter is rectangular. With it each channel is weighted by
        a root-raised-cosine filter's power response (a raised cosine) of that roll-off and a
        symbol rate equal to the channel's bandwidth (as 3GPP TS 25.104 measures UTRA with
        3.84 Mcps and roll-off 0.22).

    Returns
    -------
    xarray.Dataset
        ``aclr_lower_db``, ``aclr_upper_db`` (positive when the neighbours hold less power),
        ``channel_power_dbfs``, ``lower_power_dbfs``, ``upper_power_dbfs``; a ``channel`` dim
        for multi-channel input.

    Raises
    ------
    MeasurementError
        When an adjacent channel leaves the captured band, or holds no power.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import spectral
    >>> cap = quadkit.synth.noise(sample_rate=4e6, n_samples=2**18, bandwidth_hz=1e6, rng=0)
    >>> cap = quadkit.synth.add_noise(cap, snr_db=50, rng=1)
    >>> r = spectral.aclr(cap, channel_bandwidth_hz=1e6, spacing_hz=1.2e6, nperseg=8192)
    >>> 40 < float(r.aclr_lower_db) < 60, 40 < float(r.aclr_upper_db) < 60
    (True, True)
    """
    spec = _as_spectrum(obj, "aclr", psd_options)
    bw = check_positive("aclr", "channel_bandwidth_hz", channel_bandwidth_hz)
    sp = check_positive("aclr", "spacing_hz", spacing_hz)
    abw = bw if adjacent_bandwidth_hz is None else \
        check_positive("aclr", "adjacent_bandwidth_hz", adjacent_bandwidth_hz)
    if rolloff is not None:
        rolloff = check_fraction("aclr", "rolloff", rolloff, closed=True)
    default = None if spec.attrs.get("onesided") else 0.0
    f0 = _resolve_offset(spec, "aclr", offset_hz, frequency_hz, default)
    widen = 1 + (rolloff or 0.0)
    names = ("channel", "lower adjacent channel", "upper adjacent channel")
    powers = []
    for centre, width, what in ((f0, bw, names[0]), (f0 - sp, abw, names[1]),
                                (f0 + sp, abw, names[2])):
        _check_band(spec, "aclr", centre - widen * width / 2, centre + widen * width / 2, what)
        if rolloff is None:
            edges, cum, _ = _cumulative(spec)
            p = _band_power(edges, cum, centre - width / 2, centre + width / 2)
        else:
            lin = _density(spec)
            df = float(spec.attrs["sample_rate"]) / int(spec.attrs["nperseg"])
            wgt = _rc_weight(np.asarray(spec.offset.values, float) - centre, width, rolloff)
            p = np.sum(lin * wgt, axis=-1) * df
        powers.append(_db_of(p, "aclr", what))
    main, low, up = powers
    out = {
        "aclr_lower_db": _per_channel(spec, main - low, "dB", "adjacent channel leakage ratio, lower"),
        "aclr_upper_db": _per_channel(spec, main - up, "dB", "adjacent channel leakage ratio, upper"),
        "channel_power_dbfs": _per_channel(spec, main, "dBFS", "assigned channel power"),
        "lower_power_dbfs": _per_channel(spec, low, "dBFS", "lower adjacent channel power"),
        "upper_power_dbfs": _per_channel(spec, up, "dBFS", "upper adjacent channel power"),
    }
    fc = float(spec.attrs.get("center_frequency", 0.0))
    return _channel_result(spec, out, {"offset_hz": f0, "frequency_hz": fc + f0,
                                       "channel_bandwidth_hz": bw, "spacing_hz": sp,
                                       "adjacent_bandwidth_hz": abw,
                                       "measurement_filter": "rectangular" if rolloff is None
                                       else f"raised cosine, roll-off {rolloff:g}"})


# --------------------------------------------------------------------------------------------
# ADC dynamic figures
# --------------------------------------------------------------------------------------------

def _fold(f: float, fs: float, onesided: bool) -> float:
    if onesided:
        f = f % fs
        return fs - f if f > fs / 2 else f
    return (f + fs / 2) % fs - fs / 2


def _bin_of(offset: float, off0: float, df: float, nf: int, circular: bool) -> tuple[int, float]:
    pos = (offset - off0) / df
    k = int(np.floor(pos + 0.5))
    delta = pos - k
    if circular:
        k %= nf
    else:
        k = min(max(k, 0), nf - 1)
    return k, delta


def tone_quality(
    cap: xr.DataArray,
    fundamental_hz: float | None = None,
    *,
    n_harmonics: int = 5,
    nperseg: int | None = None,
    window: Window = "blackmanharris",
    overlap: float = 0.5,
) -> xr.Dataset:
    """Dynamic figures of a converter or receiver driven by one tone: SNR, SINAD, SFDR, THD, ENOB.

    The figures follow the definitions of IEEE Std 1241-2010 (ADC test methods; SNR, SINAD and
    ENOB under its noise clause 8, THD and SFDR under its distortion clause 9, clause numbers
    from memory), measured
    with the DFT method on a Welch spectrum (mean of windowed periodograms, default
    4-term Blackman-Harris, whose side lobes lie 92 dB down):

    - the fundamental is the strongest tone away from DC that :func:`find_peaks` lists (a
      tone-shaped line 10 dB over the local floor), or the listed tone at ``fundamental_hz``;
      modulated traffic or noise without such a line is refused. Each component's power is
      the sum of its main-lobe bins minus the background under them (noise floor plus the
      window leakage of the fundamental and of the spurs), corrected for the share of the
      window's energy those bins hold;
    - harmonics 2 .. n_harmonics + 1 are taken at h f0 folded into the band (for a complex
      capture both +h f0 and -h f0, wrapped into [-fs/2, fs/2)); a harmonic that lands on
      the fundamental, DC or an earlier harmonic is not counted twice;
    - DC (the main lobe around 0 Hz) is excluded, as the four-parameter sine fit of the
      standard removes the offset; for a complex capture the image at -f0 (quadrature
      imbalance) is not a harmonic: it counts as a spur (SFDR) and as noise;
    - noise (for SNR and SINAD): the mean density of all remaining bins, spurs included as
      the standard counts them, times the whole band (fs for complex, fs/2 for real), so
      excluded bins count at the noise level;
    - noise floor (``noise_floor_dbfs_hz``, and the background under every component): the
      same mean without the main lobes and leakage skirts of the spurs :func:`find_peaks`
      lists, so a spur or an IQ image raises neither the floor nor hides the harmonics;
    - SNR = P1 / P_noise, SINAD = P1 / (P_noise + P_harmonics), THD = P_harmonics / P1,
      SFDR = P1 / (largest other component: a harmonic or the strongest remaining spur,
      whose frequency is interpolated as in :func:`find_peaks`);
    - never -inf: when no harmonic stands above the background, ``thd_db`` is the
      floor-limited value (the noise power in the harmonic bins over P1, an upper bound of
      the THD) and ``thd_floor_limited`` is True; likewise a noiseless SFDR reads the noise
      in one main lobe;
    - ENOB (``enob_bits``) in the standard's full-scale form log2(FSR / (sqrt(12) NAD_rms)),
      with FSR = 2 full_scale and NAD_rms the rms noise and distortion per rail (for a
      complex capture each of I and Q is a converter: NAD_rms^2 = P_nad / 2).
      ``enob_sinad_bits`` = (SINAD - 1.76) / 6.02 is beside it; the two agree for a
      full-scale tone and differ by the tone's level below full scale otherwise.

    Parameters
    ----------
    cap : xarray.DataArray
        Capture (real or complex), dims ``("time",)`` or ``("channel", "time")``.
    fundamental_hz : float, optional
        Absolute frequency of the fundamental (center_frequency + offset); found if omitted.
    n_harmonics : int
        Number of harmonics in THD (2nd to ``n_harmonics + 1``-th), default 5.
    nperseg, window, overlap
        Welch parameters (:func:`psd`); default ``nperseg = min(n_samples, 16384)``.

    Returns
    -------
    xarray.Dataset
        ``snr_db``, ``sinad_db``, ``sfdr_dbc``, ``thd_db``, ``enob_bits``, ``enob_sinad_bits``,
        ``noise_floor_dbfs_hz``, ``fundamental_power_dbfs``, ``fundamental_frequency_hz``,
        ``fundamental_offset_hz``, ``spur_frequency_hz`` (of the SFDR spur),
        ``thd_floor_limited`` (bool, see above); a ``channel`` dim for multi-channel captures.
        With ``n_harmonics=0`` there is no ``thd_db`` nor ``thd_floor_limited``.

    Raises
    ------
    MeasurementError
        When no tone stands above the noise (or none at ``fundamental_hz``: the message
        names the strongest tone found), or when every harmonic folds onto the fundamental
        or DC.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> from quadkit import spectral
    >>> n = 2**18; f = 0.0917123 * 1e6
    >>> x = np.sin(2 * np.pi * f * np.arange(n) / 1e6)
    >>> q = 2 / 2**10  # ideal 10-bit mid-rise quantiser over +-1
    >>> xq = np.clip(q * (np.floor(x / q) + 0.5), -1 + q / 2, 1 - q / 2)
    >>> r = spectral.tone_quality(quadkit.capture(xq, sample_rate=1e6))
    >>> round(float(r.sinad_db), 1), round(float(r.enob_bits), 2)  # near 6.02 * 10 + 1.76 = 61.96
    (61.9, 9.99)
    """
    fs, data = _common(cap, "tone_quality", window, "mean", "density")
    n_harmonics = check_positive_int("tone_quality", "n_harmonics", n_harmonics, minimum=0)
    n = data.shape[-1]
    if nperseg is None:
        nperseg = min(n, 16384)
    spec = psd(cap, nperseg=nperseg, window=window, overlap=overlap)
    attrs = spec.attrs
    nper = int(attrs["nperseg"])
    onesided = bool(attrs["onesided"])
    circular = not onesided
    lin = _density(spec)
    df = fs / nper
    off = np.asarray(spec.offset.values, float)
    nf = off.size
    fc = float(attrs["center_frequency"])
    L = _lobe_bins(window)
    band = fs / 2 if onesided else fs
    sumw2 = _window_sums(window, nper)[1]
    results: dict[str, list[float]] = {k: [] for k in (
        "snr", "sinad", "sfdr", "thd", "enob", "enob_sinad", "floor", "p1", "f1", "fspur",
        "thd_limited")}
    # Tones and spurs: find_peaks checks prominence over the local floor and tone shape.
    peaks = find_peaks(spec)
    channels = spec.channel.values if "channel" in spec.dims else [None]
    if fundamental_hz is not None:
        f_given = check_finite("tone_quality", "fundamental_hz", fundamental_hz)
    for c in range(lin.shape[0]):
        p = lin[c]
        if channels[c] is None:
            pk_off = np.asarray(peaks.offset_hz.values, float)
            pk_pow = 10 ** (np.asarray(peaks.power_dbfs.values, float) / 10)
        else:
            sel = np.asarray(peaks.channel.values) == channels[c]
            pk_off = np.asarray(peaks.offset_hz.values, float)[sel]
            pk_pow = 10 ** (np.asarray(peaks.power_dbfs.values, float)[sel] / 10)
        pk_pos = (pk_off - off[0]) / df
        used = np.zeros(nf, bool)
        k_dc, _ = _bin_of(0.0, off[0], df, nf, circular)
        dc_idx = np.arange(k_dc - L, k_dc + L + 1)
        dc_idx = dc_idx % nf if circular else dc_idx[(dc_idx >= 0) & (dc_idx < nf)]
        used[dc_idx] = True

        def bin_dist(pos, ref):
            d = np.asarray(pos, float) - ref
            return (d + nf / 2) % nf - nf / 2 if circular else d

        away = np.abs(bin_dist(pk_pos, k_dc)) > L
        if fundamental_hz is None:
            if not np.any(away):
                raise MeasurementError(
                    "tone_quality: no tone above the noise (no tone-shaped line stands 10 dB "
                    "over the local floor away from DC); check the capture or give "
                    "fundamental_hz")
            j1 = int(np.flatnonzero(away)[0])  # strongest first
            k1, delta1 = _bin_of(pk_off[j1], off[0], df, nf, circular)
        else:
            f_off = _fold(f_given - fc, fs, onesided)
            k1, delta1 = _bin_of(f_off, off[0], df, nf, circular)
            there = np.abs(bin_dist(pk_pos, k1 + delta1)) <= L
            if not np.any(there):
                found = (f"the strongest tone found is at {fc + pk_off[0]:.6g} Hz "
                         f"({10 * np.log10(pk_pow[0]):.1f} dBFS)" if pk_off.size
                         else "no tone stands above the noise anywhere")
                raise MeasurementError(
                    f"tone_quality: no tone at fundamental_hz={fundamental_hz:.6g} Hz; {found}")
            j1 = int(np.flatnonzero(there)[0])
        # First pass for a rough noise level under the components: the median of free bins.
        rough = float(np.median(p[~used])) / _floor_bias(spec)
        rough_floor = np.full(nf, rough)
        idx1, d1, frac1 = _component(p, rough_floor, k1, window, nper, circular, delta1)
        f1_off = off[k1] + d1 * df
        if circular and f1_off >= fs / 2:
            f1_off -= fs
        used[idx1] = True
        # Bins where the fundamental's leakage (window side lobes, from the closed-form
        # transform) exceeds 1 % of the noise are left out of the noise average.
        p1_rough = max(float((np.sum(p[idx1]) - rough * idx1.size) * df / frac1), 0.0)

        def leakage(power, pos):
            dist = bin_dist(np.arange(nf), pos)
            return power * np.abs(_window_dtft(window, nper, dist)) ** 2 / (fs * sumw2), dist

        leak, dist = leakage(p1_rough, k1 + d1)
        # (Within an eighth of the band, so that a noiseless capture keeps noise bins.)
        skirt = (leak > 0.01 * rough) & (np.abs(dist) < nf / 8)
        leak[idx1] = 0.0
        harm = []
        orders = range(2, n_harmonics + 2)
        signs = (1,) if onesided else (1, -1)
        for h in orders:
            for s in signs:
                fh = _fold(s * h * f1_off, fs, onesided)
                kh, dh = _bin_of(fh, off[0], df, nf, circular)
                idx, _, frac = _component(p, rough_floor, kh, window, nper, circular, dh)
                idx = idx[~used[idx]]
                if idx.size == 0:
                    continue
                used[idx] = True
                harm.append((idx, frac, fh))
        if n_harmonics and not harm:
            raise MeasurementError(
                f"tone_quality: every harmonic of {fc + f1_off:.6g} Hz folds onto the "
                "fundamental or DC, so THD cannot be measured; move the tone or give "
                "n_harmonics=0")
        free = ~used & ~skirt
        if not np.any(free):
            raise MeasurementError("tone_quality: no noise bins left; use a longer nperseg")
        # Spurs (found tones other than the fundamental, its harmonics and DC): their main
        # lobes and leakage skirts are noise for SNR (IEEE Std 1241) but are kept out of the
        # noise floor and of the background subtracted under each component.
        spur_bins = np.zeros(nf, bool)
        spur_leak = np.zeros(nf)
        for j in range(pk_off.size):
            kj = int(np.floor(pk_pos[j] + 0.5)) % nf if circular else int(
                min(max(np.floor(pk_pos[j] + 0.5), 0), nf - 1))
            if j == j1 or used[kj]:
                continue
            lj, dj = leakage(pk_pow[j], pk_pos[j])
            lobe = np.abs(dj) <= L + 0.5
            spur_bins |= ((lj > 0.01 * rough) & (np.abs(dj) < nf / 8)) | lobe
            lj[lobe] = 0.0  # the spur itself is measured, only its leakage is background
            spur_leak += lj
        quiet = free & ~spur_bins
        if np.count_nonzero(quiet) < max(16, np.count_nonzero(free) // 4):
            quiet = free
        n_snr = float(np.mean(p[free]))  # all that is not signal, DC or harmonic
        n0 = float(np.mean(p[quiet]))  # the noise floor itself
        p1 = float((np.sum(p[idx1]) - n0 * idx1.size) * df / frac1)
        if not p1 > 10 * n0 * df * idx1.size:
            raise MeasurementError(
                f"tone_quality: no tone above the noise (the line at {fc + f1_off:.6g} Hz holds "
                "less than 10 times the noise in its main lobe); check the capture")
        # Background under a component: the noise plus the fundamental's and spurs' leakage.
        back = n0 + leak * (p1 / p1_rough if p1_rough > 0 else 0.0) + spur_leak
        ph = [float(np.sum(p[i] - back[i]) * df / fr) for i, fr, _ in harm]
        p_harm = float(sum(max(v, 0.0) for v in ph))
        thd_limited = bool(harm) and not p_harm > 0
        if thd_limited:
            # No harmonic stands above the noise under it: report the noise power in the
            # harmonic bins, an upper bound of the THD (the floor-limited value).
            p_thd = float(sum(n0 * i.size * df / fr for i, fr, _ in harm))
        else:
            p_thd = p_harm
        p_noise = n_snr * band
        # Largest remaining spur (above its background): its main lobe summed like a component,
        # its frequency interpolated as in find_peaks.
        rest = np.flatnonzero(~used)
        kmax = int(rest[np.argmax(p[rest] - back[rest])])
        idx_s, d_s, frac_s = _component(p, back, kmax, window, nper, circular)
        idx_s = idx_s[~used[idx_s]]
        spur = float(np.sum(p[idx_s] - back[idx_s]) * df / frac_s)
        if not spur > 0:
            spur = float(n0 * max(idx_s.size, 1) * df / frac_s)  # floor-limited
        f_spur = off[kmax] + d_s * df
        if circular and f_spur >= fs / 2:
            f_spur -= fs
        if ph and max(ph) >= spur:
            j = int(np.argmax(ph))
            spur = ph[j]
            f_spur = harm[j][2]
        p_nad = p_noise + p_harm
        rail_ms = p_nad if onesided else p_nad / 2
        results["snr"].append(10 * np.log10(p1 / p_noise))
        results["sinad"].append(10 * np.log10(p1 / p_nad))
        results["sfdr"].append(10 * np.log10(p1 / spur))
        # (p_thd is 0 only with n_harmonics=0, where thd_db is dropped)
        results["thd"].append(10 * np.log10(p_thd / p1) if p_thd > 0 else 0.0)
        results["thd_limited"].append(thd_limited)
        results["enob"].append(float(np.log2(2.0 / np.sqrt(12 * rail_ms))))
        results["floor"].append(10 * np.log10(n0))
        results["p1"].append(10 * np.log10(p1))
        results["f1"].append(f1_off)
        results["fspur"].append(f_spur)
    sinad = np.asarray(results["sinad"])
    # 6.02 and 1.76 are 20 log10(2) and 10 log10(3/2), the ideal quantiser's figures.
    enob_sinad = (sinad - 10 * np.log10(1.5)) / (20 * np.log10(2))
    f1 = np.asarray(results["f1"])
    out = {
        "snr_db": _per_channel(spec, results["snr"], "dB", "signal-to-noise ratio"),
        "sinad_db": _per_channel(spec, sinad, "dB", "signal to noise and distortion ratio"),
        "sfdr_dbc": _per_channel(spec, results["sfdr"], "dBc", "spurious-free dynamic range"),
        "thd_db": _per_channel(spec, results["thd"], "dBc", "total harmonic distortion"),
        "enob_bits": _per_channel(spec, results["enob"], "bit",
                                  "effective number of bits (full-scale form)"),
        "enob_sinad_bits": _per_channel(spec, enob_sinad, "bit",
                                        "effective number of bits from SINAD"),
        "noise_floor_dbfs_hz": _per_channel(spec, results["floor"], "dBFS/Hz",
                                            "noise density"),
        "fundamental_power_dbfs": _per_channel(spec, results["p1"], "dBFS", "fundamental power"),
        "fundamental_frequency_hz": _per_channel(spec, fc + f1, "Hz", "fundamental frequency"),
        "fundamental_offset_hz": _per_channel(spec, f1, "Hz", "fundamental baseband offset"),
        "spur_frequency_hz": _per_channel(spec, fc + np.asarray(results["fspur"]), "Hz",
                                          "frequency of the largest spur"),
        "thd_floor_limited": quantity(
            np.asarray(results["thd_limited"], bool) if "channel" in spec.dims
            else bool(results["thd_limited"][0]), "1",
            "thd_db is the floor-limited upper bound (no harmonic above the noise)",
            ("channel",) if "channel" in spec.dims else ()),
    }
    if n_harmonics == 0:
        del out["thd_db"], out["thd_floor_limited"]
    return _channel_result(spec, out, {"n_harmonics": n_harmonics, "window": window,
                                       "nperseg": nper, "rbw_hz": float(attrs["rbw_hz"])})
