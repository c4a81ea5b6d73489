"""Amplitude, phase and frequency of tones, at the accuracy the data allows.

Functions
---------
measure_tone
    Frequency, amplitude and phase (at the first sample) of the strongest tone, or of the tone
    near a given frequency; residual, SNR; per channel with phases relative to channel 0.
sine_fit
    IEEE Std 1241 three-parameter (frequency known) or four-parameter (frequency estimated)
    sine fit with residual rms, SINAD and ENOB.
iq_components
    In-phase and quadrature amplitudes I = A cos(phi), Q = A sin(phi) at a frequency.
harmonics
    Amplitude and phase of the first n harmonics of a fundamental (dimension ``harmonic``).
analytic, envelope, instantaneous_phase, instantaneous_frequency
    Streaming operations: analytic signal of a real capture, its magnitude, phase and
    frequency.

Conventions
-----------
A real capture holding ``A cos(2 pi f t + phi)`` gives amplitude ``A`` and phase ``phi``; a
complex capture holding ``A exp(j (2 pi f t + phi))`` gives the same. ``t`` counts from the
capture's first sample (``t = 0`` there, also for a sliced capture). Amplitudes are in units
of full scale ("FS": sample values divided by the ``full_scale`` attr), and so are offsets and
residual rms; a complex tone of amplitude 1 FS is 0 dBFS and a real one is -3.01 dBFS, and
``power_dbm`` = ``power_dbfs`` + ``calibration_db``. The streaming operations return captures
whose values stay in the capture's sample units, with the same ``full_scale`` attr.
Frequencies are absolute (``center_frequency`` + offset); results carry the baseband offset as
``offset_hz`` too. Phases are quadrant-correct, in radians unless the name ends in ``_deg``.

How the estimates are made
--------------------------
Every measurement is a short sequence of passes over the capture, each a sum over time blocks
(a lazy capture is reduced chunk by chunk, never loaded whole; the result is lazy too and
nothing is computed until you ask):

1. an averaged (Welch-like, periodic Hann) spectrum of segments of ``L1`` samples finds the
   strongest line to a fraction of ``fs / L1``, and tests that it is a tone: above the
   median of its neighbourhood by a threshold set for the number of averages (false-alarm
   probability 1e-4 over the bins searched) and falling by more than 6 dB 3-4 bins from its
   peak (a modulated carrier is flat-topped there);
2. the capture is mixed down by that coarse frequency and summed over segments of
   ``L2 = L1 / 4`` samples; the segment sums of a tone form an exact tone of its own, whose
   zero-padded FFT peak gives the frequency to a small fraction of ``fs / N``;
3. Newton steps on the periodogram ``|sum x[n] exp(-j w n)|^2`` of the whole capture (complex
   captures) or Gauss-Newton steps of the IEEE Std 1241 four-parameter fit (real captures)
   polish it to the maximum-likelihood estimate, whose error reaches the Cramer-Rao bound
   above threshold (Rife & Boorstyn 1974);
4. a last pass fits amplitude and phase by least squares at the final frequency and gives the
   residual.

The sample index ``n`` is centred (``n - (N - 1) / 2``) inside the sums, which decorrelates the
phase from the frequency error; the phase is then carried back to the first sample.
"""

from __future__ import annotations

import math
import operator
from functools import lru_cache
from typing import Any, Literal

import numpy as np
import xarray as xr

from . import _capture
from ._checks import check_finite, check_option, check_positive_int
from ._errors import MeasurementError
from ._nco import phase_cycles
from ._results import quantity, result

__all__ = [
    "measure_tone",
    "sine_fit",
    "iq_components",
    "harmonics",
    "analytic",
    "envelope",
    "instantaneous_phase",
    "instantaneous_frequency",
]

_ACCESSOR = tuple(__all__)  # every public function here takes a capture first

#: Samples per inner block of every pass (a multiple of every Welch segment length used).
_BLOCK = 1 << 16
#: Largest number of segment sums kept by the fine search (bounds its memory).
_MAX_SEGMENTS = 1 << 15
#: Newton / Gauss-Newton iterations after the fine search (each one pass over the data).
_ITERATIONS = 2
#: False-alarm probability of the "is there a tone at all" test.
_PFA = 1e-4
#: Local-floor test of a line: half-width (bins) of the neighbourhood whose median is the
#: floor, main-lobe half-width excluded from it (periodic Hann: the lobe spans +-2 bins, +-2.5
#: for a tone between bins), and the bins past the lobe where a tone has fallen by 6 dB.
_FLOOR_HALF = 32
_LOBE = 3
_SHAPE_BINS = (3, 4)
_SHAPE_DB = 6.0
_MIN_SAMPLES_SEARCH = 16
_MIN_SAMPLES_FIXED = 4
#: Hilbert FIR of the streaming analytic signal: half length and Kaiser beta.
_HILBERT_HALF = 256
_HILBERT_BETA = 8.6


# --------------------------------------------------------------------------------------------
# Chunked reduction engine: one pass = sum over time blocks of kernel(block, offset, state)
# --------------------------------------------------------------------------------------------

def _data2d(cap: xr.DataArray) -> tuple[Any, bool]:
    """The samples as (channel, time), numpy or dask, and whether they are lazy."""
    if not isinstance(cap, xr.DataArray) or "time" not in cap.dims:
        raise ValueError("recovery: expected a capture (xarray.DataArray with a 'time' dim)")
    if tuple(cap.dims) not in (("time",), ("channel", "time")):
        raise ValueError(f"recovery: capture has dims {tuple(cap.dims)}, expected ('time',) or "
                         "('channel', 'time')")
    data = cap.data
    lazy = _capture.is_lazy(cap)
    if data.ndim == 1:
        data = data[None, :]
    if lazy and len(data.chunks[0]) > 1:
        data = data.rechunk({0: -1})
    return data, lazy


def _run_blocks(x: np.ndarray, offset: int, kernel: Any, params: tuple) -> np.ndarray:
    x = np.asarray(x)
    state = kernel.prepare(min(_BLOCK, max(x.shape[-1], 1)), *params)
    acc = None
    for s in range(0, x.shape[-1], _BLOCK):
        part = kernel.apply(x[:, s:s + _BLOCK], offset + s, state)
        acc = part if acc is None else acc + part
    if acc is None:
        acc = kernel.apply(x[:, :0], offset, state)
    return acc


def _tree_sum(parts: list) -> Any:
    import dask

    add = dask.delayed(operator.add, pure=True)
    while len(parts) > 1:
        parts = [add(parts[i], parts[i + 1]) if i + 1 < len(parts) else parts[i]
                 for i in range(0, len(parts), 2)]
    return parts[0]


def _pass(data: Any, lazy: bool, kernel: Any, *params: Any) -> Any:
    """Sum ``kernel`` over all time blocks; numpy result, or a dask Delayed for lazy data."""
    if not lazy:
        return _run_blocks(data, 0, kernel, params)
    import dask

    blocks = data.to_delayed()[0]
    offsets = np.concatenate([[0], np.cumsum(data.chunks[1])[:-1]]).astype(int)
    run = dask.delayed(_run_blocks, pure=True)
    return _tree_sum([run(b, int(o), kernel, params) for b, o in zip(blocks, offsets)])


def _step(lazy: bool, func: Any, *args: Any) -> Any:
    if not lazy:
        return func(*args)
    import dask

    return dask.delayed(func, pure=True)(*args)


def _matmul(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a @ b`` over a long inner axis, summed in pieces small enough that BLAS runs each
    on one thread: a threaded BLAS call of this shape gains nothing and stalls badly when
    the other cores are busy (dask workers, other processes)."""
    inner = a.shape[-1]
    step = max(512, (1 << 17) // max(1, a.shape[0] * b.shape[-1]))
    acc = a[:, :step] @ b[:step]
    for i in range(step, inner, step):
        acc += a[:, i:i + step] @ b[i:i + step]
    return acc


def _unit_phasor(ratio: np.ndarray, index: float) -> np.ndarray:
    """exp(j 2 pi ratio index) per channel, exact also for large (half-)integer ``index``.

    The product is split as in :mod:`quadkit._nco` (index = hi 2^20 + lo) so that no float
    product exceeds 2^20 cycles before its integer part is removed.
    """
    twice = int(round(2 * index))
    hi, lo = divmod(twice, 1 << 20)
    r = np.atleast_1d(np.asarray(ratio, np.float64)) / 2.0
    r_hi = r * float(1 << 20)
    r_hi -= np.round(r_hi)
    cyc = r_hi * float(hi)
    cyc -= np.round(cyc)
    cyc += r * float(lo)
    cyc -= np.round(cyc)
    return np.cos(2 * np.pi * cyc) + 1j * np.sin(2 * np.pi * cyc)


def _base(ratio: np.ndarray, count: int) -> np.ndarray:
    """exp(j 2 pi ratio k), k = 0 .. count-1 (count <= 2^16), per channel: (channel, count).

    Built as the outer product of exp(j 2 pi ratio 256 a) and exp(j 2 pi ratio b),
    k = 256 a + b: two short tables of cos/sin and one complex multiply per sample (error
    ~1e-15, far below anything measured with it).
    """
    ratio = np.atleast_1d(np.asarray(ratio, np.float64))

    def table(step: int, size: int) -> np.ndarray:
        cyc = np.outer(ratio, np.arange(size, dtype=np.float64) * step)
        cyc -= np.round(cyc)
        return np.exp(2j * np.pi * cyc)

    rows = -(-count // 256)
    out = table(256, rows)[:, :, None] * table(1, 256)[:, None, :]
    return out.reshape(ratio.size, rows * 256)[:, :count]


class _Welch:
    """Averaged |FFT|^2 of Hann-windowed segments of length L aligned to the first sample."""

    @staticmethod
    def prepare(blen: int, length: int) -> tuple:
        win = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(length) / length)  # periodic Hann
        return length, win

    @staticmethod
    def apply(x: np.ndarray, offset: int, state: tuple) -> np.ndarray:
        length, win = state
        nseg = x.shape[-1] // length
        if nseg == 0:
            return np.zeros((x.shape[0], length))
        # the coarse search needs no more than single precision: keep float32 data float32
        w = win.astype(np.float32) if x.dtype in (np.float32, np.complex64) else win
        seg = x[:, :nseg * length].reshape(x.shape[0], nseg, length) * w
        spec = np.fft.fft(seg, axis=-1)
        return (spec.real ** 2 + spec.imag ** 2).sum(axis=1)


class _Segments:
    """Sums of x[n] exp(-j w (n - c)) over segments k = n // L2 < K (full segments only)."""

    @staticmethod
    def prepare(blen: int, ratio: np.ndarray, seg: int, nseg: int, centre: float) -> tuple:
        return ratio, seg, nseg, centre, np.conj(_base(ratio, blen))

    @staticmethod
    def apply(x: np.ndarray, offset: int, state: tuple) -> np.ndarray:
        ratio, seg, nseg, centre, cbase = state
        out = np.zeros((x.shape[0], nseg), np.complex128)
        b = x.shape[-1]
        stop = min(b, nseg * seg - offset)
        if stop <= 0:
            return out
        p = x[:, :stop] * cbase[:, :stop]
        first = offset // seg
        starts = np.arange(first * seg, offset + stop, seg) - offset
        starts[0] = 0
        sums = np.add.reduceat(p, starts, axis=-1)
        sums *= np.conj(_unit_phasor(ratio, offset - centre))[:, None]
        out[:, first:first + sums.shape[-1]] = sums
        return out


class _Moments:
    """S_i = sum m^i x[n] exp(-j w m), m = n - c, i = 0, 1, 2, and the energy sum |x|^2."""

    @staticmethod
    def prepare(blen: int, ratio: np.ndarray, centre: float) -> tuple:
        k = np.arange(blen, dtype=np.float64)
        kmat = np.stack([np.ones(blen), k, k * k], axis=1)
        return ratio, centre, np.conj(_base(ratio, blen)), kmat

    @staticmethod
    def apply(x: np.ndarray, offset: int, state: tuple) -> np.ndarray:
        ratio, centre, cbase, kmat = state
        nchan, b = x.shape
        out = np.zeros((nchan, 4), np.complex128)
        if b == 0:
            return out
        p = x * cbase[:, :b]  # complex128; |p| = |x|
        pv = p.view(np.float64).reshape(nchan, b, 2)
        rot = np.conj(_unit_phasor(ratio, offset - centre))
        d = offset - centre  # m = d + k
        for ch in range(nchan):
            loc = _matmul(kmat[:b].T, pv[ch])  # (3, 2): sums of k^i Re p, k^i Im p
            s = (loc[:, 0] + 1j * loc[:, 1]) * rot[ch]
            out[ch, 0] = s[0]
            out[ch, 1] = d * s[0] + s[1]
            out[ch, 2] = d * d * s[0] + 2 * d * s[1] + s[2]
            out[ch, 3] = np.square(pv[ch]).sum()
        return out


class _Gram:
    """Block kernels of the four-parameter fits share one state: (ratio, centre, scale, base)."""

    @staticmethod
    def prepare(blen: int, ratio: np.ndarray, centre: float, scale: float) -> tuple:
        return ratio, centre, scale, _base(ratio, blen)


class _RealGram(_Gram):
    """Augmented Gram matrix of [cos wm, sin wm, 1, u cos wm, u sin wm, x], u = m / h."""

    @staticmethod
    def apply(x: np.ndarray, offset: int, state: tuple) -> np.ndarray:
        ratio, centre, scale, base = state
        nchan, b = x.shape
        out = np.zeros((nchan, 6, 6))
        if b == 0:
            return out
        q = base[:, :b] * _unit_phasor(ratio, offset - centre)[:, None]
        u = (offset - centre + np.arange(b)) / scale
        for ch in range(nchan):
            v = np.empty((b, 6))
            v[:, 0] = q[ch].real
            v[:, 1] = q[ch].imag
            v[:, 2] = 1.0
            v[:, 3] = u * v[:, 0]
            v[:, 4] = u * v[:, 1]
            v[:, 5] = x[ch]
            out[ch] = _matmul(v.T, v)
        return out


# --------------------------------------------------------------------------------------------
# Estimation steps (small numpy computations between passes)
# --------------------------------------------------------------------------------------------

def _sizes(n: int) -> tuple[int, int, int]:
    """Welch segment L1, fine segment L2 = L1 / 4, number of full fine segments K."""
    l2 = 1 << max(2, math.ceil(math.log2(max(1.0, n / _MAX_SEGMENTS))))
    l2 = max(l2, min(1024, 1 << int(math.log2(n // 4))))
    l1 = 4 * l2
    if l1 > n:
        l1 = 1 << int(math.log2(n))
        l2 = max(1, l1 // 4)
    return l1, l2, n // l2


@lru_cache(maxsize=64)
def _floor_threshold(nseg: int, nfloor: int, looks: int, pfa: float) -> float:
    """Peak-over-median ratio that white noise exceeds with probability ``pfa``.

    With ``nseg`` averaged Hann segments a noise bin of the averaged spectrum is
    ``S Gamma(nseg, 1)`` (chi-square with ``2 nseg`` degrees of freedom / 2; Kay, Modern
    Spectral Estimation, memory). The floor is the median of ``nfloor`` neighbouring bins;
    adjacent periodic-Hann bins are correlated (power correlation 4/9), so the median is
    taken as that of ``nfloor // 2`` independent ones: the order statistic
    ``U ~ Beta(a, a)``, ``a = (m + 1) / 2``, of uniforms mapped through the Gamma quantile
    (David & Nagaraja, Order Statistics, memory). Then
    ``P(peak > T floor) = E_U[sf(T ppf(U))]`` per bin, and the peak is the largest of
    ``looks`` bins (Bonferroni: ``looks P <= pfa``).
    """
    from scipy import optimize, special, stats

    a = (max(1, nfloor // 2) + 1) / 2.0
    # the median's density on a log grid spanning its quantiles 1e-15 .. 1 - 1e-15
    lo, hi = (special.gammaincinv(nseg, special.betaincinv(a, a, q)) for q in (1e-15, 1 - 1e-15))
    z = np.linspace(math.log(lo), math.log(hi), 4001)
    m = np.exp(z)
    dens = stats.beta.pdf(special.gammainc(nseg, m), a, a) * stats.gamma.pdf(m, nseg) * m
    weights = dens * (z[1] - z[0])
    weights /= weights.sum()
    log_target = math.log(pfa / looks)

    def log_excess(log_t: float) -> float:
        val = float(weights @ special.gammaincc(nseg, math.exp(log_t) * m))
        return math.log(max(val, 1e-300)) - log_target

    return math.exp(optimize.brentq(log_excess, 0.0, math.log(1e8), xtol=1e-5))


def _line_test(row: np.ndarray, k: int, real: bool, looks: int, nseg: int, fs: float, ch: int,
               func: str, note: str = "", what: str = "the strongest line") -> None:
    """Raise MeasurementError unless bin ``k`` of the averaged spectrum ``row`` holds a tone.

    A tone (a) stands above the *local* floor, the median of the bins within
    ``_FLOOR_HALF`` bins of it outside its main lobe, by the ratio that noise alone exceeds
    with probability ``_PFA`` (:func:`_floor_threshold`); and (b) is line-shaped: 3 and 4
    bins from its peak (past the Hann main lobe) the spectrum is down by more than 6 dB on
    both sides, where a modulated or wideband signal is flat-topped. Both parts are skipped
    where the capture is too short to have the bins they need.
    """
    length = row.size
    row = np.asarray(row, np.float64)
    if real:  # one-sided: bins 0 .. L/2; DC and Nyquist (and their leakage) are no floor
        idx = np.arange(length // 2 + 1)
        vals = row[:length // 2 + 1]
        d = idx - k
        inner = (idx > 1) & (idx < length // 2 - 1)
    else:
        idx = np.arange(length)
        vals = row
        d = (idx - k + length // 2) % length - length // 2
        inner = np.ones(length, bool)
    peak = float(row[k])
    off = (k / length if k < length / 2 or real else k / length - 1.0) * fs
    near = inner & (np.abs(d) > _LOBE) & (np.abs(d) <= _FLOOR_HALF)
    nfloor = int(near.sum())
    if nfloor >= 4:
        floor = float(np.median(vals[near]))
        need = _floor_threshold(max(1, nseg), nfloor, max(1, looks), _PFA)
        got = peak / floor if floor > 0 else (math.inf if peak > 0 else 0.0)
        if not got >= need:
            raise MeasurementError(
                f"{func}: no tone above the noise (channel {ch}): {what}, at {off:.6g} Hz "
                f"offset, stands {10 * math.log10(max(got, 1e-30)):.1f} dB above the local "
                f"spectral floor (median of {nfloor} bins of {fs / length:.6g} Hz within "
                f"+-{_FLOOR_HALF} bins, {nseg} average(s)); at least "
                f"{10 * math.log10(need):.1f} dB is needed (false-alarm probability {_PFA:g})"
                + note)
    shape = inner & np.isin(np.abs(d), _SHAPE_BINS)
    if shape.any() and peak > 0:
        drop = 10 * math.log10(peak / max(float(vals[shape].max()), 1e-300))
        if not drop > _SHAPE_DB:
            raise MeasurementError(
                f"{func}: no tone (channel {ch}): {what}, at {off:.6g} Hz offset, is not "
                f"tone-shaped: {_SHAPE_BINS[0]}-{_SHAPE_BINS[-1]} bins of {fs / length:.6g} "
                f"Hz from its peak the spectrum is only {drop:.1f} dB below it, where a tone "
                f"falls by more than {_SHAPE_DB:g} dB; a flat top like this is a modulated or "
                "wideband signal (give frequency_hz for a lock-in measurement at a known "
                "frequency)")


def _coarse(spec: np.ndarray, real: bool, hint: np.ndarray | None, window_bins: float,
            func: str, nseg: int = 1, fs: float = 1.0, note: str = "") -> np.ndarray:
    """Peak of the averaged spectrum (per channel), log-parabolic interpolation; cycles/sample.

    The peak must pass :func:`_line_test` (a line above the local floor, tone-shaped) or a
    MeasurementError says what was found.
    """
    nchan, length = spec.shape
    freqs = np.fft.fftfreq(length)
    out = np.empty(nchan)
    for ch in range(nchan):
        p = spec[ch].copy()
        allowed = np.ones(length, bool)
        if real:
            allowed &= (freqs >= 0) | (freqs == -0.5)
            if hint is None:  # DC and its Hann leakage are no tone (unless asked for)
                allowed &= np.abs(freqs) * length > 2
                if length > 8:
                    allowed &= np.abs(freqs) * length < length / 2 - 1
        if hint is not None:
            dist = np.abs((freqs - hint[ch] + 0.5) % 1.0 - 0.5) * length
            allowed &= dist <= window_bins
        if not allowed.any():
            raise MeasurementError(
                f"{func}: no spectral bin left to search (capture of {length} samples per "
                "segment); give more samples or a frequency inside the band")
        p[~allowed] = -1.0
        k = int(np.argmax(p))
        _line_test(spec[ch], k, real, int(allowed.sum()), nseg, fs, ch, func, note)
        a, b0, c = (max(spec[ch][(k + d) % length], 1e-300) for d in (-1, 0, 1))
        la, lb, lc = np.log(a), np.log(b0), np.log(c)
        den = la - 2 * lb + lc
        delta = 0.5 * (la - lc) / den if den < 0 else 0.0
        out[ch] = freqs[k] + float(np.clip(delta, -0.5, 0.5)) / length
    return out


def _fine(segsums: np.ndarray, coarse: np.ndarray, seg: int) -> np.ndarray:
    """Frequency of the tone formed by the segment sums (zero-padded FFT peak + parabola)."""
    nchan, k = segsums.shape
    nfft = 1 << max(6, math.ceil(math.log2(8 * k)))
    spec = np.abs(np.fft.fft(segsums, nfft, axis=-1)) ** 2
    out = np.empty(nchan)
    for ch in range(nchan):
        i = int(np.argmax(spec[ch]))
        a, b0, c = (spec[ch][(i + d) % nfft] for d in (-1, 0, 1))
        den = a - 2 * b0 + c
        delta = 0.5 * (a - c) / den if den < 0 else 0.0
        f = (((i + delta) / nfft + 0.5) % 1.0) - 0.5  # cycles per segment
        out[ch] = coarse[ch] + f / seg
    return out


def _newton(mom: np.ndarray, ratio: np.ndarray, n: int) -> np.ndarray:
    """One Newton step towards the periodogram maximum (ratio in cycles/sample)."""
    s0, s1, s2 = mom[:, 0], mom[:, 1], mom[:, 2]
    d1 = 2 * np.imag(np.conj(s0) * s1)
    d2 = 2 * (np.abs(s1) ** 2 - np.real(np.conj(s0) * s2))
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.where(d2 < 0, -d1 / d2, np.sign(d1) * np.pi / n)
    step = np.clip(np.nan_to_num(step), -np.pi / n, np.pi / n)
    return ratio + step / (2 * np.pi)


def _solve(g: np.ndarray, r: np.ndarray, what: str) -> np.ndarray:
    try:
        return np.linalg.solve(g, r)
    except np.linalg.LinAlgError:
        raise MeasurementError(f"{what}: the fit is singular (the regressors are not "
                               "independent over this capture); give more samples") from None


def _gauss_newton(gram: np.ndarray, ratio: np.ndarray, scale: float) -> np.ndarray:
    """One IEEE Std 1241 four-parameter step from the augmented Gram at ``ratio``."""
    out = ratio.copy()
    for ch in range(gram.shape[0]):
        g = gram[ch]
        a, b, _ = _solve(g[:3, :3], g[:3, 5], "sine_fit")
        t = np.zeros((5, 4))
        t[0, 0] = t[1, 1] = t[2, 2] = 1.0
        t[3, 3] = b   # d/dw of a cos(wm) + b sin(wm) = m (b cos - a sin) = h u (b cos - a sin)
        t[4, 3] = -a
        jj = t.T @ g[:5, :5] @ t
        jr = t.T @ g[:5, 5]
        theta = _solve(jj, jr, "sine_fit")
        dw = theta[3] / scale
        dw = float(np.clip(dw, -np.pi / scale, np.pi / scale))
        out[ch] = ratio[ch] + dw / (2 * np.pi)
    return out


def _finish_complex(mom: np.ndarray, ratio: np.ndarray, n: int, centre: float, fs: float,
                    check: bool, full_scale: float, func: str) -> dict:
    ratio = np.asarray(ratio, np.float64)
    outside = (ratio < -0.5) | (ratio >= 0.5)  # a tone at the band edge folds into the band
    ratio = np.where(outside, (ratio + 0.5) % 1.0 - 0.5, ratio)
    y = mom[:, 0] / full_scale  # from here on in units of full scale
    energy = mom[:, 3].real / full_scale ** 2
    amp = np.abs(y) / n
    resid = np.maximum(energy - np.abs(y) ** 2 / n, 0.0)
    noise = resid / max(n - 2, 1)
    phase_c = np.angle(y)
    phase0 = np.angle(np.exp(1j * phase_c) * np.conj(_unit_phasor(ratio, centre)))
    # normalised periodogram |Y|^2 / (N sigma^2) = N A^2 / sigma^2, Exp(1) per bin for noise
    out = _common(amp, phase_c, phase0, ratio, resid, noise, amp ** 2, n, fs, check,
                  n * amp ** 2, func)
    return out


def _finish_real(gram: np.ndarray, ratio: np.ndarray, n: int, centre: float, fs: float,
                 check: bool, full_scale: float, func: str) -> dict:
    nchan = gram.shape[0]
    amp = np.empty(nchan)
    phase_c = np.empty(nchan)
    dc = np.empty(nchan)
    resid = np.empty(nchan)
    for ch in range(nchan):
        g = gram[ch]
        if abs(ratio[ch]) < 1e-12 or abs(abs(ratio[ch]) - 0.5) < 1e-12:
            raise MeasurementError(
                f"{func}: frequency {ratio[ch] * fs:g} Hz offset is at DC or Nyquist, where a "
                "real tone has no phase to measure; choose a frequency inside (0, fs/2)")
        a, b, c = _solve(g[:3, :3], g[:3, 5], func)
        amp[ch] = math.hypot(a, b) / full_scale  # units of full scale
        phase_c[ch] = math.atan2(-b, a)  # a cos + b sin = A cos(wm + psi): a = A cos, b = -A sin
        dc[ch] = c / full_scale
        theta = np.array([a, b, c])
        resid[ch] = max(g[5, 5] - 2 * theta @ g[:3, 5] + theta @ g[:3, :3] @ theta,
                        0.0) / full_scale ** 2
    noise = resid / max(n - 4, 1)
    phase0 = np.angle(np.exp(1j * phase_c) * np.conj(_unit_phasor(ratio, centre)))
    # normalised periodogram of a real record: |sum x e^{-jwn}|^2 / (N sigma^2) = N A^2 / 4
    l1 = _sizes(n)[0]
    note = (f"; a real capture is searched between {2 * fs / l1:.6g} Hz and "
            f"{fs / 2 - fs / l1:.6g} Hz offset only (clear of DC and Nyquist): give "
            "frequency_hz for a tone outside that range")
    out = _common(amp, phase_c, phase0, ratio, resid, noise, amp ** 2 / 2, n, fs, check,
                  n * amp ** 2 / 4, func, note)
    out["dc"] = dc
    return out


def _common(amp, phase_c, phase0, ratio, resid, noise, power, n, fs, check, integrated,
            func, note="") -> dict:
    if check:
        need = math.log(n) + math.log(1 / _PFA)
        with np.errstate(divide="ignore"):
            got = integrated / np.maximum(noise, 1e-300)
        for ch in np.flatnonzero(~(got >= need)):
            raise MeasurementError(
                f"{func}: no tone above the noise (channel {ch}): the strongest line, at "
                f"{ratio[ch] * fs:.6g} Hz offset, has an integrated SNR of "
                f"{10 * math.log10(max(got[ch], 1e-30)):.1f} dB over {n} samples; at least "
                f"{10 * math.log10(need):.1f} dB is needed (false-alarm probability {_PFA:g})"
                + note)
    if not np.all(np.isfinite(amp)) or not np.all(np.isfinite(phase0)):
        raise MeasurementError(f"{func}: the fit gave a non-finite result")
    wrapped0 = (phase0 + np.pi) % (2 * np.pi) - np.pi
    with np.errstate(divide="ignore"):
        snr = 10 * np.log10(np.where(noise > 0, power / np.maximum(noise, 1e-300), np.inf))
        noise_db = 10 * np.log10(noise)  # -inf if the fit is exact to rounding
    return {
        "noise_dbfs": noise_db,
        "ratio": ratio, "amplitude": amp, "phase_centre": phase_c, "phase0": wrapped0,
        "residual_energy": resid, "noise_power": noise, "snr_db": snr,
    }


def _search(data: Any, lazy: bool, n: int, real: bool, hint: np.ndarray | None,
            func: str, fs: float = 1.0) -> Any:
    """Coarse (Welch) and fine (segment) stages: ratio estimate per channel (maybe Delayed)."""
    l1, l2, k = _sizes(n)
    centre = (n - 1) / 2.0
    welch_data = data
    if lazy:
        sizes = data.chunks[1]
        aligned = max(l1, int(round(max(sizes) / l1)) * l1)
        welch_data = data.rechunk({1: aligned})
    spec = _pass(welch_data, lazy, _Welch, l1)
    note = ""
    if real and hint is None:
        note = (f"; a real capture is searched between {2 * fs / l1:.6g} Hz and "
                f"{fs / 2 - fs / l1:.6g} Hz offset only (clear of DC and Nyquist): give "
                "frequency_hz for a tone outside that range")
    coarse = _step(lazy, _coarse, spec, real, hint, 3.0, func, n // l1, fs, note)
    segs = _pass(data, lazy, _Segments, coarse, l2, k, centre)
    return _step(lazy, _fine, segs, coarse, l2)


def _refine(data: Any, lazy: bool, ratio: Any, n: int, real: bool) -> Any:
    centre = (n - 1) / 2.0
    scale = max(centre, 1.0)
    for _ in range(_ITERATIONS):
        if real:
            gram = _pass(data, lazy, _RealGram, ratio, centre, scale)
            ratio = _step(lazy, _gauss_newton, gram, ratio, scale)
        else:
            mom = _pass(data, lazy, _Moments, ratio, centre)
            ratio = _step(lazy, _newton, mom, ratio, n)
    return ratio


def _estimate(cap: xr.DataArray, frequency_hz: float | None, refine: bool, func: str) -> tuple:
    """Run the passes; returns (dict of per-channel arrays or a Delayed of it, lazy, meta)."""
    data, lazy = _data2d(cap)
    fs = _capture.sample_rate(cap)
    fc = float(cap.attrs.get("center_frequency", 0.0))
    real = not _capture.is_complex(cap)
    full_scale = _capture.full_scale(cap)
    nchan, n = data.shape
    need = _MIN_SAMPLES_SEARCH if (frequency_hz is None or refine) else _MIN_SAMPLES_FIXED
    if n < need:
        raise MeasurementError(
            f"{func}: the capture has {n} samples; at least {need} are needed "
            f"({'to search for a frequency' if need == _MIN_SAMPLES_SEARCH else 'for the fit'})")
    hint = None
    if frequency_hz is not None:
        offset = _offset_of(func, frequency_hz, fs, fc, real)
        hint = np.full(nchan, offset / fs)
    centre = (n - 1) / 2.0
    if hint is not None and not refine:
        ratio = hint
    else:
        ratio = _search(data, lazy, n, real, hint, func, fs)
        ratio = _refine(data, lazy, ratio, n, real)
    check = frequency_hz is None or refine  # a lock-in measurement needs no tone test
    if real:
        gram = _pass(data, lazy, _RealGram, ratio, centre, max(centre, 1.0))
        res = _step(lazy, _finish_real, gram, ratio, n, centre, fs, check, full_scale, func)
    else:
        mom = _pass(data, lazy, _Moments, ratio, centre)
        res = _step(lazy, _finish_complex, mom, ratio, n, centre, fs, check, full_scale,
                    func)
    meta = {"fs": fs, "fc": fc, "real": real, "n": n, "nchan": nchan,
            "multi": cap.ndim == 2, "lazy": lazy, "cal": cap.attrs.get("calibration_db")}
    return res, meta


def _offset_of(func: str, frequency_hz: Any, fs: float, fc: float, real: bool) -> float:
    f = check_finite(func, "frequency_hz", frequency_hz)
    off = f - fc
    if real:
        if not 0 < off < fs / 2:
            raise ValueError(
                f"{func}: frequency_hz={f:g} is {off:g} Hz from center_frequency={fc:g}; a real "
                f"capture at sample_rate={fs:g} holds tones strictly between 0 and the Nyquist "
                f"frequency {fs / 2:g} Hz")
    elif not -fs / 2 <= off < fs / 2:
        raise ValueError(
            f"{func}: frequency_hz={f:g} is {off:g} Hz from center_frequency={fc:g}, outside "
            f"the band [-{fs / 2:g}, {fs / 2:g}) Hz of sample_rate={fs:g}")
    return off


def _field(res: Any, key: str, meta: dict, dtype: Any = np.float64) -> Any:
    """One per-channel result array, lazy (dask) when the capture is."""
    if not meta["lazy"]:
        return np.asarray(res[key])
    import dask
    import dask.array as da

    item = dask.delayed(operator.getitem, pure=True)(res, key)
    return da.from_delayed(item, shape=(meta["nchan"],), dtype=dtype)


def _var(value: Any, meta: dict, units: str, long_name: str) -> xr.DataArray:
    if meta["multi"]:
        return quantity(value, units, long_name, dims=("channel",))
    return quantity(value[0], units, long_name)


def _coords(cap: xr.DataArray, meta: dict) -> dict:
    return {"channel": cap["channel"].values} if meta["multi"] else {}


def _tone_vars(res: Any, meta: dict, with_relative: bool) -> dict:
    fs, fc = meta["fs"], meta["fc"]
    ratio = _field(res, "ratio", meta)
    amp = _field(res, "amplitude", meta)
    ph0 = _field(res, "phase0", meta)
    phc = _field(res, "phase_centre", meta)
    resid = _field(res, "residual_energy", meta)
    power = amp ** 2 / (2 if meta["real"] else 1)
    out = {
        "frequency_hz": _var(fc + ratio * fs, meta, "Hz", "tone frequency (absolute)"),
        "offset_hz": _var(ratio * fs, meta, "Hz", "tone frequency offset from the center "
                          "frequency"),
        "amplitude": _var(amp, meta, "FS", "tone peak amplitude in units of full scale"),
        "power_dbfs": _var(10 * np.log10(power), meta, "dBFS", "tone power"),
        "phase_rad": _var(ph0, meta, "rad", "tone phase at the first sample"),
        "phase_deg": _var(np.degrees(ph0), meta, "deg", "tone phase at the first sample"),
        "snr_db": _var(_field(res, "snr_db", meta), meta, "dB",
                       "tone power over the residual (noise and distortion) power"),
        "residual_rms": _var(np.sqrt(resid / meta["n"]), meta, "FS",
                             "rms of the fit residual in units of full scale"),
        "noise_power_dbfs": _var(_field(res, "noise_dbfs", meta), meta, "dBFS",
                                 "mean power of the fit residual per sample"),
    }
    if meta.get("cal") is not None:  # dBm = dBFS + calibration_db (DESIGN.md)
        out["power_dbm"] = _var(10 * np.log10(power) + float(meta["cal"]), meta, "dBm",
                                "tone power (calibrated)")
    if with_relative and meta["multi"]:
        rel = (phc - phc[0] + np.pi) % (2 * np.pi) - np.pi
        out["relative_phase_rad"] = quantity(rel, "rad", "phase relative to channel 0",
                                             dims=("channel",))
        out["relative_phase_deg"] = quantity(np.degrees(rel), "deg",
                                             "phase relative to channel 0", dims=("channel",))
    return out


# --------------------------------------------------------------------------------------------
# Public measurements
# --------------------------------------------------------------------------------------------

def measure_tone(cap: xr.DataArray, frequency_hz: float | None = None, *,
                 refine: bool = True) -> xr.Dataset:
    """Frequency, amplitude and phase of a tone, at the Cramer-Rao limit.

    Parameters
    ----------
    cap : xarray.DataArray
        Capture, dims ``("time",)`` or ``("channel", "time")``, complex or real, in memory or
        lazy (dask; reduced chunk by chunk, any chunking, the result is lazy too).
    frequency_hz : float, optional
        Absolute frequency (``center_frequency`` + offset) of the tone to measure. ``None``
        (default) measures the strongest line (for a real capture the strongest between
        ``2 fs / L1`` and ``fs / 2 - fs / L1``, clear of DC and Nyquist; ``L1`` is the Welch
        segment, 4096 samples for most lengths, at most ``N``). When given, the tone is
        looked for within three Welch bins (``3 fs / L1``) of it, anywhere in the band.
    refine : bool
        With ``frequency_hz`` given: ``True`` (default) estimates the tone's frequency near
        it; ``False`` measures amplitude and phase exactly at ``frequency_hz`` (a coherent,
        lock-in style measurement; no "tone present" test is made then).

    Returns
    -------
    xarray.Dataset
        Per channel (dim ``channel`` for a multi-channel capture): ``frequency_hz``,
        ``offset_hz`` (Hz), ``amplitude`` (FS, peak), ``power_dbfs`` (A^2 complex, A^2/2
        real, A in FS; also ``power_dbm`` = ``power_dbfs`` + ``calibration_db`` when the
        capture has ``calibration_db``), ``phase_rad``/``phase_deg`` (at the first sample),
        ``snr_db`` (tone power over the residual power per sample; +inf for a noiseless
        tone), ``residual_rms`` (FS), ``noise_power_dbfs``; for a multi-channel capture also
        ``relative_phase_rad``/``relative_phase_deg``: each channel's phase minus channel 0's,
        taken at the capture's centre where it is most precise (for channels holding the
        same tone it is the same at every instant).

    Raises
    ------
    MeasurementError
        Fewer than 16 samples (4 with ``refine=False``), or no tone above the noise: the
        normalised periodogram peak ``N A^2 / sigma^2`` (complex; ``N A^2 / (4 sigma^2)``
        real) must exceed ``ln N + ln(1/1e-4)``, the level the largest of N noise-only bins
        exceeds with probability about 1e-4; and the line must stand above the *local*
        floor of the averaged search spectrum (median of the bins 4 to 32 bins from it, the
        threshold set for the number of averages and of bins searched so that white noise
        passes with probability at most 1e-4) and be tone-shaped (3-4 bins from its peak
        the spectrum is more than 6 dB down), so that modulated traffic, band-limited or
        white noise give no "tone". Not tested with ``refine=False`` (a lock-in measurement
        of whatever is at ``frequency_hz``). For a lazy capture the error is raised when the
        result is computed.
    ValueError
        ``frequency_hz`` outside the band (complex: [fc - fs/2, fc + fs/2); real: strictly
        between fc and fc + fs/2).

    Notes
    -----
    Model: complex ``A exp(j(2 pi f t + phi))`` plus white noise, estimated by the
    maximum of the periodogram; real ``A cos(2 pi f t + phi) + dc`` plus noise, estimated by
    the IEEE Std 1241 four-parameter least-squares fit (the dc term is fitted, not reported).
    Both are maximum-likelihood in white Gaussian noise and reach the Cramer-Rao bounds above
    threshold (Rife & Boorstyn 1974): ``var(w) = 6 / (rho N (N^2 - 1))`` rad^2/sample^2 for a
    complex tone with ``rho = A^2 / sigma^2``. See the module docstring for the passes made.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.tone(12345.678, sample_rate=1e6, n_samples=100_000,
    ...                          amplitude=0.5, phase_rad=2.5, center_frequency=915e6)
    >>> cap = quadkit.synth.add_noise(cap, snr_db=20, rng=1)
    >>> res = quadkit.recovery.measure_tone(cap)
    >>> print(f"{float(res.offset_hz):.2f} Hz  A={float(res.amplitude):.3f}  "
    ...       f"phase={float(res.phase_rad):.3f} rad  SNR={float(res.snr_db):.1f} dB")
    12345.68 Hz  A=0.500  phase=2.500 rad  SNR=20.0 dB
    """
    res, meta = _estimate(cap, frequency_hz, bool(refine), "measure_tone")
    attrs = {"sample_rate": meta["fs"], "center_frequency": meta["fc"],
             "n_samples": meta["n"], "model": "real sine + dc" if meta["real"] else
             "complex exponential"}
    return result(_tone_vars(res, meta, True), coords=_coords(cap, meta), attrs=attrs)


def sine_fit(cap: xr.DataArray, frequency_hz: float | None = None) -> xr.Dataset:
    """IEEE Std 1241 sine fit: three-parameter at a known frequency, four-parameter if not.

    Parameters
    ----------
    cap : xarray.DataArray
        Capture, real (the standard's case: one ADC record) or complex, one channel or many,
        in memory or lazy (reduced chunk by chunk).
    frequency_hz : float, optional
        Known absolute frequency: the three-parameter fit (amplitude, phase, offset) is made at
        exactly this frequency. ``None``: the four-parameter fit estimates the frequency too
        (started from the search of :func:`measure_tone`, then Gauss-Newton iterations).

    Raises
    ------
    MeasurementError
        Without ``frequency_hz``: no tone in the capture, by the local-floor and shape test
        of :func:`measure_tone` (modulated traffic or noise is not fitted as a sine). With
        ``frequency_hz`` the fit is always made there. Also too few samples.

    Returns
    -------
    xarray.Dataset
        ``amplitude`` (FS), ``phase_rad``/``phase_deg`` (at the first sample, model
        ``A cos(2 pi f t + phi) + C``), ``offset`` (FS, the fitted C; complex captures:
        ``offset_i`` and ``offset_q``), ``frequency_hz``, ``offset_hz``, ``residual_rms``
        (FS, the rms of the residuals, NAD_rms of the standard), ``sinad_db``
        (``20 log10(A_rms / NAD_rms)``), ``enob_bits`` and ``enob_sinad_bits``. A record
        fitted exactly (noiseless synthetic data) gives +inf for these three, never NaN.

    Notes
    -----
    ENOB: ``enob_bits`` is the IEEE Std 1241 form ``log2(FSR / (NAD_rms sqrt(12)))`` with the
    full-scale range ``FSR = 2 full_scale``; it does not depend on the test amplitude (an
    ideal 12-bit converter gives 12 at any level). ``enob_sinad_bits`` is the datasheet form
    ``(SINAD - 1.76) / 6.02``, equal to it only for a full-scale test signal (an ideal 12-bit
    converter at -6.02 dBFS gives 11). For a complex capture the model is
    ``A exp(j(2 pi f t + phi)) + C``, ``A_rms = A`` and NAD_rms per component is
    ``residual_rms / sqrt(2)``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> t = np.arange(4096) / 1e6
    >>> q = 2 / 2**12                                  # 12-bit quantiser over +-1
    >>> x = np.round(0.99 * np.cos(2 * np.pi * 10_007 * t + 1.0) / q) * q
    >>> cap = quadkit.capture(x.astype(np.float32), sample_rate=1e6)
    >>> fit = quadkit.recovery.sine_fit(cap)
    >>> print(f"{float(fit.frequency_hz):.2f} Hz  A={float(fit.amplitude):.5f}  "
    ...       f"ENOB={float(fit.enob_bits):.2f} bits")
    10007.00 Hz  A=0.99000  ENOB=12.00 bits
    """
    func = "sine_fit"
    data, lazy = _data2d(cap)
    fs = _capture.sample_rate(cap)
    fc = float(cap.attrs.get("center_frequency", 0.0))
    real = not _capture.is_complex(cap)
    nchan, n = data.shape
    need = _MIN_SAMPLES_SEARCH if frequency_hz is None else _MIN_SAMPLES_FIXED
    if n < need:
        raise MeasurementError(f"{func}: the capture has {n} samples; at least {need} are "
                               "needed for this fit")
    if frequency_hz is None:
        ratio = _search(data, lazy, n, real, None, func, fs)
        ratio = _refine(data, lazy, ratio, n, real)
        if not real:  # the periodogram maximum ignores the offset: polish with it
            centre = (n - 1) / 2.0
            for _ in range(_ITERATIONS):
                gram = _pass(data, lazy, _ComplexGram, ratio, centre, max(centre, 1.0))
                ratio = _step(lazy, _gauss_newton_complex, gram, ratio, max(centre, 1.0))
    else:
        ratio = np.full(nchan, _offset_of(func, frequency_hz, fs, fc, real) / fs)
    gram = _pass(data, lazy, _FixedFit, ratio, (1,), real)
    res = _step(lazy, _finish_fit, gram, ratio, n, real, _capture.full_scale(cap), func)
    meta = {"fs": fs, "fc": fc, "real": real, "n": n, "nchan": nchan,
            "multi": cap.ndim == 2, "lazy": lazy, "cal": cap.attrs.get("calibration_db")}
    f = _field
    amp = f(res, "amplitude", meta)
    ph = f(res, "phase0", meta)
    ratio_v = f(res, "ratio", meta)
    rms = f(res, "residual_rms", meta)
    out = {
        "amplitude": _var(amp, meta, "FS", "fitted peak amplitude in units of full scale"),
        "phase_rad": _var(ph, meta, "rad", "fitted phase at the first sample"),
        "phase_deg": _var(np.degrees(ph), meta, "deg", "fitted phase at the first sample"),
    }
    if real:
        out["offset"] = _var(f(res, "dc", meta), meta, "FS", "fitted dc offset")
    else:
        out["offset_i"] = _var(f(res, "dc", meta), meta, "FS", "fitted dc offset of I")
        out["offset_q"] = _var(f(res, "dc_q", meta), meta, "FS", "fitted dc offset of Q")
    out.update({
        "frequency_hz": _var(fc + ratio_v * fs, meta, "Hz", "fitted frequency (absolute)"),
        "offset_hz": _var(ratio_v * fs, meta, "Hz", "fitted frequency offset"),
        "residual_rms": _var(rms, meta, "FS", "rms of the fit residual (NAD rms)"),
        "sinad_db": _var(f(res, "sinad_db", meta), meta, "dB",
                         "signal to noise and distortion ratio"),
        "enob_bits": _var(f(res, "enob_bits", meta), meta, "bit",
                          "effective number of bits, IEEE Std 1241 full-scale-range form"),
        "enob_sinad_bits": _var(f(res, "enob_sinad_bits", meta), meta, "bit",
                                "effective number of bits, (SINAD - 1.76) / 6.02"),
    })
    attrs = {"sample_rate": fs, "center_frequency": fc, "n_samples": n,
             "fit": "three-parameter" if frequency_hz is not None else "four-parameter",
             "standard": "IEEE Std 1241"}
    return result(out, coords=_coords(cap, meta), attrs=attrs)


def _finish_fit(gram: np.ndarray, ratio: np.ndarray, n: int, real: bool, full_scale: float,
                func: str) -> dict:
    coef, dc, resid = _solve_fixed(gram, 1, real, func)
    coef, dc, resid = coef / full_scale, dc / full_scale, resid / full_scale ** 2  # FS units
    amp = np.abs(coef[:, 0])
    phase0 = np.angle(coef[:, 0])
    rms = np.sqrt(resid / n)
    a_rms = amp / math.sqrt(2) if real else amp
    nad = rms if real else rms / math.sqrt(2)
    # a record fitted to rounding (noiseless synthetic data) has no measurable noise: the
    # figures are unbounded and reported as +inf, never NaN
    with np.errstate(divide="ignore"):
        sinad = np.where(rms > 0, 20 * np.log10(a_rms / np.where(rms > 0, rms, 1.0)), np.inf)
        # FSR = 2 full_scale, i.e. 2 in the units of full scale used here
        enob = np.where(rms > 0, np.log2(2.0 / (np.where(rms > 0, nad, 1.0) * math.sqrt(12))),
                        np.inf)
    return {
        "ratio": ratio, "amplitude": amp, "phase0": phase0, "dc": dc.real,
        "dc_q": dc.imag, "residual_rms": rms, "sinad_db": sinad,
        "enob_bits": enob,
        "enob_sinad_bits": (sinad - 10 * math.log10(1.5)) / (20 * math.log10(2)),
    }


class _ComplexGram(_Gram):
    """Augmented Hermitian Gram of [exp(j w m), 1, u exp(j w m), x], u = m / h (complex
    four-parameter fit: amplitude, phase, complex offset, frequency)."""

    @staticmethod
    def apply(x: np.ndarray, offset: int, state: tuple) -> np.ndarray:
        ratio, centre, scale, base = state
        nchan, b = x.shape
        out = np.zeros((nchan, 4, 4), np.complex128)
        if b == 0:
            return out
        e = base[:, :b] * _unit_phasor(ratio, offset - centre)[:, None]
        u = (offset - centre + np.arange(b)) / scale
        for ch in range(nchan):
            w = np.stack([e[ch], np.ones(b), u * e[ch], x[ch].astype(np.complex128)])
            out[ch] = _matmul(np.conj(w), w.T)
        return out


def _gauss_newton_complex(gram: np.ndarray, ratio: np.ndarray, scale: float) -> np.ndarray:
    """One Gauss-Newton step of the complex fit alpha exp(j w m) + beta (real parameters
    Re/Im alpha, Re/Im beta and w; the frequency column is j alpha m exp(j w m))."""
    out = ratio.copy()
    for ch in range(gram.shape[0]):
        g, r = gram[ch][:3, :3], gram[ch][:3, 3]
        alpha, _ = _solve(g[:2, :2], r[:2], "sine_fit")
        idx = [0, 0, 1, 1, 2]
        sc = np.array([1, 1j, 1, 1j, 1j * alpha])
        greal = np.real(np.conj(sc)[:, None] * sc[None, :] * g[np.ix_(idx, idx)])
        rreal = np.real(np.conj(sc) * r[idx])
        theta = _solve(greal, rreal, "sine_fit")
        dw = float(np.clip(theta[4] / scale, -np.pi / scale, np.pi / scale))
        out[ch] = ratio[ch] + dw / (2 * np.pi)
    return out


class _FixedFit:
    """Augmented Gram of fixed-frequency regressors and the samples, per channel.

    Regressors at the multiples ``hs`` of each channel's ratio, n counted from the first
    sample: real ``cos, sin`` per multiple then ``1``; complex ``exp`` per multiple then ``1``.
    The Gram is ``conj(w) @ w.T`` over the rows ``w = [regressors..., x]``.
    """

    @staticmethod
    def prepare(blen: int, ratio: np.ndarray, hs: tuple, real: bool) -> tuple:
        return np.asarray(ratio, float), tuple(hs), real

    @staticmethod
    def apply(x: np.ndarray, offset: int, state: tuple) -> np.ndarray:
        ratio, hs, real = state
        nchan, b = x.shape
        p = 2 * len(hs) + 1 if real else len(hs) + 1
        out = np.zeros((nchan, p + 1, p + 1), np.float64 if real else np.complex128)
        if b == 0:
            return out
        for ch in range(nchan):
            osc = np.exp(2j * np.pi * np.stack([phase_cycles(h * ratio[ch], offset, b)
                                                for h in hs]))
            if real:
                w = np.concatenate([np.stack([osc.real, osc.imag], 1).reshape(-1, b),
                                    np.ones((1, b)), x[ch][None, :].astype(np.float64)])
            else:
                w = np.concatenate([osc, np.ones((1, b)), x[ch][None, :].astype(np.complex128)])
            out[ch] = _matmul(np.conj(w), w.T)
        return out


def _solve_fixed(gram: np.ndarray, nh: int, real: bool, func: str) -> tuple:
    """Least squares from the augmented Gram: complex amplitudes (A e^{j phi}) per multiple,
    the dc term (complex: I + jQ) and the residual energy, per channel."""
    nchan, q, _ = gram.shape
    p = q - 1
    coef = np.empty((nchan, nh), np.complex128)
    dc = np.empty(nchan, np.complex128)
    resid = np.empty(nchan)
    for ch in range(nchan):
        g = gram[ch]
        scale = np.sqrt(np.abs(np.diag(g[:p, :p])))
        if np.any(scale <= 1e-9 * max(scale.max(), 1e-300)):
            raise MeasurementError(f"{func}: a regressor vanishes over this capture (a "
                                   "frequency at DC or Nyquist); the fit is not defined")
        gs = g[:p, :p] / np.outer(scale, scale)
        if np.linalg.cond(gs) > 1e10:
            raise MeasurementError(f"{func}: the fit is singular: two fitted frequencies "
                                   "coincide (after folding into the band) or the capture is "
                                   "too short to tell them apart")
        theta = _solve(gs, g[:p, p] / scale, func) / scale
        r = g[:p, p]
        resid[ch] = max(float(np.real(g[p, p] - 2 * np.real(np.vdot(theta, r))
                                      + np.conj(theta) @ g[:p, :p] @ theta)), 0.0)
        if real:
            a, b = theta[0:2 * nh:2].real, theta[1:2 * nh:2].real
            coef[ch] = a - 1j * b  # a cos + b sin = A cos(wn + phi): a = A cos phi, b = -A sin phi
            dc[ch] = theta[2 * nh].real
        else:
            coef[ch] = theta[:nh]
            dc[ch] = theta[nh]
    return coef, dc, resid


def _fixed_meta(cap: xr.DataArray, data: Any, lazy: bool) -> dict:
    return {"fs": _capture.sample_rate(cap), "fc": float(cap.attrs.get("center_frequency", 0.0)),
            "real": not _capture.is_complex(cap), "n": data.shape[1], "nchan": data.shape[0],
            "multi": cap.ndim == 2, "lazy": lazy, "cal": cap.attrs.get("calibration_db")}


def _field_nd(res: Any, key: str, meta: dict, shape: tuple, dtype: Any = np.float64) -> Any:
    if not meta["lazy"]:
        return np.asarray(res[key])
    import dask
    import dask.array as da

    item = dask.delayed(operator.getitem, pure=True)(res, key)
    return da.from_delayed(item, shape=shape, dtype=dtype)


def _finish_iq(gram: np.ndarray, full_scale: float, func: str) -> dict:
    coef, dc, _ = _solve_fixed(gram, 1, gram.dtype.kind != "c", func)
    z = coef[:, 0] / full_scale  # units of full scale
    dc = dc / full_scale
    return {"i": z.real, "q": z.imag, "amplitude": np.abs(z), "phase0": np.angle(z),
            "dc": dc.real, "dc_q": dc.imag}


def iq_components(real_cap: xr.DataArray, frequency_hz: float) -> xr.Dataset:
    """In-phase and quadrature amplitudes of a signal at a known frequency.

    A real capture holding ``A cos(2 pi f t + phi)`` gives ``I = A cos(phi)`` and
    ``Q = A sin(phi)`` (so ``x = I cos(2 pi f t) - Q sin(2 pi f t)``, the complex-envelope
    convention ``z = I + jQ = A exp(j phi)``), found by the IEEE Std 1241 three-parameter
    least-squares fit of ``[cos, sin, 1]`` at ``frequency_hz`` (the dc term keeps an offset out
    of I and Q; multiplying by a cosine and a negative sine and averaging is the same thing
    over whole cycles). A complex capture holding ``A exp(j(2 pi f t + phi))`` gives the same
    I and Q (least squares on ``[exp(j 2 pi f t), 1]``).

    Parameters
    ----------
    real_cap : xarray.DataArray
        Capture (real, or complex), one channel or many, in memory or lazy (one chunked pass).
    frequency_hz : float
        Absolute frequency (``center_frequency`` + offset); real captures: strictly between
        0 and the Nyquist frequency offset.

    Returns
    -------
    xarray.Dataset
        ``i``, ``q``, ``amplitude`` (FS), ``phase_rad``, ``phase_deg`` (quadrant-correct, at
        the first sample), ``frequency_hz``, ``offset_hz``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.tone(1e3, sample_rate=48e3, n_samples=4800, amplitude=0.8,
    ...                          phase_rad=np.radians(-120), real=True)
    >>> iq = quadkit.recovery.iq_components(cap, 1e3)
    >>> print(f"I={float(iq.i):+.4f} Q={float(iq.q):+.4f} phase={float(iq.phase_deg):.2f} deg")
    I=-0.4000 Q=-0.6928 phase=-120.00 deg
    """
    func = "iq_components"
    data, lazy = _data2d(real_cap)
    meta = _fixed_meta(real_cap, data, lazy)
    if meta["n"] < _MIN_SAMPLES_FIXED:
        raise MeasurementError(f"{func}: the capture has {meta['n']} samples; at least "
                               f"{_MIN_SAMPLES_FIXED} are needed for the fit")
    off = _offset_of(func, frequency_hz, meta["fs"], meta["fc"], meta["real"])
    ratio = np.full(meta["nchan"], off / meta["fs"])
    gram = _pass(data, lazy, _FixedFit, ratio, (1,), meta["real"])
    res = _step(lazy, _finish_iq, gram, _capture.full_scale(real_cap), func)
    f = _field
    ph = f(res, "phase0", meta)
    out = {
        "i": _var(f(res, "i", meta), meta, "FS", "in-phase amplitude A cos(phi)"),
        "q": _var(f(res, "q", meta), meta, "FS", "quadrature amplitude A sin(phi)"),
        "amplitude": _var(f(res, "amplitude", meta), meta, "FS", "peak amplitude"),
        "phase_rad": _var(ph, meta, "rad", "phase at the first sample"),
        "phase_deg": _var(np.degrees(ph), meta, "deg", "phase at the first sample"),
        "frequency_hz": _var(np.full(meta["nchan"], meta["fc"] + off), meta, "Hz",
                             "frequency of the fit (absolute)"),
        "offset_hz": _var(np.full(meta["nchan"], off), meta, "Hz", "frequency offset of the fit"),
    }
    return result(out, coords=_coords(real_cap, meta),
                  attrs={"sample_rate": meta["fs"], "center_frequency": meta["fc"]})


def _fold(ratio: float) -> float:
    """A frequency (cycles/sample) folded into [-0.5, 0.5) as sampling aliases it."""
    return ((ratio + 0.5) % 1.0) - 0.5


def _check_fundamental(spec: np.ndarray, ratio: float, real: bool, nseg: int, fs: float,
                       func: str) -> bool:
    """Raise unless the averaged spectrum holds a tone at ``ratio`` (the largest of the three
    bins nearest it, tested by :func:`_line_test`) in every channel."""
    length = spec.shape[-1]
    centre = int(round(ratio * length))
    cand = [(centre + d) % length for d in (-1, 0, 1)]
    if real:
        cand = [b for b in cand if 0 < b < length // 2] or [centre % length]
    for ch in range(spec.shape[0]):
        k = max(cand, key=lambda b: spec[ch][b])
        _line_test(spec[ch], k, real, len(cand), nseg, fs, ch, func,
                   what=f"the fundamental {ratio * fs:.6g} Hz offset")
    return True


def _finish_harmonics(gram: np.ndarray, nh: int, real: bool, full_scale: float,
                      func: str, present: bool = True) -> dict:
    coef, dc, resid = _solve_fixed(gram, nh, real, func)
    amp = np.abs(coef) / full_scale  # units of full scale
    if np.any(amp[:, 0] <= 0):
        raise MeasurementError(f"{func}: the fundamental has zero amplitude")
    thd = np.sqrt(np.sum(amp[:, 1:] ** 2, axis=1)) / amp[:, 0]
    with np.errstate(divide="ignore"):  # an absent harmonic is -inf dB, not NaN
        return {"amplitude": amp, "phase0": np.angle(coef), "thd": thd,
                "power_dbfs": 10 * np.log10(amp ** 2 / (2 if real else 1)),
                "level_dbc": 20 * np.log10(amp / amp[:, :1]), "thd_db": 20 * np.log10(thd)}


def harmonics(cap: xr.DataArray, fundamental_hz: float, n: int = 10) -> xr.Dataset:
    """Amplitude and phase of the first ``n`` harmonics of a known fundamental.

    Harmonic ``h`` of a real capture is modelled as ``A_h cos(2 pi h f0 t + phi_h)`` with
    ``f0 = fundamental_hz - center_frequency``; of a complex capture as
    ``A_h exp(j(2 pi h f0 t + phi_h))`` (harmonics of the baseband offset). All harmonics and
    a dc term are fitted jointly by least squares (one chunked pass), so leakage between them
    does not bias the result even without coherent sampling.

    Aliasing: a harmonic above the Nyquist frequency is measured where sampling folds it,
    ``h f0 - k fs`` in ``[-fs/2, fs/2)`` (reported as ``frequency_hz``/``offset_hz``); its
    phase is that of the sampled sequence ``A_h cos(2 pi h f0 n / fs + phi_h)``, which is
    what the samples determine. What lands on a folded frequency is the sum of everything
    aliased there, so for a sampled periodic waveform the result equals its DFT-series
    coefficient (a +-1 square wave of M samples per period gives exactly
    ``4 / (M sin(pi h / M))`` for odd h). Harmonics that fold onto the same frequency, onto
    DC, or (real captures) onto the Nyquist frequency cannot be separated: a
    :class:`MeasurementError` names them; ask for fewer harmonics.

    Parameters
    ----------
    cap : xarray.DataArray
        Capture, real or complex, one channel or many, in memory or lazy.
    fundamental_hz : float
        Absolute frequency of the fundamental (estimate it first with
        :func:`measure_tone` if it is not known exactly).
    n : int
        Number of harmonics, the fundamental being harmonic 1.

    Returns
    -------
    xarray.Dataset
        Along dim ``harmonic`` (coordinate 1..n; and ``channel`` if the capture has one):
        ``amplitude`` (FS), ``power_dbfs``, ``level_dbc`` (relative to harmonic 1),
        ``phase_rad``/``phase_deg`` (at the first sample), ``frequency_hz``/``offset_hz``
        (where measured, folded); per channel ``thd_percent`` and ``thd_db``
        (``sqrt(sum_{h>=2} A_h^2) / A_1``).

    Raises
    ------
    MeasurementError
        The fundamental is not there as a tone: in an averaged spectrum the largest of the
        three bins nearest ``fundamental_hz`` must stand above the local floor (the test of
        :func:`measure_tone`, here for 3 bins looked at) and be tone-shaped. Also harmonics
        that fold onto DC, Nyquist or each other, and too few samples.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> m = 20                                     # samples per period of a +-1 square wave
    >>> x = np.where(np.arange(20_000) % m < m // 2, 1.0, -1.0)
    >>> cap = quadkit.capture(x, sample_rate=20e3)  # fundamental at 1 kHz
    >>> h = quadkit.recovery.harmonics(cap, 1e3, n=5)
    >>> np.round(h.amplitude.values, 4)            # 4 / (20 sin(pi h / 20)) for odd h
    array([1.2785, 0.    , 0.4405, 0.    , 0.2828])
    """
    func = "harmonics"
    n = check_positive_int(func, "n", n)
    data, lazy = _data2d(cap)
    meta = _fixed_meta(cap, data, lazy)
    fs, fc, real = meta["fs"], meta["fc"], meta["real"]
    off = _offset_of(func, fundamental_hz, fs, fc, real)
    folded = np.array([_fold(h * off / fs) for h in range(1, n + 1)])
    key = np.abs(folded) if real else folded
    for h in range(n):
        if abs(key[h]) < 1e-12 or (real and abs(key[h] - 0.5) < 1e-12):
            where = "DC" if abs(key[h]) < 1e-12 else "the Nyquist frequency"
            raise MeasurementError(
                f"{func}: harmonic {h + 1} of {off:g} Hz folds onto {where} at "
                f"sample_rate={fs:g}, where it cannot be measured; ask for n <= {h}")
        for g in range(h):
            if abs(key[g] - key[h]) < 1e-12:
                raise MeasurementError(
                    f"{func}: harmonics {g + 1} and {h + 1} of {off:g} Hz fold onto the same "
                    f"frequency {folded[h] * fs:g} Hz at sample_rate={fs:g} and cannot be "
                    f"separated; ask for n <= {h}")
    need = (2 * n + 1) if real else (n + 1)
    if meta["n"] < need:
        raise MeasurementError(f"{func}: the capture has {meta['n']} samples; {n} harmonics "
                               f"need at least {need}")
    ratio = np.full(meta["nchan"], off / fs)
    # the fundamental must be there as a tone: local-floor and shape test at its bin of an
    # averaged spectrum whose segment puts it at least 6 bins from DC / Nyquist (real)
    l1 = _sizes(meta["n"])[0]
    while (real and min(abs(off) / fs, 0.5 - abs(off) / fs) * l1 < 6
           and 2 * l1 <= meta["n"]):
        l1 *= 2
    welch_data = data
    if lazy:
        aligned = max(l1, int(round(max(data.chunks[1]) / l1)) * l1)
        welch_data = data.rechunk({1: aligned})
    spec = _pass(welch_data, lazy, _Welch, l1)
    present = _step(lazy, _check_fundamental, spec, off / fs, real, meta["n"] // l1, fs, func)
    gram = _pass(data, lazy, _FixedFit, ratio, tuple(range(1, n + 1)), real)
    res = _step(lazy, _finish_harmonics, gram, n, real, _capture.full_scale(cap), func,
                present)
    shape = (meta["nchan"], n)
    fields = {key: _field_nd(res, key, meta, shape)
              for key in ("amplitude", "phase0", "power_dbfs", "level_dbc")}
    fields.update({key: _field_nd(res, key, meta, (meta["nchan"],)) for key in ("thd", "thd_db")})
    if not meta["multi"]:
        fields = {key: value[0] for key, value in fields.items()}
    dims = ("channel", "harmonic") if meta["multi"] else ("harmonic",)
    sdims = ("channel",) if meta["multi"] else ()
    ph = fields["phase0"]
    out = {
        "amplitude": quantity(fields["amplitude"], "FS", "harmonic peak amplitude", dims=dims),
        "power_dbfs": quantity(fields["power_dbfs"], "dBFS", "harmonic power", dims=dims),
        "level_dbc": quantity(fields["level_dbc"], "dBc",
                              "harmonic level relative to the fundamental", dims=dims),
        "phase_rad": quantity(ph, "rad", "harmonic phase at the first sample", dims=dims),
        "phase_deg": quantity(np.degrees(ph), "deg", "harmonic phase at the first sample",
                              dims=dims),
        "frequency_hz": quantity(fc + folded * fs, "Hz",
                                 "frequency where the harmonic is measured (folded)",
                                 dims=("harmonic",)),
        "offset_hz": quantity(folded * fs, "Hz", "offset where the harmonic is measured",
                              dims=("harmonic",)),
        "thd_percent": quantity(100 * fields["thd"], "%", "total harmonic distortion",
                                dims=sdims),
        "thd_db": quantity(fields["thd_db"], "dB", "total harmonic distortion", dims=sdims),
    }
    coords = {"harmonic": np.arange(1, n + 1), **_coords(cap, meta)}
    return result(out, coords=coords, attrs={"sample_rate": fs, "center_frequency": fc,
                                             "fundamental_hz": float(fundamental_hz)})


# --------------------------------------------------------------------------------------------
# Streaming: analytic signal, envelope, instantaneous phase and frequency
# --------------------------------------------------------------------------------------------

def _hilbert_taps() -> np.ndarray:
    """Odd-length type III Hilbert transformer: 2 / (pi k) at odd k, Kaiser-windowed."""
    k = np.arange(-_HILBERT_HALF, _HILBERT_HALF + 1)
    h = np.zeros(k.size)
    odd = k % 2 == 1
    h[odd] = 2.0 / (np.pi * k[odd])
    return h * np.kaiser(k.size, _HILBERT_BETA)


def _fir_valid(block: np.ndarray, taps: np.ndarray) -> np.ndarray:
    from scipy.signal import oaconvolve

    return oaconvolve(block, taps[None, :] if block.ndim == 2 else taps, mode="valid", axes=-1)


def _analytic_data(cap: xr.DataArray, method: str | None, func: str) -> tuple[Any, str]:
    if _capture.is_complex(cap):
        raise ValueError(f"{func}: the capture is already complex (an IQ capture is its own "
                         "analytic signal); pass a real capture")
    lazy = _capture.is_lazy(cap)
    if method is None:
        method = "fir" if lazy else "fft"
    check_option(func, "method", method, ("fft", "fir"))
    x = cap.data
    out_dtype = np.complex64 if x.dtype == np.float32 else np.complex128
    if method == "fft":
        if lazy:
            raise ValueError(f"{func}: method='fft' needs the whole capture in memory; use "
                             "method='fir' for a lazy capture (or .compute() it first)")
        from scipy.signal import hilbert

        return hilbert(np.asarray(x, np.float64), axis=-1).astype(out_dtype), method
    taps = _hilbert_taps()
    half = _HILBERT_HALF
    if lazy:
        import dask.array as da

        depth = {x.ndim - 1: half}
        if x.ndim == 2:
            depth[0] = 0
        # overlap needs every chunk at least as long as the depth: merge short ones (only
        # those) into a neighbour; the time axis is never merged into one chunk for this.
        sizes: list[int] = []
        for size in x.chunks[-1]:
            if sizes and (size < half or sizes[-1] < half):
                sizes[-1] += size
            else:
                sizes.append(size)
        if tuple(sizes) != x.chunks[-1]:
            x = x.rechunk({x.ndim - 1: tuple(sizes)})

        def block(b: np.ndarray) -> np.ndarray:
            b = b.astype(np.float64)
            inner = b[..., half:b.shape[-1] - half]
            return (inner + 1j * _fir_valid(b, taps)).astype(out_dtype)

        ext = da.overlap.overlap(x, depth=depth, boundary=0)
        y = ext.map_blocks(block, dtype=out_dtype,
                           chunks=x.chunks)
        return y, method
    xe = np.asarray(x, np.float64)
    pad = [(0, 0)] * (xe.ndim - 1) + [(half, half)]
    y = xe + 1j * _fir_valid(np.pad(xe, pad), taps)
    return y.astype(out_dtype), method


def _sample_units(cap: xr.DataArray) -> str:
    """Units of a streaming output in the capture's sample units: "FS" only when a sample
    unit is one full scale (``full_scale`` = 1); otherwise the values are not in FS."""
    return "FS" if _capture.full_scale(cap) == 1.0 else "sample units"


def _output(cap: xr.DataArray, data: Any, name: str, units: str, long_name: str,
            **attrs: Any) -> xr.DataArray:
    out = _capture.like(cap, data, start_index=_capture.start_index(cap), **attrs)
    out.name = name
    out.attrs.update(units=units, long_name=long_name)
    return out


def analytic(cap: xr.DataArray, *, method: Literal["fft", "fir"] | None = None) -> xr.DataArray:
    """The analytic signal ``x + j H{x}`` of a real capture (a real cosine becomes
    ``A exp(j(2 pi f t + phi))``).

    Parameters
    ----------
    cap : xarray.DataArray
        Real capture, dims ``("time",)`` or ``("channel", "time")``.
    method : {"fft", "fir"}, optional
        ``"fft"``: the whole capture's FFT with the negative frequencies removed, identical to
        :func:`scipy.signal.hilbert` (treats the capture as one period: edges ring unless it
        holds whole cycles). ``"fir"``: a streaming 513-tap Kaiser-windowed (beta 8.6) Hilbert
        transformer applied with zero padding at the ends and overlap across chunk borders,
        so a lazy capture stays lazy and the result does not depend on the chunking; in-band
        error below about 1e-4 of the amplitude for frequencies between 0.01 fs and 0.49 fs.
        Default: ``"fft"`` for a capture in memory, ``"fir"`` for a lazy one.

    Returns
    -------
    xarray.DataArray
        Complex capture (complex64 for float32 input, complex128 for float64), same dims,
        time axis and attrs (``full_scale`` included), plus ``analytic_method``. Values are in
        the capture's sample units, like any streaming output: ``units`` is "FS" when
        ``full_scale`` is 1 and "sample units" otherwise (divide by ``full_scale`` for FS).

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.tone(1e3, sample_rate=16e3, n_samples=160, real=True)
    >>> z = quadkit.recovery.analytic(cap)
    >>> np.round(z.values[:3], 4)                 # cos + j sin at 1/16 cycle per sample
    array([1.    +0.j    , 0.9239+0.3827j, 0.7071+0.7071j], dtype=complex64)
    """
    data, method = _analytic_data(cap, method, "analytic")
    return _output(cap, data, "iq", _sample_units(cap),
                   "analytic signal (in the capture's sample units)", analytic_method=method)


def _complex_data(cap: xr.DataArray, method: str | None, func: str) -> tuple[Any, str | None]:
    if _capture.is_complex(cap):
        return cap.data, None
    return _analytic_data(cap, method, func)


def envelope(cap: xr.DataArray, *, method: Literal["fft", "fir"] | None = None) -> xr.DataArray:
    """Magnitude of the complex envelope (complex capture) or of the analytic signal (real).

    Parameters
    ----------
    cap : xarray.DataArray
        Capture, complex or real, in memory or lazy (streaming, elementwise).
    method : {"fft", "fir"}, optional
        For a real capture, how the analytic signal is formed (see :func:`analytic`).

    Returns
    -------
    xarray.DataArray
        Real (float32 for complex64 input), same dims, time axis and attrs (``full_scale``
        included). A streaming operation, so the values stay in the capture's sample units
        (a tone of magnitude ``full_scale`` has envelope ``full_scale``): ``units`` is "FS"
        when ``full_scale`` is 1 and "sample units" otherwise (divide by ``full_scale`` for
        FS). Measurements on it (:func:`measure_tone`, ...) read it in FS as usual.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000, amplitude=0.25)
    >>> float(quadkit.recovery.envelope(cap).max().round(6))
    0.25
    """
    z, method = _complex_data(cap, method, "envelope")
    extra = {"analytic_method": method} if method else {}
    return _output(cap, abs(z), "envelope", _sample_units(cap),
                   "envelope magnitude (in the capture's sample units)", **extra)


def instantaneous_phase(cap: xr.DataArray, *, unwrap: bool = True,
                        method: Literal["fft", "fir"] | None = None) -> xr.DataArray:
    """Phase of the complex envelope (complex capture) or analytic signal (real), radians.

    Parameters
    ----------
    cap : xarray.DataArray
        Capture, complex or real, in memory or lazy.
    unwrap : bool
        ``True`` (default): remove the 2 pi jumps as :func:`numpy.unwrap` does, across chunk
        borders too (the corrections are integers summed by a cumulative sum, so the result is
        exactly ``angle + 2 pi k``); ``False``: the wrapped angle in (-pi, pi].
    method : {"fft", "fir"}, optional
        For a real capture, how the analytic signal is formed (see :func:`analytic`).

    Returns
    -------
    xarray.DataArray
        float64 (unwrapped; float32 wrapped for single-precision input), units rad. A complex
        capture gives the baseband phase (the carrier's ``2 pi f_c t`` is not included).

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.tone(250e3, sample_rate=1e6, n_samples=9, phase_rad=0.5)
    >>> np.round(quadkit.recovery.instantaneous_phase(cap).values[[0, 4, 8]], 3)
    array([ 0.5  ,  6.783, 13.066])
    """
    z, method = _complex_data(cap, method, "instantaneous_phase")
    lazy = _capture.is_lazy(cap)
    if lazy:
        import dask.array as da

        ph = da.angle(z.astype(np.complex128) if unwrap else z)
    else:
        ph = np.angle(z.astype(np.complex128) if unwrap else z)
    if unwrap and ph.shape[-1] > 1:
        if lazy:
            prev = da.concatenate([ph[..., :1], ph[..., :-1]], axis=-1).rechunk(ph.chunks)
            k = da.map_blocks(_jumps, ph, prev, dtype=np.int64)
            ph = ph + 2 * np.pi * da.cumsum(k, axis=-1)
        else:
            prev = np.concatenate([ph[..., :1], ph[..., :-1]], axis=-1)
            ph = ph + 2 * np.pi * np.cumsum(_jumps(ph, prev), axis=-1)
    extra = {"analytic_method": method} if method else {}
    return _output(cap, ph, "phase", "rad", "instantaneous phase", **extra)


def _jumps(p: np.ndarray, prev: np.ndarray) -> np.ndarray:
    """Elementwise integer corrections from each sample and the one before it."""
    dd = p - prev
    ddmod = np.mod(dd + np.pi, 2 * np.pi) - np.pi
    ddmod[(ddmod == -np.pi) & (dd > 0)] = np.pi
    corr = ddmod - dd
    corr[np.abs(dd) < np.pi] = 0
    return np.rint(corr / (2 * np.pi)).astype(np.int64)


def instantaneous_frequency(cap: xr.DataArray, *,
                            method: Literal["fft", "fir"] | None = None) -> xr.DataArray:
    """Instantaneous frequency, absolute (``center_frequency`` + offset), in Hz.

    Sample n holds ``angle(z[n] conj(z[n-1])) fs / (2 pi)``, the mean frequency over the
    interval from sample n-1 to n (exact for a tone anywhere in (-fs/2, fs/2)); sample 0
    repeats sample 1's value so that the time axis is the capture's.

    Parameters
    ----------
    cap : xarray.DataArray
        Capture, complex or real (via its analytic signal), at least 2 samples, in memory or
        lazy (streaming).
    method : {"fft", "fir"}, optional
        For a real capture, how the analytic signal is formed (see :func:`analytic`).

    Returns
    -------
    xarray.DataArray
        float64, units Hz, same dims and time axis.

    Examples
    --------
    >>> import quadkit
    >>> cap = quadkit.synth.tone(-123e3, sample_rate=1e6, n_samples=100,
    ...                          center_frequency=433.92e6)
    >>> f = quadkit.recovery.instantaneous_frequency(cap)
    >>> round(float(f[50]) - 433.92e6, 1)
    -123000.0
    """
    func = "instantaneous_frequency"
    if cap.sizes.get("time", 0) < 2:
        raise MeasurementError(f"{func}: the capture has {cap.sizes.get('time', 0)} samples; "
                               "at least 2 are needed")
    z, method = _complex_data(cap, method, func)
    fs = _capture.sample_rate(cap)
    fc = float(cap.attrs.get("center_frequency", 0.0))
    z = z.astype(np.complex128)
    if _capture.is_lazy(cap):
        import dask.array as da

        d = z[..., 1:] * da.conj(z[..., :-1])
        d = da.concatenate([d[..., :1], d], axis=-1).rechunk(z.chunks)
        f = fc + da.angle(d) * (fs / (2 * np.pi))
    else:
        d = z[..., 1:] * np.conj(z[..., :-1])
        d = np.concatenate([d[..., :1], d], axis=-1)
        f = fc + np.angle(d) * (fs / (2 * np.pi))
    extra = {"analytic_method": method} if method else {}
    return _output(cap, f, "frequency", "Hz", "instantaneous frequency (absolute)", **extra)
