"""Front-end impairments of quadrature receivers: make them, measure them, remove them.

The IQ imbalance model (DESIGN.md), with I the reference branch::

    I_m = I + dc_i
    Q_m = g * (Q cos(phi) - I sin(phi)) + dc_q

with gain imbalance ``20 log10(g)`` dB, phase skew ``phi`` in degrees and the DC offsets in
units of full scale. In widely-linear form (before DC) ``z_m = mu z + nu conj(z)`` with
``mu = (1 + g exp(-j phi)) / 2`` and ``nu = (1 - g exp(j phi)) / 2``, and the image rejection
ratio is ``|mu|^2 / |nu|^2 = (1 + 2 g cos(phi) + g^2) / (1 - 2 g cos(phi) + g^2)``.

Functions
---------
apply
    Add the impairments of a real radio to a clean capture (demos and tests).
estimate
    DC offsets, gain imbalance, phase skew and image rejection, with uncertainties;
    blind (second-order statistics of a circular signal) or from the image of a test tone.
correct
    Remove DC and imbalance given an estimate (or a frequency-dependent compensator).
image_rejection
    The textbook image rejection ratio of a gain and phase imbalance.
image_rejection_vs_frequency
    Image rejection across the band from a multitone or a chirp, and a short widely-linear
    FIR that corrects frequency-dependent imbalance.
frequency_offset
    Carrier frequency offset of a tone or of M-PSK/QAM traffic (M-th power line).
phase_noise
    Single-sideband phase noise L(f), rms phase and jitter over a band.
sample_rate_offset
    Sample-clock error in ppm from one tone (or two tones) of known frequency.

Warning: a waveform made with :func:`apply` and sent to a transmitter must respect your
local radio regulations and licensed practice; use a cabled set-up with attenuators and
check the receiver's input power limits first.
"""

from __future__ import annotations

import functools
import math
import numbers
from collections.abc import Callable, Mapping
from typing import Any, Literal

import numpy as np
import xarray as xr

from . import _capture
from ._checks import check_finite, check_option, check_positive, check_positive_int
from ._errors import MeasurementError
from ._nco import oscillator, phase_cycles
from ._results import quantity, result

__all__ = [
    "apply",
    "estimate",
    "correct",
    "image_rejection",
    "image_rejection_vs_frequency",
    "frequency_offset",
    "phase_noise",
    "sample_rate_offset",
]
_ACCESSOR = (
    "apply",
    "estimate",
    "correct",
    "image_rejection_vs_frequency",
    "frequency_offset",
    "phase_noise",
    "sample_rate_offset",
)

# Half-width (input samples) and Kaiser beta of the windowed-sinc interpolator of the clock
# offset: 32 taps keep the interpolation error below about -80 dBc for |f| < 0.4 fs.
_SINC_HALF = 16
_SINC_BETA = 8.6
# White-noise source of the phase-noise synthesiser: one seeded block per 2**16 absolute
# sample indices, so draws do not depend on chunking.
_NOISE_BLOCK = 1 << 16
_INDEX_BIAS = 1 << 40
# Segment used for tone detection and coarse frequencies.
_SEARCH_LEN = 4096


# ---------------------------------------------------------------------------------------------
# small helpers
# ---------------------------------------------------------------------------------------------

def _as2d(data: Any) -> Any:
    return data[None, :] if data.ndim == 1 else data


def _channel_coords(cap: xr.DataArray) -> dict[str, Any]:
    if "channel" in cap.dims:
        return {"channel": cap.coords["channel"].values}
    return {}


def _per_channel(cap: xr.DataArray, values: Any, units: str, long_name: str) -> xr.DataArray:
    """A result variable from a per-channel vector (scalar when the capture has no channel)."""
    values = np.asarray(values, dtype=float)
    if "channel" in cap.dims:
        return quantity(values, units, long_name, dims=("channel",))
    return quantity(values[0], units, long_name)


def _rng(rng: Any) -> np.random.Generator:
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def _db10(x: Any) -> Any:
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(x)


def _check_complex(func: str, cap: xr.DataArray) -> None:
    if not isinstance(cap, xr.DataArray):
        raise ValueError(f"{func}: expected a capture (xarray.DataArray), got {type(cap).__name__}")
    if not _capture.is_complex(cap):
        raise MeasurementError(
            f"{func}: the capture is real-valued; IQ impairments need complex baseband samples "
            "(bring it to baseband with quadkit.mixing.downconvert first)"
        )


def _jackknife(stat: Callable[[np.ndarray], np.ndarray], block_sums: np.ndarray) -> tuple:
    """Estimate and block-jackknife standard error of ``stat`` of summed block statistics.

    ``block_sums`` has shape (..., n_blocks, n_sums); ``stat`` maps (..., n_sums) to
    (..., n_out). Leave-one-block-out jackknife (Quenouille/Tukey; Kuensch 1989 for dependent
    data): with blocks much longer than the signal's correlation time it is consistent for
    band-limited traffic as well as white noise.
    """
    total = block_sums.sum(axis=-2)
    est = stat(total)
    n_blocks = block_sums.shape[-2]
    loo = stat(total[..., None, :] - block_sums)
    mean = loo.mean(axis=-2, keepdims=True)
    se = np.sqrt((n_blocks - 1) / n_blocks * ((loo - mean) ** 2).sum(axis=-2))
    return est, se


def _blockwise(data2d: Any, func: Callable[..., np.ndarray], out_len: int,
               *args: Any) -> np.ndarray:
    """Sum ``func(x_chunk, first_position, *args)`` (shape (channel, out_len)) over time chunks.

    Works on numpy (one call) and on dask (one call per chunk, summed; nothing is loaded
    beyond a chunk). ``first_position`` is the chunk's first sample position in the capture,
    so ``func`` can assign samples to blocks fixed by position, independent of chunking.
    """
    if not _capture._is_dask(data2d):
        return func(np.asarray(data2d), 0, *args)
    import dask.array as da

    # channels are few: one chunk along them, so per-channel arguments line up (time keeps
    # its chunks)
    data2d = data2d.rechunk({0: -1})

    nt = len(data2d.chunks[-1])
    parts = da.map_blocks(
        functools.partial(_blockwise_chunk, func=func, args=args), data2d, dtype=np.complex128,
        chunks=(data2d.chunks[0], (1,) * nt, (out_len,)), new_axis=[2],
    )
    return np.asarray(parts.sum(axis=1).compute())


def _blockwise_chunk(x, *, func, args, block_info=None):
    pos0 = block_info[0]["array-location"][-1][0]
    return func(x, pos0, *args).astype(np.complex128)[:, None, :]


def _head(data2d: Any, count: int) -> np.ndarray:
    """The first ``count`` samples of every channel as complex128 numpy (reads only those)."""
    head = data2d[:, :count]
    if _capture._is_dask(head):
        head = head.compute()
    return np.asarray(head, dtype=np.complex128)


# ---------------------------------------------------------------------------------------------
# image rejection formula
# ---------------------------------------------------------------------------------------------

def image_rejection(gain_imbalance_db: Any, phase_skew_deg: Any) -> Any:
    """Image rejection ratio (dB) of a gain and phase imbalance.

    ``IRR = (1 + 2 g cos(phi) + g^2) / (1 - 2 g cos(phi) + g^2)`` with
    ``g = 10**(gain_imbalance_db / 20)`` (Razavi, *RF Microelectronics*; it equals the
    widely-linear ``|mu|^2 / |nu|^2`` of the model in the module docstring). A perfectly
    balanced pair gives ``inf``.

    Parameters
    ----------
    gain_imbalance_db, phase_skew_deg : float or array_like
        Broadcast against each other.

    Returns
    -------
    float or numpy.ndarray
        Image rejection ratio in dB.

    Examples
    --------
    >>> from quadkit import impairments
    >>> round(impairments.image_rejection(1.0, 1.0), 3)
    24.708
    """
    g = 10.0 ** (np.asarray(gain_imbalance_db, dtype=float) / 20.0)
    c = np.cos(np.deg2rad(np.asarray(phase_skew_deg, dtype=float)))
    num = 1.0 + 2.0 * g * c + g * g
    # 1 - 2 g cos + g^2 = (1 - g)^2 + 4 g sin^2(phi/2): the cancellation-free form.
    s = np.sin(np.deg2rad(np.asarray(phase_skew_deg, dtype=float)) / 2.0)
    den = (1.0 - g) ** 2 + 4.0 * g * s * s
    with np.errstate(divide="ignore"):
        out = 10.0 * np.log10(num / den)
    return float(out) if np.ndim(out) == 0 else out


# ---------------------------------------------------------------------------------------------
# apply
# ---------------------------------------------------------------------------------------------

def _profile_function(func: str, phase_noise: Any) -> Callable[[np.ndarray], np.ndarray] | None:
    """L(f) in dBc/Hz as a function of offset (Hz) from the accepted profile forms."""
    if phase_noise is None:
        return None
    if callable(phase_noise):
        return lambda f: np.asarray(phase_noise(f), dtype=float) * np.ones_like(f)
    if isinstance(phase_noise, numbers.Real) and not isinstance(phase_noise, bool):
        level = check_finite(func, "phase_noise", phase_noise)
        return lambda f: np.full_like(f, level, dtype=float)
    if isinstance(phase_noise, Mapping):
        if set(phase_noise) == {"offsets_hz", "dbc_hz"}:
            offsets, levels = phase_noise["offsets_hz"], phase_noise["dbc_hz"]
        else:
            offsets, levels = list(phase_noise.keys()), list(phase_noise.values())
    else:
        try:
            offsets, levels = phase_noise
        except (TypeError, ValueError):
            raise ValueError(
                f"{func}: phase_noise={phase_noise!r} must be None, a level in dBc/Hz, a "
                "mapping {offset_hz: dBc/Hz}, {'offsets_hz': [...], 'dbc_hz': [...]}, a pair "
                "(offsets_hz, dbc_hz) or a callable of the offset in Hz"
            ) from None
    offsets = np.asarray(offsets, dtype=float).ravel()
    levels = np.asarray(levels, dtype=float).ravel()
    if offsets.size == 0 or offsets.shape != levels.shape or np.any(offsets <= 0) \
            or not np.all(np.isfinite(levels)):
        raise ValueError(
            f"{func}: phase_noise profile needs matching, positive offsets and finite levels; "
            f"got offsets {offsets.tolist()} and levels {levels.tolist()}"
        )
    order = np.argsort(offsets)
    logf, lv = np.log10(offsets[order]), levels[order]

    def profile(f: np.ndarray) -> np.ndarray:
        # Linear in dB against log10(offset); held flat below the first and above the last.
        with np.errstate(divide="ignore"):
            lf = np.log10(np.maximum(np.abs(f), 1e-300))
        return np.interp(lf, logf, lv)

    profile.lowest_offset_hz = float(offsets.min())  # type: ignore[attr-defined]
    return profile


def _pn_taps(profile: Callable, fs: float, lowest_hz: float | None) -> np.ndarray:
    """Zero-phase FIR whose power response is ``fs * L(|f|)`` (frequency sampling).

    Unit-variance white noise through it has the two-sided phase PSD L(|f|) rad^2/Hz, which is
    S_phi(f)/2 of IEEE Std 1139 with S_phi one-sided. The length resolves the profile down to
    about a sixteenth of its lowest offset (at most 2**17 + 1 taps).
    """
    lowest = lowest_hz if lowest_hz else fs / 1024.0
    n = int(min(2**17, max(1024, 2 ** math.ceil(math.log2(16.0 * fs / lowest))))) + 1
    f = np.fft.rfftfreq(n, 1.0 / fs)
    f[0] = f[1]  # hold the first bin's level at 0 Hz
    amp = np.sqrt(fs * 10.0 ** (profile(f) / 10.0))
    h = np.fft.irfft(amp, n)
    return np.roll(h, n // 2)


def _white_range(seed: int, stream: int, a: int, b: int) -> np.ndarray:
    """Unit-variance real Gaussian white noise at absolute indices a .. b-1 (any chunking)."""
    out = np.empty(b - a)
    k0, k1 = a // _NOISE_BLOCK, (b - 1) // _NOISE_BLOCK
    for k in range(k0, k1 + 1):
        g = np.random.default_rng([seed, stream, k + _INDEX_BIAS])
        blk = g.standard_normal(_NOISE_BLOCK)
        lo, hi = max(a, k * _NOISE_BLOCK), min(b, (k + 1) * _NOISE_BLOCK)
        out[lo - a:hi - a] = blk[lo - k * _NOISE_BLOCK:hi - k * _NOISE_BLOCK]
    return out


def _coloured_phase(seed: int, taps: np.ndarray, a: int, count: int) -> np.ndarray:
    """Profile-shaped phase noise (rad) at absolute indices a .. a+count-1."""
    from scipy.signal import oaconvolve

    n = taps.size
    half = n // 2
    w = _white_range(seed, 1, a - half, a + count + half)
    return oaconvolve(w, taps, mode="valid")


def _wiener_steps(seed: int, sigma: float, a: int, count: int) -> np.ndarray:
    return sigma * _white_range(seed, 2, a, a + count)


def _phase_noise_array(n: int, start: int, seed: int, taps, wiener_sigma, chunks):
    """Phase noise (rad) for positions 0..n-1 (absolute start + position), numpy or dask."""
    if taps is None and wiener_sigma is None:
        return None
    if chunks is None:
        pn = np.zeros(n)
        if taps is not None:
            pn += _coloured_phase(seed, taps, start, n)
        if wiener_sigma is not None:
            pn += np.cumsum(_wiener_steps(seed, wiener_sigma, start, n))
        return pn
    import dask.array as da

    pn = da.zeros(n, chunks=(chunks,))
    if taps is not None:
        pn = pn + da.map_blocks(
            functools.partial(_coloured_block, seed=seed, taps=taps, start=start),
            chunks=(chunks,), dtype=float)
    if wiener_sigma is not None:
        pn = pn + da.cumsum(da.map_blocks(
            functools.partial(_steps_block, seed=seed, sigma=wiener_sigma, start=start),
            chunks=(chunks,), dtype=float))
    return pn


def _coloured_block(*, seed, taps, start, block_info=None):
    lo, hi = block_info[None]["array-location"][0]
    return _coloured_phase(seed, taps, start + lo, hi - lo)


def _steps_block(*, seed, sigma, start, block_info=None):
    lo, hi = block_info[None]["array-location"][0]
    return _wiener_steps(seed, sigma, start + lo, hi - lo)


_SINC_PHASES = 1024


def _sinc_table() -> np.ndarray:
    """Kaiser-windowed sinc taps for fractional delays p / _SINC_PHASES, p = 0 .. _SINC_PHASES."""
    frac = np.arange(_SINC_PHASES + 1) / _SINC_PHASES
    k = np.arange(-_SINC_HALF + 1, _SINC_HALF + 1)
    tau = frac[:, None] - k[None, :]
    win = np.i0(_SINC_BETA * np.sqrt(np.clip(1.0 - (tau / _SINC_HALF) ** 2, 0.0, None)))
    return np.sinc(tau) * win / np.i0(_SINC_BETA)


def _sinc_interp(x: np.ndarray, x_lo: int, t: np.ndarray) -> np.ndarray:
    """Kaiser-windowed sinc interpolation of x (positions x_lo ..) at fractional positions t.

    Taps come from a table of 1024 fractional delays, linearly interpolated between
    neighbouring delays (the error is second order in 1/1024, below -100 dBc).
    """
    table = _sinc_table()
    m = np.floor(t).astype(np.int64)
    pos = (t - m) * _SINC_PHASES
    p0 = np.minimum(pos.astype(np.int64), _SINC_PHASES - 1)
    a = (pos - p0)[:, None]
    h = table[p0] * (1.0 - a) + table[p0 + 1] * a
    k = np.arange(-_SINC_HALF + 1, _SINC_HALF + 1)
    idx = (m[:, None] + k[None, :]) - x_lo
    out = np.empty((x.shape[0], t.size), dtype=np.complex128)
    for c in range(x.shape[0]):
        out[c] = np.einsum("ij,ij->i", x[c][idx], h)
    return out


def _apply_piece(x_in, pn, *, p):
    """Impair output positions p['lo'] .. p['hi']-1 from the needed slice of input samples."""
    lo, hi, ext = p["lo"], p["hi"], p["ext"]
    x_in = np.asarray(x_in, dtype=np.complex128)
    pos = np.arange(ext, hi)
    if p["eps"] != 0.0:
        t = pos / (1.0 + p["eps"])
        # Zero-pad so that every interpolation tap finds a sample (zeros outside the capture).
        need_lo = int(np.floor(t[0])) - _SINC_HALF + 1 if t.size else p["in_lo"]
        need_hi = int(np.floor(t[-1])) + _SINC_HALF + 1 if t.size else p["in_lo"]
        pad_lo = max(p["in_lo"] - need_lo, 0)
        pad_hi = max(need_hi - (p["in_lo"] + x_in.shape[1]), 0)
        padded = np.pad(x_in, ((0, 0), (pad_lo, pad_hi)))
        y = _sinc_interp(padded, p["in_lo"] - pad_lo, t)
    else:
        y = x_in[:, pos - p["in_lo"]] if x_in.shape[1] else np.zeros((x_in.shape[0], 0))
    if p["ratio"] != 0.0 or pn is not None:
        cyc = phase_cycles(p["ratio"], p["start"] + ext, hi - ext) if p["ratio"] != 0.0 \
            else np.zeros(hi - ext)
        ph = 2.0 * np.pi * cyc
        if pn is not None:
            ph = ph + np.asarray(pn, dtype=float)
        y = y * np.exp(1j * ph)[None, :]
    i, q = y.real, y.imag
    if p["filters"] is not None:
        hi_taps, hq_taps = p["filters"]
        m = i.shape[1]
        i = np.stack([np.convolve(row, hi_taps)[:m] for row in i])  # causal, zero state
        q = np.stack([np.convolve(row, hq_taps)[:m] for row in q])
    keep = slice(lo - ext, hi - ext)
    i, q = i[:, keep], q[:, keep]
    fs_ = p["full_scale"]
    g, phi = p["g"], p["phi"]
    i_m = i + p["dc_i"] * fs_
    q_m = g * (q * math.cos(phi) - i * math.sin(phi)) + p["dc_q"] * fs_
    if p["clip"] is not None:
        lim = p["clip"] * fs_
        i_m = np.clip(i_m, -lim, lim)
        q_m = np.clip(q_m, -lim, lim)
    if p["bits"] is not None:
        half = 2 ** (p["bits"] - 1)
        step = fs_ / half
        i_m = np.clip(np.round(i_m / step), -half, half - 1) * step
        q_m = np.clip(np.round(q_m / step), -half, half - 1) * step
    return (i_m + 1j * q_m).astype(p["dtype"])


def apply(
    cap: xr.DataArray,
    *,
    gain_imbalance_db: float = 0.0,
    phase_skew_deg: float = 0.0,
    dc_i: float = 0.0,
    dc_q: float = 0.0,
    frequency_offset_hz: float = 0.0,
    phase_noise: Any = None,
    phase_noise_linewidth_hz: float | None = None,
    sample_rate_offset_ppm: float = 0.0,
    quantize_bits: int | None = None,
    clip_level: float | None = None,
    branch_filters: tuple[Any, Any] | None = None,
    rng: Any = None,
) -> xr.DataArray:
    """Add the impairments of a quadrature receiver to a clean complex capture.

    The stages run in this order, as in a receiver:

    1. **Clock and oscillator.** The sample clock runs ``sample_rate_offset_ppm`` fast, so
       output sample n is the input at position ``n / (1 + eps)`` (Kaiser-windowed sinc
       interpolation, 32 taps; input outside the capture counts as zero), and a tone at f
       appears at ``f / (1 + eps)``. The local oscillator is off by ``frequency_offset_hz``
       and carries phase noise; both act at the true sampling instants, so the rotation is
       ``exp(j (2 pi f_o n / (fs (1 + eps)) + theta[n]))`` with the NCO phase taken from
       the absolute sample index.
    2. **Branch filters** ``(h_i, h_q)``: real causal FIRs in the I and Q paths
       (frequency-dependent imbalance), zero initial state at the capture start.
    3. **Imbalance and DC** per DESIGN.md: ``I_m = I + dc_i``,
       ``Q_m = g (Q cos(phi) - I sin(phi)) + dc_q``, g = 10**(gain_imbalance_db / 20).
    4. **Clipping** of I and Q each at ``clip_level`` of full scale.
    5. **Quantisation** of I and Q each to ``quantize_bits`` bits: step
       ``full_scale / 2**(bits - 1)``, codes ``-2**(bits-1) .. 2**(bits-1) - 1`` (mid-tread).

    All channels share one oscillator and one clock (the same phase noise).

    Parameters
    ----------
    cap : capture
        Complex samples, numpy or dask. A lazy capture gives a lazy result with the same
        chunks; the result does not depend on the chunking.
    gain_imbalance_db, phase_skew_deg : float
        Imbalance of the Q branch against the I branch.
    dc_i, dc_q : float
        DC offsets in units of full scale (the ``full_scale`` attr).
    frequency_offset_hz : float
        Local-oscillator error in Hz.
    phase_noise : None, float, mapping, pair or callable
        Single-sideband phase-noise profile L(f) in dBc/Hz (IEEE Std 1139, L = S_phi / 2):
        a constant (white phase noise), ``{offset_hz: dBc/Hz, ...}``,
        ``{"offsets_hz": [...], "dbc_hz": [...]}``, a pair ``(offsets_hz, dbc_hz)`` or a
        callable of the offset in Hz. Tables are interpolated linearly in dB against log
        offset and held flat outside their range. Synthesised by filtering white Gaussian
        noise with a frequency-sampled FIR that resolves about a sixteenth of the lowest
        table offset.
    phase_noise_linewidth_hz : float, optional
        Add Wiener (random-walk) phase noise of this 3 dB linewidth: increments of variance
        ``2 pi linewidth / fs``, Lorentzian spectrum.
    sample_rate_offset_ppm : float
        Sample-clock error in parts per million.
    quantize_bits : int, optional
        Quantise I and Q each with an ideal ``quantize_bits``-bit mid-tread converter over
        +-full_scale: round to the step ``full_scale / 2**(bits - 1)`` and saturate at codes
        ``-2**(bits-1) .. 2**(bits-1) - 1`` (so +full_scale itself reads one step lower).
        Runs after clipping. At least 2 bits.
    clip_level : float, optional
        Clip level as a fraction of full scale. I and Q are clipped separately, each to
        ``+-clip_level * full_scale`` (a square limiter, as two converters saturate; the
        magnitude of a sample can reach ``sqrt(2) * clip_level * full_scale``).
    branch_filters : (array_like, array_like), optional
        Real FIR taps of the I and the Q branch.
    rng : int or numpy.random.Generator, optional
        Seed of the phase-noise draws; draws are reproducible and independent of chunking.

    Returns
    -------
    capture
        Same dims, dtype and attrs.

    Raises
    ------
    ValueError
        For a real-valued capture (the impairments act on the I and Q rails; there is no
        real-capture subset) and for invalid arguments.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> from quadkit import impairments
    >>> cap = quadkit.synth.tone(0.0, sample_rate=1e6, n_samples=4)  # I = 1, Q = 0
    >>> out = impairments.apply(cap, gain_imbalance_db=20 * np.log10(2), phase_skew_deg=30,
    ...                         dc_i=0.5)
    >>> np.round(out.values[0], 4)  # I = 1 + 0.5; Q = 2 (0 cos 30 - 1 sin 30) = -1
    np.complex64(1.5-1j)
    """
    func = "apply"
    if not isinstance(cap, xr.DataArray):
        raise ValueError(f"{func}: expected a capture (xarray.DataArray), got {type(cap).__name__}")
    if not _capture.is_complex(cap):
        # An argument error, not a failed measurement: the model acts on the I and Q rails.
        raise ValueError(
            f"{func}: cap must be a complex (IQ) capture, got real samples; bring it to "
            "baseband with quadkit.mixing.downconvert first")
    fs = _capture.sample_rate(cap)
    g_db = check_finite(func, "gain_imbalance_db", gain_imbalance_db)
    phi_deg = check_finite(func, "phase_skew_deg", phase_skew_deg)
    dc_i = check_finite(func, "dc_i", dc_i)
    dc_q = check_finite(func, "dc_q", dc_q)
    f_o = check_finite(func, "frequency_offset_hz", frequency_offset_hz)
    ppm = check_finite(func, "sample_rate_offset_ppm", sample_rate_offset_ppm)
    eps = ppm * 1e-6
    if not abs(eps) < 0.5:
        raise ValueError(f"{func}: sample_rate_offset_ppm={ppm} must be well below 5e5")
    if quantize_bits is not None:
        quantize_bits = check_positive_int(func, "quantize_bits", quantize_bits, minimum=2)
    if clip_level is not None:
        clip_level = check_positive(func, "clip_level", clip_level)
    filters = None
    if branch_filters is not None:
        try:
            h_i, h_q = branch_filters
        except (TypeError, ValueError):
            raise ValueError(
                f"{func}: branch_filters must be a pair (h_i, h_q) of FIR taps") from None
        h_i = np.atleast_1d(np.asarray(h_i, dtype=float))
        h_q = np.atleast_1d(np.asarray(h_q, dtype=float))
        finite = np.all(np.isfinite(h_i)) and np.all(np.isfinite(h_q))
        if h_i.ndim != 1 or h_q.ndim != 1 or not finite:
            raise ValueError(f"{func}: branch_filters must be two 1-D arrays of finite real taps")
        filters = (h_i, h_q)
    profile = _profile_function(func, phase_noise)
    lw = None
    if phase_noise_linewidth_hz is not None:
        lw = check_positive(func, "phase_noise_linewidth_hz", phase_noise_linewidth_hz)
    seed = int(_rng(rng).integers(0, 2**63)) if (profile is not None or lw is not None) else 0
    taps = None
    if profile is not None:
        taps = _pn_taps(profile, fs, getattr(profile, "lowest_offset_hz", None))
    wiener_sigma = math.sqrt(2.0 * math.pi * lw / fs) if lw is not None else None

    data = cap.data
    lazy = _capture.is_lazy(cap)
    one_d = data.ndim == 1
    x = _as2d(data)
    n = x.shape[-1]
    start = _capture.start_index(cap)
    time_chunks = x.chunks[-1] if lazy else None
    pn = _phase_noise_array(n, start, seed, taps, wiener_sigma, time_chunks)
    flen = max(filters[0].size, filters[1].size) if filters is not None else 1
    base = dict(
        n=n, eps=eps, ratio=f_o / (fs * (1.0 + eps)), start=start, filters=filters,
        full_scale=_capture.full_scale(cap), g=10.0 ** (g_db / 20.0), phi=math.radians(phi_deg),
        dc_i=dc_i, dc_q=dc_q, clip=clip_level, bits=quantize_bits, dtype=cap.dtype,
    )

    def plan(lo: int, hi: int) -> dict[str, Any]:
        ext = max(0, lo - (flen - 1))
        if eps != 0.0:
            in_lo = max(0, int(np.floor(ext / (1.0 + eps))) - _SINC_HALF + 1)
            in_hi = min(n, int(np.floor((hi - 1) / (1.0 + eps))) + _SINC_HALF + 1)
            in_hi = max(in_hi, in_lo)
        else:
            in_lo, in_hi = ext, hi
        return dict(base, lo=lo, hi=hi, ext=ext, in_lo=in_lo, in_hi=in_hi)

    if not lazy:
        p = plan(0, n)
        out = _apply_piece(np.asarray(x)[:, p["in_lo"]:p["in_hi"]], pn, p=p)
        out = out[0] if one_d else out
        return _capture.like(cap, out)

    import dask.array as da

    pieces = []
    bounds = np.concatenate([[0], np.cumsum(time_chunks)]).astype(int)
    for lo, hi in zip(bounds[:-1], bounds[1:]):
        p = plan(int(lo), int(hi))
        xin = x[:, p["in_lo"]:p["in_hi"]].rechunk({1: -1})
        out_chunks = (x.chunks[0], (int(hi - lo),))
        if pn is not None:
            pslice = pn[p["ext"]:int(hi)].rechunk(-1)
            piece = da.map_blocks(
                functools.partial(_apply_piece, p=p), xin, pslice,
                dtype=cap.dtype, chunks=out_chunks,
            )
        else:
            piece = da.map_blocks(
                functools.partial(_apply_piece, pn=None, p=p), xin, dtype=cap.dtype,
                chunks=out_chunks,
            )
        pieces.append(piece)
    out = da.concatenate(pieces, axis=1)
    out = out[0] if one_d else out
    return _capture.like(cap, out)


# ---------------------------------------------------------------------------------------------
# block sums: the chunk-by-chunk reductions behind every estimate
# ---------------------------------------------------------------------------------------------

def _block_edges(n: int, block_len: int) -> np.ndarray:
    edges = np.arange(0, n, block_len, dtype=np.int64)
    return np.append(edges, n)


def _moment_sums(x: np.ndarray, pos0: int, edges: np.ndarray) -> np.ndarray:
    """Per block: count, sum I, sum Q, sum I^2, sum Q^2, sum IQ; shape (channel, blocks*6)."""
    nb = edges.size - 1
    out = np.zeros((x.shape[0], nb, 6))
    end = pos0 + x.shape[1]
    b0 = int(np.searchsorted(edges, pos0, side="right")) - 1
    for b in range(max(b0, 0), nb):
        lo, hi = max(edges[b], pos0), min(edges[b + 1], end)
        if lo >= hi:
            break
        seg = x[:, lo - pos0:hi - pos0]
        i = seg.real.astype(np.float64)
        q = seg.imag.astype(np.float64)
        out[:, b, 0] = hi - lo
        out[:, b, 1] = i.sum(axis=1)
        out[:, b, 2] = q.sum(axis=1)
        out[:, b, 3] = np.einsum("ij,ij->i", i, i)
        out[:, b, 4] = np.einsum("ij,ij->i", q, q)
        out[:, b, 5] = np.einsum("ij,ij->i", i, q)
    return out.reshape(x.shape[0], -1)


def _projection_sums(x: np.ndarray, pos0: int, edges: np.ndarray, ratios: np.ndarray) -> np.ndarray:
    """Per block and channel: sum x conj(u_k) for regressors u = [e^{+jwn}..., e^{-jwn}..., 1].

    ``ratios`` has shape (channel, K) in cycles per sample; n is the sample position.
    Output shape (channel, blocks * (2K + 1)).
    """
    nb = edges.size - 1
    n_ch, k = ratios.shape
    out = np.zeros((n_ch, nb, 2 * k + 1), dtype=np.complex128)
    end = pos0 + x.shape[1]
    b0 = int(np.searchsorted(edges, pos0, side="right")) - 1
    for b in range(max(b0, 0), nb):
        lo, hi = max(edges[b], pos0), min(edges[b + 1], end)
        if lo >= hi:
            break
        seg = x[:, lo - pos0:hi - pos0].astype(np.complex128)
        for c in range(n_ch):
            for j in range(k):
                osc = oscillator(ratios[c, j], lo, hi - lo, np.complex128)
                out[c, b, j] = np.dot(seg[c], np.conj(osc))
                out[c, b, k + j] = np.dot(seg[c], osc)
            out[c, b, 2 * k] = seg[c].sum()
    return out.reshape(n_ch, -1)


def _geometric(ratio: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """sum_{n=lo}^{hi-1} exp(j 2 pi ratio n), elementwise (closed form, exact at ratio 0)."""
    ratio = np.asarray(ratio, dtype=float)
    ratio = ratio - np.round(ratio)  # e^{j 2 pi r n} has period 1 in r for integer n
    count = (hi - lo).astype(float)
    small = np.abs(np.sin(np.pi * ratio)) < 1e-15
    with np.errstate(invalid="ignore", divide="ignore"):
        core = np.sin(np.pi * ratio * count) / np.sin(np.pi * ratio)
    core = np.where(small, count, core)
    phase = 2.0 * np.pi * ((ratio * lo) % 1.0) + np.pi * ratio * (count - 1)
    return core * np.exp(1j * phase)


def _block_ls(proj: np.ndarray, edges: np.ndarray, ratios: np.ndarray) -> np.ndarray:
    """Least-squares amplitudes per block, shape (channel, blocks, 2K + 1).

    Regressors per block: u_k = e^{j w_k n}, their mirrors e^{-j w_k n} and 1, solved with
    the block's own Gram matrix (closed-form geometric sums), so tones, images and DC do not
    leak into one another however close the tones are to DC.
    """
    n_ch, k = ratios.shape
    nb = edges.size - 1
    m = 2 * k + 1
    b = proj.reshape(n_ch, nb, m)
    freqs = np.concatenate([ratios, -ratios, np.zeros((n_ch, 1))], axis=1)  # (ch, m)
    lo = edges[:-1][None, :, None, None]
    hi = edges[1:][None, :, None, None]
    # G[a, c] = sum conj(u_a) u_c = sum exp(j 2 pi (f_c - f_a) n)
    diff = freqs[:, None, None, :] - freqs[:, None, :, None]
    gram = _geometric(diff, lo, hi)
    try:
        return np.linalg.solve(gram, b[..., None])[..., 0]
    except np.linalg.LinAlgError:
        raise MeasurementError(
            "impairments: tone, image and DC cannot be separated (a tone sits at DC or at "
            "fs/2, or two tones coincide)"
        ) from None


def _tone_amplitudes(x2, ratios: np.ndarray, n: int, fs_: float):
    """Block LS amplitudes of tones at ``ratios``, after one refinement of the frequencies.

    Pass 1 fits 4096-sample blocks; a tone phasor advancing by 2 pi dr L from block to block
    reveals a ratio error dr, which is removed. Pass 2 fits the final blocks: 64 of them (at
    least 1024 samples each), so the jackknife has enough blocks for a steady uncertainty.
    Returns (ratios, amplitudes (channel, blocks, 2K + 1) in units of full scale, edges).
    """
    k = ratios.shape[1]
    edges = _block_edges(n, _SEARCH_LEN)
    proj = _blockwise(x2, _projection_sums, (edges.size - 1) * (2 * k + 1), edges, ratios)
    tone = (_block_ls(proj, edges, ratios) / fs_)[..., :k]
    if edges.size >= 4:
        lag = np.sum(tone[:, 1:-1] * np.conj(tone[:, :-2]), axis=1)  # full blocks only
        ratios = ratios + np.angle(lag) / (2.0 * np.pi * _SEARCH_LEN)
    final = max(1024, 1 << math.ceil(math.log2(max(n / 64.0, 1.0))))
    edges = _block_edges(n, final)
    proj = _blockwise(x2, _projection_sums, (edges.size - 1) * (2 * k + 1), edges, ratios)
    return ratios, _block_ls(proj, edges, ratios) / fs_, edges


def _search_spectrum(head: np.ndarray) -> np.ndarray:
    """Averaged Hann periodogram (channel, _SEARCH_LEN), fft-shifted, of the head samples."""
    nseg = max(1, head.shape[1] // _SEARCH_LEN)
    if head.shape[1] < _SEARCH_LEN:
        raise MeasurementError(
            f"impairments: {head.shape[1]} samples are too few; at least {_SEARCH_LEN} are "
            "needed to find a tone"
        )
    segs = head[:, :nseg * _SEARCH_LEN].reshape(head.shape[0], nseg, _SEARCH_LEN)
    win = np.hanning(_SEARCH_LEN + 1)[:-1]  # periodic Hann
    spec = np.abs(np.fft.fft(segs * win, axis=-1)) ** 2
    return np.fft.fftshift(spec.mean(axis=1), axes=-1)


def _peak_ratio(spec: np.ndarray, k: int) -> float:
    """Peak position in cycles/sample from the shifted spectrum, Gaussian interpolation."""
    n = spec.shape[-1]
    a, b, c = (np.log(max(spec[(k + d) % n], 1e-300)) for d in (-1, 0, 1))
    den = a - 2 * b + c
    delta = 0.5 * (a - c) / den if den != 0 else 0.0
    return ((k - n // 2) + float(np.clip(delta, -0.5, 0.5))) / n


def _dominant_tone(spec: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per channel: (fraction of the non-DC power held by the strongest line, its ratio)."""
    n = spec.shape[-1]
    mid = n // 2
    fracs, ratios = [], []
    for row in spec:
        r = row.copy()
        r[mid - 3:mid + 4] = 0.0  # DC (carrier leakage) is not a test tone
        k = int(np.argmax(r))
        near = r[max(k - 3, 0):k + 4].sum()
        total = r.sum()
        fracs.append(near / total if total > 0 else 0.0)
        edge = min(abs(k - mid), n - 1 - k, k)
        ratios.append(_peak_ratio(row, k) if abs(k - mid) > 8 and edge > 8 else np.nan)
    return np.asarray(fracs), np.asarray(ratios)


# ---------------------------------------------------------------------------------------------
# estimate and correct
# ---------------------------------------------------------------------------------------------

def _blind_stat(s: np.ndarray) -> np.ndarray:
    """Figures from moment sums (..., 6) -> (..., 6): dc_i, dc_q, g_db, phi_deg, irr_db, dc_dbc."""
    n = s[..., 0]
    mi, mq = s[..., 1] / n, s[..., 2] / n
    vi = s[..., 3] / n - mi * mi
    vq = s[..., 4] / n - mq * mq
    c = s[..., 5] / n - mi * mq
    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.sqrt(vq / vi)
        sphi = np.clip(-c / np.sqrt(vi * vq), -1.0, 1.0)
    g_db = 20.0 * np.log10(g)
    phi = np.rad2deg(np.arcsin(sphi))
    irr = image_rejection(g_db, phi)
    with np.errstate(invalid="ignore", divide="ignore"):
        dc_dbc = _db10((mi * mi + mq * mq) / (vi + vq))
    return np.stack([mi, mq, g_db, phi, np.asarray(irr), dc_dbc], axis=-1)


def _tone_stat(s: np.ndarray) -> np.ndarray:
    """Figures from tone sums (..., 6): sum c- c+, |c+|^2, c0 n, n, |c-|^2, 1 over blocks.

    r = nu / conj(mu) = image / conj(tone); w = g e^{j phi} = (1 - r) / (1 + r).
    """
    r = s[..., 0] / s[..., 1].real
    w = (1.0 - r) / (1.0 + r)
    dc = s[..., 2] / s[..., 3].real
    g_db = 20.0 * np.log10(np.abs(w))
    phi = np.rad2deg(np.angle(w))
    with np.errstate(divide="ignore"):
        irr = -20.0 * np.log10(np.abs(r))
    power = (s[..., 1].real + s[..., 4].real) / s[..., 5].real
    dc_dbc = _db10(np.abs(dc) ** 2 / power)
    return np.stack([dc.real, dc.imag, g_db, phi, irr, dc_dbc], axis=-1).real


_FIGURES = (
    ("dc_i", "FS", "DC offset of the I branch (units of full scale)"),
    ("dc_q", "FS", "DC offset of the Q branch (units of full scale)"),
    ("gain_imbalance_db", "dB", "gain of the Q branch over the I branch"),
    ("phase_skew_deg", "deg", "phase skew of the Q branch from quadrature"),
    ("image_rejection_db", "dB", "image rejection ratio"),
    ("dc_offset_dbc", "dBc", "DC (carrier leakage) power relative to the signal power"),
)


def _imbalance_sums(func, x2, cap, method):
    n = x2.shape[-1]
    fs_ = _capture.full_scale(cap)
    if method == "blind":
        edges = _block_edges(n, max(1, -(-n // 64)))
        sums = _blockwise(x2, _moment_sums, (edges.size - 1) * 6, edges).real
        sums = sums.reshape(x2.shape[0], edges.size - 1, 6)
        sums[..., 1:3] /= fs_
        sums[..., 3:6] /= fs_**2
        return sums, _blind_stat, {}
    spec = _search_spectrum(_head(x2, min(n, 64 * _SEARCH_LEN)))
    fracs, ratios = _dominant_tone(spec)
    if np.any(~np.isfinite(ratios)) or np.any(fracs <= 0.5):
        raise MeasurementError(
            f"{func}: method='tone' needs a dominant test tone (over half the power) away from "
            "DC and from fs/2; none was found"
        )
    ratios = ratios[:, None]
    if n < 4 * _SEARCH_LEN:
        raise MeasurementError(f"{func}: method='tone' needs at least {4 * _SEARCH_LEN} samples")
    ratios, amp, edges = _tone_amplitudes(x2, ratios, n, fs_)  # (ch, blocks, 3): tone, image, dc
    counts = np.diff(edges).astype(float)[None, :]
    sums = np.stack([amp[..., 1] * amp[..., 0], np.abs(amp[..., 0]) ** 2 + 0j,
                     amp[..., 2] * counts, counts + 0j * amp[..., 2], np.abs(amp[..., 1]) ** 2 + 0j,
                     np.ones_like(amp[..., 0])],
                    axis=-1)
    fs = _capture.sample_rate(cap)
    return sums, _tone_stat, {"tone_offset_hz": ratios[:, 0] * fs}


def estimate(cap: xr.DataArray, *, method: Literal["auto", "blind", "tone"] = "auto") -> xr.Dataset:
    """Estimate DC offsets, gain imbalance, phase skew and image rejection, with uncertainties.

    Two methods, for the model of the module docstring:

    ``"blind"``
        Second-order statistics of a circular signal (noise, modulated traffic, several
        carriers): DC = mean; g = sqrt(E[Q^2] / E[I^2]);
        sin(phi) = -E[IQ] / sqrt(E[I^2] E[Q^2]) on the DC-free samples. A non-circular
        signal (BPSK or another real-valued modulation, a tone with a tone at its mirror
        frequency) biases it.
    ``"tone"``
        From a test tone and its image: per block the tone c+, its image c- and DC are
        fitted by least squares; r = c- / conj(c+) = nu / conj(mu) gives
        ``g e^{j phi} = (1 - r) / (1 + r)`` exactly (a small error in the tone frequency
        cancels in the ratio).
    ``"auto"``
        ``"tone"`` when, in every channel, one spectral line away from DC holds more than
        half of the power; else ``"blind"``. The choice is in the ``method`` attr.

    Uncertainties are one standard deviation by leave-one-block-out jackknife over 64 blocks
    (blocks of at least 1024 samples for the tone method). The capture is read chunk by
    chunk (moment sums), once, plus its first 2**18 samples to look for a tone.

    Parameters
    ----------
    cap : capture
        Complex samples, numpy or dask, ``("time",)`` or ``("channel", "time")``.
    method : {"auto", "blind", "tone"}

    Returns
    -------
    xarray.Dataset
        ``dc_i``, ``dc_q`` (FS: units of full scale), ``gain_imbalance_db``,
        ``phase_skew_deg``, ``image_rejection_db``, ``dc_offset_dbc`` (DC power over the
        signal power), each with ``<name>_uncertainty``; ``n_samples``; a ``channel`` dim
        where the capture has one; attr ``method`` ("blind" or "tone").

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import impairments
    >>> cap = quadkit.synth.tone(100e3, sample_rate=1e6, n_samples=2**16)
    >>> bad = impairments.apply(cap, gain_imbalance_db=1.0, phase_skew_deg=2.0, dc_q=0.01)
    >>> est = impairments.estimate(bad)
    >>> est.attrs["method"], round(float(est.gain_imbalance_db), 4)
    ('tone', 1.0)
    >>> round(float(est.phase_skew_deg), 4)
    2.0
    >>> round(float(est.dc_q), 6), round(float(est.image_rejection_db), 2)
    (0.01, 24.4)
    """
    func = "estimate"
    _check_complex(func, cap)
    check_option(func, "method", method, ("auto", "blind", "tone"))
    x2 = _as2d(cap.data)
    n = x2.shape[-1]
    if n < 64:
        raise MeasurementError(f"{func}: {n} samples are too few; at least 64 are needed")
    if method == "auto":
        method = "blind"
        if n >= 4 * _SEARCH_LEN:
            spec = _search_spectrum(_head(x2, min(n, 64 * _SEARCH_LEN)))
            fracs, ratios = _dominant_tone(spec)
            if np.all(fracs > 0.5) and np.all(np.isfinite(ratios)):
                method = "tone"
    sums, stat, extra = _imbalance_sums(func, x2, cap, method)
    est, se = _jackknife(stat, sums)
    if not np.all(np.isfinite(est[..., :4])):
        raise MeasurementError(f"{func}: the capture has no signal power to measure imbalance on")
    variables = {}
    for j, (name, units, long_name) in enumerate(_FIGURES):
        variables[name] = _per_channel(cap, est[:, j], units, long_name)
        variables[name + "_uncertainty"] = _per_channel(
            cap, se[:, j], units,
            f"standard uncertainty (1 sigma, block jackknife) of the {long_name}")
    variables["n_samples"] = _per_channel(cap, np.full(x2.shape[0], n), "1", "samples used")
    if "tone_offset_hz" in extra:
        variables["tone_offset_hz"] = _per_channel(cap, extra["tone_offset_hz"], "Hz",
                                                   "baseband offset of the test tone")
    return result(variables, coords=_channel_coords(cap),
                  attrs={"method": method,
                         "model": "I_m = I + dc_i; Q_m = g (Q cos phi - I sin phi) + dc_q"})


def _param(est: xr.Dataset, name: str, cap: xr.DataArray) -> xr.DataArray:
    if name not in est:
        raise ValueError(f"correct: the estimate has no {name!r}; pass the result of estimate()")
    v = est[name]
    if "channel" in v.dims and "channel" not in cap.dims:
        raise ValueError("correct: the estimate has a channel dim but the capture has none")
    return v.astype(float)


def _correct_kernel(x, dc_i, dc_q, g, phi, fs_):
    i = x.real.astype(np.float64) - dc_i * fs_
    q = x.imag.astype(np.float64) - dc_q * fs_
    qc = (q / g + i * np.sin(phi)) / np.cos(phi)
    return (i + 1j * qc).astype(x.dtype)


def correct(cap: xr.DataArray, estimate: xr.Dataset) -> xr.DataArray:
    """Remove DC offsets and IQ imbalance measured by :func:`estimate`.

    Inverts the model exactly: ``I = I_m - dc_i``,
    ``Q = ((Q_m - dc_q) / g + I sin(phi)) / cos(phi)``, so the I branch stays the reference.
    Given the result of :func:`image_rejection_vs_frequency` (it holds ``compensator_taps``),
    applies the widely-linear FIR ``y = z + w * conj(z)`` instead, which removes
    frequency-dependent imbalance.

    Elementwise (or a short FIR whose history crosses chunk borders by overlap), so a lazy
    capture gives a lazy result with the same chunks. dtype kept.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import impairments
    >>> cap = quadkit.synth.tone(100e3, sample_rate=1e6, n_samples=2**16)
    >>> bad = impairments.apply(cap, gain_imbalance_db=1.0, phase_skew_deg=5.0)
    >>> fixed = impairments.correct(bad, impairments.estimate(bad))
    >>> float(impairments.estimate(fixed).image_rejection_db) > 80
    True
    """
    _check_complex("correct", cap)
    if not isinstance(estimate, xr.Dataset):
        raise ValueError("correct: estimate must be the Dataset returned by estimate()")
    if "compensator_taps" in estimate:
        return _correct_wl(cap, estimate)
    dc_i = _param(estimate, "dc_i", cap)
    dc_q = _param(estimate, "dc_q", cap)
    g = 10.0 ** (_param(estimate, "gain_imbalance_db", cap) / 20.0)
    phi = np.deg2rad(_param(estimate, "phase_skew_deg", cap))
    fs_ = _capture.full_scale(cap)
    out = xr.apply_ufunc(
        _correct_kernel, cap.variable, dc_i.variable, dc_q.variable, g.variable, phi.variable,
        kwargs={"fs_": fs_}, dask="parallelized", output_dtypes=[cap.dtype],
    )
    data = out.transpose(*cap.dims).data
    return _capture.like(cap, data)


# ---------------------------------------------------------------------------------------------
# frequency-dependent imbalance: image rejection across the band and a widely-linear FIR
# ---------------------------------------------------------------------------------------------

def _wl_block(x, taps, dc, fs_, delay):
    """y[n] = z[n] + sum_l w[l] conj(z[n - l + delay]) on an extended block (valid part)."""
    z = x.astype(np.complex128) - dc[:, None] * fs_
    out = np.empty((z.shape[0], z.shape[1] - 2 * delay), dtype=np.complex128)
    for c in range(z.shape[0]):
        # valid part: conv[m] = sum_l w[l] conj(ext[m + 2D - l]) = sum_l w[l] conj(z[m + D - l])
        conv = np.convolve(np.conj(z[c]), taps[c], mode="valid")
        out[c] = z[c, delay:z.shape[1] - delay] + conv
    return out.astype(x.dtype)


def _wl_dask_block(b, *, taps, dc, fs_, delay, block_info=None):
    lo, hi = block_info[0]["array-location"][0]
    return _wl_block(b, taps[lo:hi], dc[lo:hi], fs_, delay)


def _correct_wl(cap: xr.DataArray, comp: xr.Dataset) -> xr.DataArray:
    taps = np.asarray(comp["compensator_taps"].values, dtype=np.complex128)
    taps = taps.reshape(-1, taps.shape[-1])
    if taps.shape[-1] % 2 != 1:
        raise ValueError("correct: compensator_taps must have an odd number of taps")
    delay = taps.shape[-1] // 2
    dc = np.asarray(comp["dc_i"].values, float).reshape(-1) + 1j * np.asarray(
        comp["dc_q"].values, float).reshape(-1)
    x2 = _as2d(cap.data)
    if taps.shape[0] != x2.shape[0]:
        raise ValueError(
            f"correct: the compensator has {taps.shape[0]} channel(s), the capture {x2.shape[0]}")
    fs_ = _capture.full_scale(cap)
    if not _capture.is_lazy(cap):
        ext = np.pad(np.asarray(x2), ((0, 0), (delay, delay)))
        out = _wl_block(ext, taps, dc, fs_, delay)
    else:
        import dask.array as da

        out = da.map_overlap(
            functools.partial(_wl_dask_block, taps=taps, dc=dc, fs_=fs_, delay=delay), x2,
            depth={0: 0, 1: delay}, boundary={0: "none", 1: 0}, trim=False, dtype=cap.dtype)
    if cap.data.ndim == 1:
        out = out[0]
    return _capture.like(cap, out)


def _find_tones(spec: np.ndarray, max_tones: int = 32) -> np.ndarray:
    """Test-tone bins of a shifted search spectrum (one row): strong lines, images dropped."""
    n = spec.size
    mid = n // 2
    floor = np.median(spec)
    top = spec.max()
    k = np.arange(1, n - 1)
    is_peak = (spec[k] > spec[k - 1]) & (spec[k] >= spec[k + 1])
    thresh = max(floor * 1e3, top * 1e-6)
    cand = k[is_peak & (spec[k] > thresh) & (np.abs(k - mid) > 8)]
    keep = []
    for c in cand:
        mirror = 2 * mid - c
        if 0 <= mirror < n:
            mirror_level = spec[max(mirror - 1, 0):mirror + 2].max()
            if mirror_level > spec[c]:
                continue  # the weaker line of a mirror pair is an image
        keep.append(c)
    keep = sorted(keep, key=lambda c: -spec[c])[:max_tones]
    return np.asarray(sorted(keep), dtype=int)


def _mt_stat_factory(k: int):
    def stat(s: np.ndarray) -> np.ndarray:
        # s (..., 3k + 2): sum c- c+ (k), |c+|^2 (k), |c-|^2 (k), c0 n, n over blocks
        cross, pp = s[..., :k], s[..., k:2 * k].real
        r = cross / pp
        w = (1.0 - r) / (1.0 + r)
        with np.errstate(divide="ignore"):
            irr = -20.0 * np.log10(np.abs(r))
        dc = s[..., 3 * k] / s[..., 3 * k + 1].real
        return np.concatenate([
            irr, 20.0 * np.log10(np.abs(w)), np.rad2deg(np.angle(w)),
            r.real, r.imag, dc.real[..., None], dc.imag[..., None]], axis=-1).real
    return stat


_CHIRP_WINDOW = 2048


def _chirp_windows(x: np.ndarray, pos0: int, width: int) -> np.ndarray:
    """Per whole window of ``width`` samples (at positions k * width): [f, c+, c-, c0, rate].

    The window's sweep is modelled as u(m) = exp(j 2 pi (f m + k m^2 / 2)), m from the window
    centre, with f and the rate k from lag-1 products (whole window and halves); u, conj(u), 1 are
    fitted by least squares. An error in the model phase multiplies c+ by D and c- by
    conj(D), so the ratio c- / conj(c+) does not depend on it.
    """
    n_win = x.shape[1] // width
    out = np.zeros((x.shape[0], n_win, 5), dtype=np.complex128)
    m = np.arange(width) - (width - 1) / 2.0
    for w in range(n_win):
        seg = x[:, w * width:(w + 1) * width].astype(np.complex128)
        for c in range(x.shape[0]):
            clean = seg[c]
            for _ in range(2):
                # second round: the sweep parameters from the samples with the fitted image
                # and DC removed, so their cross terms no longer bias f and the rate
                d = clean[1:] * np.conj(clean[:-1])
                f = np.angle(np.sum(d)) / (2.0 * np.pi)
                # the rate from the two halves' frequencies: a second lag product would be
                # swamped by the image's cross terms (the rate is ~1e-5 rad/sample^2)
                half = d.size // 2
                f1 = np.angle(np.sum(d[:half])) / (2.0 * np.pi)
                f2 = np.angle(np.sum(d[half:])) / (2.0 * np.pi)
                rate = (f2 - f1) / half
                u = np.exp(2j * np.pi * (f * m + rate * m * m / 2.0))
                reg = np.stack([u, np.conj(u), np.ones(width)], axis=1)
                coef = np.linalg.lstsq(reg, seg[c], rcond=None)[0]
                clean = seg[c] - coef[1] * reg[:, 1] - coef[2]
            out[c, w] = (f, coef[0], coef[1], coef[2], rate)
    return out


def _chirp_sums(x2, n: int, fs_: float, n_bins: int, func: str):
    """Window fits of a sweep, binned in frequency: (ratios (ch, K), sums (ch, windows, 3K+2))."""
    width = _CHIRP_WINDOW
    if _capture._is_dask(x2):
        import dask.array as da

        size = max(1, round(float(np.median(x2.chunks[1])) / width)) * width
        xa = x2.rechunk({0: -1, 1: size})
        wins = tuple(int(c) // width for c in xa.chunks[1])
        res = da.map_blocks(_chirp_windows, xa, 0, width, dtype=np.complex128,
                            new_axis=[2], chunks=(xa.chunks[0], wins, (5,)))
        res = np.asarray(res.compute())
    else:
        res = _chirp_windows(np.asarray(x2), 0, width)
    f = res[..., 0].real
    tone, image, dc = res[..., 1] / fs_, res[..., 2] / fs_, res[..., 3] / fs_
    # tone and image overlap near DC and fs/2: drop windows whose sweep comes within
    # 4 bins of either
    reach = np.abs(res[..., 4].real) * width / 2.0 + 4.0 / width
    usable = (np.abs(f) > reach) & (np.abs(f) < 0.5 - reach)
    fr = f[0][usable[0]]
    if fr.size < 2 * n_bins:
        raise MeasurementError(
            f"{func}: the sweep covers too little of the band for {n_bins} bins "
            f"({fr.size} usable windows of {width} samples)")
    edges = np.linspace(fr.min(), fr.max(), n_bins + 1)
    which = np.clip(np.searchsorted(edges, f, side="right") - 1, 0, n_bins - 1)
    which = np.where(usable, which, -1)
    n_ch, n_win = f.shape
    sums = np.zeros((n_ch, n_win, 3 * n_bins + 2), dtype=np.complex128)
    ratios = np.zeros((n_ch, n_bins))
    for c in range(n_ch):
        for b in range(n_bins):
            sel = which[c] == b
            if not np.any(sel):
                raise MeasurementError(f"{func}: frequency bin {b} of the sweep holds no window")
            sums[c, sel, b] = image[c, sel] * tone[c, sel]
            sums[c, sel, n_bins + b] = np.abs(tone[c, sel]) ** 2
            sums[c, sel, 2 * n_bins + b] = np.abs(image[c, sel]) ** 2
            wgt = np.abs(tone[c, sel]) ** 2
            ratios[c, b] = np.sum(f[c, sel] * wgt) / np.sum(wgt)
    sums[..., 3 * n_bins] = dc * width
    sums[..., 3 * n_bins + 1] = width
    return ratios, sums


def image_rejection_vs_frequency(
    cap: xr.DataArray,
    *,
    offsets_hz: Any = None,
    n_taps: int | None = None,
    stimulus: Literal["multitone", "chirp"] = "multitone",
    n_bins: int = 16,
) -> xr.Dataset:
    """Image rejection across the band from a multitone or a chirp, and a WL FIR compensator.

    Each test tone at f and its image at -f are fitted by least squares per block (64 blocks
    of at least 1024 samples, with DC and all other tones); ``r(f) = c-(-f) / conj(c+(f))`` gives the image
    rejection ``-20 log10 |r|`` at the tone's frequency, and the flat imbalance that would give
    the same image (``g e^{j phi} = (1 - r) / (1 + r)``). Use tones that are not mirror
    images of one another.

    With ``stimulus="chirp"`` the capture holds a frequency sweep (for example
    :func:`quadkit.synth.chirp`); each window of 2048 samples is fitted with its own local
    sweep (frequency, and rate from the halves' frequencies), its mirror and DC, and the windows are
    averaged in ``n_bins`` frequency bins across the swept range.

    The compensator ``y[n] = z[n] + sum_l w[l] conj(z[n - l + D])`` (``D = (n_taps - 1) / 2``,
    z DC-free) is fitted by least squares to ``W(-f) = -r(f)`` at the tone frequencies, where
    ``W(f) = sum_l w[l] exp(-j 2 pi f (l - D) / fs)``; this cancels each tone's image (the
    widely-linear model of Tarighat, Bagheri & Sayed 2005; Anttila, Valkama & Renfors 2008).
    Pass the result to :func:`correct`.

    Parameters
    ----------
    cap : capture
        Complex capture of a multitone (two tones or more) or a sweep, numpy or dask.
    offsets_hz : sequence of float, optional
        Baseband offsets of the test tones; each is refined to the nearest spectral peak.
        Default: found (lines 30 dB above the median level, mirror-pair images dropped).
    stimulus : {"multitone", "chirp"}
    n_bins : int
        Frequency bins across a sweep (``stimulus="chirp"`` only).
    n_taps : int, optional
        Odd FIR length of the compensator, fewer than the tones so that the least-squares
        fit is determined (more taps than tones would match the tones exactly and stray
        between them). Default: the largest odd number below the tone count, at most 7.

    Returns
    -------
    xarray.Dataset
        Along ``frequency`` (absolute Hz, coordinate ``offset`` in baseband Hz):
        ``image_rejection_db``, ``gain_imbalance_db``, ``phase_skew_deg`` with uncertainties;
        ``compensator_taps`` (complex, dim ``tap``), ``dc_i``, ``dc_q``; ``channel`` dim where
        the capture has one.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> from quadkit import impairments
    >>> cap = quadkit.synth.multitone([-300e3, -190e3, -110e3, 70e3, 150e3, 230e3],
    ...                               sample_rate=1e6, n_samples=2**16, amplitudes=0.15)
    >>> bad = impairments.apply(cap, branch_filters=([1.0], [0.9, 0.1]))
    >>> res = impairments.image_rejection_vs_frequency(bad)  # 5 taps for 6 tones
    >>> np.round(res.image_rejection_db.values, 1)  # worse towards the band edges
    array([21.3, 24.7, 29.3, 33.2, 26.7, 23.2])
    >>> fixed = impairments.correct(bad, res)
    >>> bool(impairments.image_rejection_vs_frequency(fixed).image_rejection_db.min() > 60)
    True
    """
    func = "image_rejection_vs_frequency"
    _check_complex(func, cap)
    if n_taps is not None:
        n_taps = check_positive_int(func, "n_taps", n_taps)
        if n_taps % 2 != 1:
            raise ValueError(f"{func}: n_taps={n_taps} must be odd")
    fs = _capture.sample_rate(cap)
    fs_ = _capture.full_scale(cap)
    x2 = _as2d(cap.data)
    n = x2.shape[-1]
    if n < 4 * _SEARCH_LEN:
        raise MeasurementError(
            f"{func}: {n} samples are too few; at least {4 * _SEARCH_LEN} are needed")
    check_option(func, "stimulus", stimulus, ("multitone", "chirp"))
    if stimulus == "chirp":
        n_bins = check_positive_int(func, "n_bins", n_bins, minimum=2)
        ratios, sums = _chirp_sums(x2, n, fs_, n_bins, func)
        k = n_bins
        tone = None
    else:
        ratios, sums, tone = _multitone_sums(func, x2, n, fs, fs_, offsets_hz)
        k = ratios.shape[1]
    if n_taps is None:
        n_taps = max(1, min(7, k - 1 if k % 2 == 0 else k - 2))
    elif n_taps >= k and n_taps > 1:
        raise ValueError(
            f"{func}: n_taps={n_taps} needs more than {n_taps} test tones; found {k}")
    est, se = _jackknife(_mt_stat_factory(k), sums)
    irr, gdb, phi = est[:, :k], est[:, k:2 * k], est[:, 2 * k:3 * k]
    r = est[:, 3 * k:4 * k] + 1j * est[:, 4 * k:5 * k]
    dci, dcq = est[:, 5 * k], est[:, 5 * k + 1]
    if tone is not None:
        power = np.mean(np.abs(tone) ** 2, axis=1)
    else:
        n_w = np.count_nonzero(sums[..., k:2 * k].real, axis=1)
        power = sums[..., k:2 * k].real.sum(axis=1) / np.maximum(n_w, 1)
    return _irr_result(cap, fs, ratios, r, irr, gdb, phi, se, dci, dcq, power, n_taps, k, stimulus)


def _multitone_sums(func, x2, n, fs, fs_, offsets_hz):
    spec = _search_spectrum(_head(x2, min(n, 64 * _SEARCH_LEN)))
    mid = _SEARCH_LEN // 2
    if offsets_hz is None:
        bins = _find_tones(spec[0])
    else:
        offs = np.atleast_1d(np.asarray(offsets_hz, dtype=float))
        if offs.ndim != 1 or not np.all(np.isfinite(offs)) or np.any(np.abs(offs) >= fs / 2):
            raise ValueError(f"{func}: offsets_hz must be finite offsets inside +-fs/2")
        bins = []
        for f in offs:
            b0 = int(round(f / fs * _SEARCH_LEN)) + mid
            lo, hi = max(b0 - 3, 0), min(b0 + 4, _SEARCH_LEN)
            bins.append(lo + int(np.argmax(spec[0, lo:hi])))
        bins = np.asarray(bins)
    if bins.size < 1 or np.any(np.abs(bins - mid) <= 8):
        raise MeasurementError(f"{func}: no test tones away from DC were found")
    ratios = np.array([[_peak_ratio(row, int(b)) for b in bins] for row in spec])
    k = ratios.shape[1]
    ratios, amp, edges = _tone_amplitudes(x2, ratios, n, fs_)
    tone, image, dc = amp[..., :k], amp[..., k:2 * k], amp[..., 2 * k]
    counts = np.diff(edges).astype(float)[None, :]
    sums = np.concatenate([image * tone, np.abs(tone) ** 2 + 0j, np.abs(image) ** 2 + 0j,
                           (dc * counts)[..., None], (counts + 0j * dc)[..., None]], axis=-1)
    return ratios, sums, tone


def _irr_result(cap, fs, ratios, r, irr, gdb, phi, se, dci, dcq, power, n_taps, k, stimulus):
    x_channels = ratios.shape[0]
    # widely-linear FIR fit: sum_l w[l] exp(+j 2 pi f_k (l - D)) = -r_k
    dly = n_taps // 2
    lags = np.arange(n_taps) - dly
    taps = np.empty((x_channels, n_taps), dtype=np.complex128)
    for c in range(x_channels):
        mat = np.exp(2j * np.pi * ratios[c][:, None] * lags[None, :])
        taps[c] = np.linalg.lstsq(mat, -r[c], rcond=None)[0]
    offsets = ratios.mean(axis=0) * fs
    fc = float(cap.attrs.get("center_frequency", 0.0))
    chan = "channel" in cap.dims

    def along(values, units, long_name):
        v = values if chan else values[0]
        return quantity(v, units, long_name, dims=(("channel",) if chan else ()) + ("frequency",))

    variables = {
        "image_rejection_db": along(irr, "dB", "image rejection ratio at the tone frequency"),
        "image_rejection_db_uncertainty": along(
            se[:, :k], "dB",
            "standard uncertainty (1 sigma, block jackknife) of the image rejection ratio"),
        "gain_imbalance_db": along(gdb, "dB", "equivalent gain imbalance at the tone frequency"),
        "gain_imbalance_db_uncertainty": along(
            se[:, k:2 * k], "dB", "standard uncertainty of the gain imbalance"),
        "phase_skew_deg": along(phi, "deg", "equivalent phase skew at the tone frequency"),
        "phase_skew_deg_uncertainty": along(
            se[:, 2 * k:3 * k], "deg", "standard uncertainty of the phase skew"),
        "tone_power_dbfs": along(_db10(power), "dBFS", "test tone power"),
        "compensator_taps": quantity(taps if chan else taps[0], "1",
                                     "widely-linear compensator taps w (y = z + w * conj(z))",
                                     dims=(("channel",) if chan else ()) + ("tap",)),
        "dc_i": _per_channel(cap, dci, "FS", "DC offset of the I branch (units of full scale)"),
        "dc_q": _per_channel(cap, dcq, "FS", "DC offset of the Q branch (units of full scale)"),
    }
    coords = dict(_channel_coords(cap))
    coords["frequency"] = ("frequency", fc + offsets,
                           {"units": "Hz", "long_name": "tone frequency"})
    coords["offset"] = ("frequency", offsets, {"units": "Hz", "long_name": "baseband offset"})
    coords["tap"] = ("tap", lags, {"units": "samples", "long_name": "tap lag l - D"})
    return result(variables, coords=coords,
                  attrs={"method": stimulus, "compensator_delay_samples": dly})


# ---------------------------------------------------------------------------------------------
# frequency of a spectral line (tone, or the M-th power line of PSK/QAM)
# ---------------------------------------------------------------------------------------------

def _line_frequency(x2, *, near: np.ndarray | None = None, width: np.ndarray | None = None):
    """Frequency (cycles/sample) of the strongest line per channel, and its standard error.

    Coarse: Hann-windowed FFT of the first 2**18 samples zero-padded twice, Gaussian
    interpolation of the peak (within ``near +- width`` cycles/sample when given). Fine: one
    pass over the capture summing each block of samples against the coarse NCO; the block
    phasors' phase grows linearly with the residual error, fitted by least squares. The
    standard error comes from the fit's residuals (close to the Cramer-Rao bound when the
    line is well above the noise in every block).
    """
    n = x2.shape[-1]
    if n < 1024:
        raise MeasurementError(
            f"frequency estimate: {n} samples are too few; at least 1024 are needed")
    head = _head(x2, min(n, 1 << 18))
    m0 = head.shape[1]
    win = np.hanning(m0 + 1)[:-1]
    nfft = 2 * m0
    spec = np.abs(np.fft.fftshift(np.fft.fft(head * win, nfft, axis=-1), axes=-1)) ** 2
    grid = (np.arange(nfft) - nfft // 2) / nfft
    coarse = np.empty(x2.shape[0])
    for c in range(x2.shape[0]):
        row = spec[c].copy()
        if near is not None:
            row[np.abs(grid - near[c]) > width[c]] = 0.0
        k = int(np.argmax(row))
        if row[k] <= 0:
            raise MeasurementError("frequency estimate: no spectral line in the search window")
        coarse[c] = _peak_ratio(spec[c], k)
    length = int(max(256, min(1 << 14, n // 16)))
    edges = _block_edges(n, length)
    proj = _blockwise(x2, _projection_sums, (edges.size - 1) * 3, edges, coarse[:, None])
    p = proj.reshape(x2.shape[0], edges.size - 1, 3)[..., 0]
    centers = (edges[:-1] + edges[1:] - 1) / 2.0
    full = np.diff(edges) == length
    fine = np.empty_like(coarse)
    se = np.empty_like(coarse)
    for c in range(x2.shape[0]):
        pc, tc = p[c][full], centers[full]
        if pc.size < 4:
            raise MeasurementError("frequency estimate: too few samples for the fine fit")
        d1 = np.angle(np.sum(pc[1:] * np.conj(pc[:-1]))) / (2.0 * np.pi * length)
        psi = np.unwrap(np.angle(pc * np.exp(-2j * np.pi * d1 * tc)))
        tt = tc - tc.mean()
        slope = np.dot(tt, psi - psi.mean()) / np.dot(tt, tt)
        res = psi - psi.mean() - slope * tt
        fine[c] = coarse[c] + d1 + slope / (2.0 * np.pi)
        sigma = math.sqrt(np.dot(res, res) / max(pc.size - 2, 1))
        se[c] = sigma / math.sqrt(np.dot(tt, tt)) / (2.0 * np.pi)
    return fine, se


#: A carrier holds at least this share of the power within fs / 20 of it.
_CARRIER_SHARE = 0.5


def _require_tone(func: str, cap: xr.DataArray, x2: Any, ratios: np.ndarray, what: str,
                  advice: str) -> None:
    """Refuse a capture without a carrier at ``ratios`` (cycles/sample, per channel).

    A carrier is a line that :func:`quadkit.spectral.find_peaks` lists (10 dB over the local
    floor and shaped like a tone) within 3 bins of the line found, holding at least half of
    the power within fs / 20 of it, in a Hann spectrum (1024-point segments at most) of the
    first 2**18 samples. RRC-shaped traffic has no such line: its power is spread over the
    symbol rate.
    """
    from . import spectral

    fs = _capture.sample_rate(cap)
    head = _head(x2, min(x2.shape[-1], 1 << 18))
    nper = 1024
    while nper > 64 and 4 * nper > head.shape[1]:
        nper //= 2
    attrs = {"sample_rate": fs, "center_frequency": 0.0, "full_scale": _capture.full_scale(cap)}
    spec = spectral.psd(_capture.from_array(head, attrs), nperseg=nper)
    peaks = spectral.find_peaks(spec)
    lin = 10 ** (np.atleast_2d(np.asarray(spec.values, dtype=float)) / 10)
    off = np.asarray(spec.offset.values, dtype=float)
    df = fs / nper
    pk_ch = np.asarray(peaks.channel.values)
    pk_off = np.asarray(peaks.offset_hz.values, dtype=float)
    pk_pow = 10 ** (np.asarray(peaks.power_dbfs.values, dtype=float) / 10)

    def wrap(d: np.ndarray) -> np.ndarray:
        return (d + fs / 2) % fs - fs / 2

    for c in range(lin.shape[0]):
        f = float(ratios[c]) * fs
        near = float(np.sum(lin[c][np.abs(wrap(off - f)) <= fs / 20]) * df)
        mine = (pk_ch == c) & (np.abs(wrap(pk_off - f)) <= 3 * df)
        if not np.any(mine & (pk_pow >= _CARRIER_SHARE * near)):
            where = f" (channel {cap.channel.values[c]})" if "channel" in cap.dims else ""
            raise MeasurementError(
                f"{func}: no {what} in the capture{where}: the strongest line, at offset "
                f"{f:.6g} Hz, is not a tone holding most of the power near it; {advice}")


_POWER = {"tone": 1, "cw": 1, "bpsk": 2, "pi/2-bpsk": 4, "qpsk": 4, "8psk": 8, "psk8": 8,
          "16qam": 4, "qam16": 4, "64qam": 4, "qam64": 4, "256qam": 4, "qam256": 4}


def frequency_offset(
    cap: xr.DataArray,
    *,
    modulation: str | None = None,
    expected_offset_hz: float = 0.0,
) -> xr.Dataset:
    """Carrier frequency offset of a tone or of M-PSK/QAM traffic.

    For a tone (``modulation=None``) the frequency of the strongest line. For modulated
    traffic the samples are raised to the M-th power (M = 2 for BPSK, 4 for pi/2-BPSK, QPSK
    and square QAM, 8 for 8PSK), which strips the modulation and leaves a line at M times the
    carrier offset (Mengali & D'Andrea, *Synchronization Techniques for Digital Receivers*, 1997);
    the unambiguous range is ``|offset| < fs / (2 M)``. The line's frequency comes from a
    coarse FFT of the first 2**18 samples refined by a phase fit over blocks of the whole
    capture (read chunk by chunk, once).

    Parameters
    ----------
    cap : capture
        Complex samples; numpy or dask; ``channel`` dim allowed.
    modulation : str, optional
        ``None`` or "tone", "bpsk", "pi/2-bpsk", "qpsk", "8psk", "16qam", "64qam", "256qam"
        (the scheme names of :mod:`quadkit.modulation`).
    expected_offset_hz : float
        Baseband offset where the carrier should be (0 for a carrier at the centre).

    Returns
    -------
    xarray.Dataset
        ``frequency_offset_hz`` (measured minus expected) and its uncertainty (1 sigma),
        ``offset_hz`` (measured baseband offset) and ``frequency_hz`` (absolute); attr
        ``method``.

    Raises
    ------
    MeasurementError
        With ``modulation=None`` (or "tone") when the capture holds no tone: the strongest
        line must be listed by :func:`quadkit.spectral.find_peaks` and hold at least half
        of the power within fs / 20 of it. Modulated traffic has no such line; give its
        ``modulation`` instead.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import impairments
    >>> cap = quadkit.synth.tone(1234.5, sample_rate=1e6, n_samples=2**16)
    >>> round(float(impairments.frequency_offset(cap).frequency_offset_hz), 3)
    1234.5
    """
    func = "frequency_offset"
    _check_complex(func, cap)
    key = "tone" if modulation is None else str(modulation).lower()
    check_option(func, "modulation", key, list(_POWER) + [None])
    power = _POWER[key]
    expected = check_finite(func, "expected_offset_hz", expected_offset_hz)
    fs = _capture.sample_rate(cap)
    x2 = _as2d(cap.data)
    if power > 1:
        x2 = (x2.astype(np.complex128) / _capture.full_scale(cap)) ** power
    ratio, se = _line_frequency(x2)
    if power == 1:
        _require_tone(func, cap, x2, ratio, "tone",
                      'for modulated traffic give modulation="qpsk", "16qam", "bpsk", ... '
                      "(the M-th power line)")
    offset = ratio * fs / power
    fc = float(cap.attrs.get("center_frequency", 0.0))
    variables = {
        "frequency_offset_hz": _per_channel(cap, offset - expected, "Hz",
                                            "carrier frequency offset from the expected offset"),
        "frequency_offset_hz_uncertainty": _per_channel(
            cap, se * fs / power, "Hz", "standard uncertainty (1 sigma) of the frequency offset"),
        "offset_hz": _per_channel(cap, offset, "Hz", "measured baseband offset of the carrier"),
        "frequency_hz": _per_channel(cap, fc + offset, "Hz", "measured carrier frequency"),
    }
    method = "tone" if power == 1 else f"{power}th-power" if power != 2 else "squaring"
    return result(variables, coords=_channel_coords(cap), attrs={"method": method})


# ---------------------------------------------------------------------------------------------
# sample-clock offset
# ---------------------------------------------------------------------------------------------

def sample_rate_offset(
    cap: xr.DataArray,
    *,
    tone_offset_hz: float | None = None,
    tone_offsets_hz: tuple[float, float] | None = None,
) -> xr.Dataset:
    """Sample-clock error in ppm from one tone, or two tones, of known frequency.

    A clock running fast by eps samples a tone of true baseband offset f at
    ``f' = f / (1 + eps)``. With one tone (and an exact local oscillator)
    ``eps = f / f' - 1``. With two tones f1, f2 (for example +-f) the local-oscillator offset
    d drops out: ``f_i' = (f_i + d) / (1 + eps)``, so ``eps = (f1 - f2) / (f1' - f2') - 1`` and
    ``d = f1' (1 + eps) - f1`` (the model of :func:`apply`).

    Parameters
    ----------
    cap : capture
    tone_offset_hz : float, optional
        True baseband offset of a single test tone.
    tone_offsets_hz : (float, float), optional
        True baseband offsets of two test tones. Give exactly one of the two options.

    Returns
    -------
    xarray.Dataset
        ``sample_rate_offset_ppm`` and its uncertainty; with two tones also
        ``frequency_offset_hz`` and its uncertainty; attr ``method``.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit import impairments
    >>> cap = quadkit.synth.tone(200e3, sample_rate=1e6, n_samples=2**18)
    >>> fast = impairments.apply(cap, sample_rate_offset_ppm=25.0)
    >>> res = impairments.sample_rate_offset(fast, tone_offset_hz=200e3)
    >>> round(float(res.sample_rate_offset_ppm), 2)
    25.0
    """
    func = "sample_rate_offset"
    _check_complex(func, cap)
    if (tone_offset_hz is None) == (tone_offsets_hz is None):
        raise ValueError(f"{func}: give exactly one of tone_offset_hz= or tone_offsets_hz=")
    fs = _capture.sample_rate(cap)
    x2 = _as2d(cap.data)
    n_ch = x2.shape[0]
    tones = [tone_offset_hz] if tone_offset_hz is not None else list(tone_offsets_hz)
    if len(tones) not in (1, 2):
        raise ValueError(f"{func}: tone_offsets_hz must hold two offsets")
    tones = [check_finite(func, "tone offset", t) for t in tones]
    if any(t == 0 or abs(t) >= fs / 2 for t in tones):
        raise ValueError(f"{func}: tone offsets must be non-zero and inside +-fs/2; got {tones}")
    meas, errs = [], []
    for t in tones:
        # up to 2000 ppm of clock error and 2 % of fs of oscillator offset, but never as
        # far as the other tone
        width = abs(t) / fs * 2e-3 + 0.02
        if len(tones) == 2:
            width = min(width, abs(tones[0] - tones[1]) / fs / 2.0)
        r, se = _line_frequency(x2, near=np.full(n_ch, t / fs), width=np.full(n_ch, width))
        meas.append(r * fs)
        errs.append(se * fs)
    if len(tones) == 1:
        eps = tones[0] / meas[0] - 1.0
        eps_se = abs(tones[0]) / meas[0] ** 2 * errs[0]
        extra = {}
        method = "one tone"
    else:
        if tones[0] == tones[1]:
            raise ValueError(f"{func}: the two tone offsets must differ")
        span = meas[0] - meas[1]
        eps = (tones[0] - tones[1]) / span - 1.0
        eps_se = abs(tones[0] - tones[1]) / span**2 * np.hypot(errs[0], errs[1])
        d = meas[0] * (1.0 + eps) - tones[0]
        d_se = np.hypot(errs[0] * (1.0 + eps), abs(meas[0]) * eps_se)
        extra = {
            "frequency_offset_hz": _per_channel(cap, d, "Hz", "local-oscillator frequency offset"),
            "frequency_offset_hz_uncertainty": _per_channel(
                cap, d_se, "Hz", "standard uncertainty (1 sigma) of the frequency offset"),
        }
        method = "two tones"
    variables = {
        "sample_rate_offset_ppm": _per_channel(cap, eps * 1e6, "ppm",
                                               "sample-clock error (fast is positive)"),
        "sample_rate_offset_ppm_uncertainty": _per_channel(
            cap, eps_se * 1e6, "ppm", "standard uncertainty (1 sigma) of the sample-clock error"),
        **extra,
    }
    return result(variables, coords=_channel_coords(cap), attrs={"method": method})


# ---------------------------------------------------------------------------------------------
# phase noise
# ---------------------------------------------------------------------------------------------

def _phase_periodograms(x: np.ndarray, pos0: int, nperseg: int, ratios: np.ndarray, n_total: int):
    """Sum of Hann periodograms of the carrier-removed phase over whole segments.

    Segments sit at positions k * nperseg (chunks are aligned to nperseg multiples). Output
    (channel, nperseg // 2 + 2): the summed |FFT|^2 for f >= 0, then the segment count.
    """
    n_ch = x.shape[0]
    nbin = nperseg // 2 + 1
    out = np.zeros((n_ch, nbin + 1))
    win = np.hanning(nperseg + 1)[:-1]
    first = -(-pos0 // nperseg)
    stop = min(pos0 + x.shape[1], n_total) // nperseg
    for k in range(first, stop):
        lo = k * nperseg
        seg = x[:, lo - pos0:lo - pos0 + nperseg].astype(np.complex128)
        for c in range(n_ch):
            y = seg[c] * np.conj(oscillator(ratios[c], lo, nperseg, np.complex128))
            ph = np.unwrap(np.angle(y))
            ph -= ph.mean()
            out[c, :nbin] += np.abs(np.fft.rfft(ph * win)) ** 2
            out[c, nbin] += 1.0
    return out


def phase_noise(
    cap: xr.DataArray,
    *,
    carrier_hz: float | None = None,
    offsets_hz: Any = None,
    integration_band_hz: tuple[float, float] | None = None,
    nperseg: int | None = None,
) -> xr.Dataset:
    """Single-sideband phase noise L(f) of a carrier, rms phase and jitter over a band.

    The carrier (the strongest line, or the one at ``carrier_hz``) is measured to a fraction
    of a millihertz and removed; the phase of each segment of ``nperseg`` samples is
    unwrapped, its mean removed, Hann-windowed (periodic) and its periodogram averaged over
    segments (non-overlapping, aligned to multiples of ``nperseg``; a lazy capture is
    rechunked to such multiples, never to one chunk). The two-sided PSD of the phase is
    ``L(f) = S_phi(f) / 2`` of IEEE Std 1139 (S_phi one-sided, rad^2/Hz). This is the
    phase (PM) part only: amplitude noise is excluded, and additive white noise at a
    carrier-to-noise density C/N0 contributes ``L = N0 / (2 C)``.

    The integrated phase is ``sigma^2 = 2 * integral of L(f) df`` over the band (rad^2),
    reported in degrees; the jitter is ``sigma / (2 pi f_carrier)`` with the absolute
    carrier frequency (``center_frequency`` + offset).

    Parameters
    ----------
    cap : capture
        Complex samples with a carrier; numpy or dask; ``channel`` dim allowed.
    carrier_hz : float, optional
        Absolute carrier frequency in Hz (``center_frequency`` + baseband offset); default the
        strongest line.
    offsets_hz : sequence of float, optional
        Offsets at which to report L(f) (averaged over +-10 % around each offset); default
        the decades (10, 100, 1e3, ... Hz) inside the measurable range.
    integration_band_hz : (float, float), optional
        Offset band of the rms phase and jitter; default from the lowest resolved offset
        (2 bins) to fs / 2.
    nperseg : int, optional
        Segment length (resolution fs / nperseg); default the largest power of two up to
        2**16 that gives at least 16 segments.

    Returns
    -------
    xarray.Dataset
        ``phase_noise_dbc_hz`` along ``offset`` (the chosen offsets);
        ``phase_noise_curve_dbc_hz`` along ``curve_offset`` (every bin from 2 bins up);
        ``rms_phase_deg``, ``rms_jitter_s`` (when the carrier frequency is above 0),
        ``carrier_offset_hz``, ``carrier_frequency_hz``; attrs ``rbw_hz`` (ENBW of the
        window, as in :func:`quadkit.spectral.psd`), ``bin_spacing_hz`` (fs / nperseg, the
        width to integrate the curve with), ``nperseg``, ``n_segments``,
        ``integration_start_hz``, ``integration_stop_hz``.

    Raises
    ------
    MeasurementError
        When there is no carrier (at ``carrier_hz`` or anywhere): the line must be listed by
        :func:`quadkit.spectral.find_peaks` (a tone-shaped line 10 dB over the local floor)
        and hold at least half of the power within fs / 20 of it, which modulated traffic
        does not; also for too short captures or offsets outside the measurable range.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> from quadkit import impairments
    >>> fs, n = 1e6, 2**18
    >>> phi = 1e-3 * np.random.default_rng(0).standard_normal(n)  # white, sigma^2 = 1e-6
    >>> cap = quadkit.capture(np.exp(1j * phi).astype(np.complex64), sample_rate=fs,
    ...                       center_frequency=1e9)
    >>> pn = impairments.phase_noise(cap, offsets_hz=[1e4, 1e5], carrier_hz=1e9)
    >>> np.round(pn.phase_noise_dbc_hz.values, 0)  # 10 log10(sigma^2 / fs) = -120
    array([-120., -120.])
    """
    func = "phase_noise"
    _check_complex(func, cap)
    fs = _capture.sample_rate(cap)
    fc = float(cap.attrs.get("center_frequency", 0.0))
    x2 = _as2d(cap.data)
    n = x2.shape[-1]
    if nperseg is None:
        nperseg = 1 << int(min(16, max(8, math.floor(math.log2(max(n // 16, 1))))))
    nperseg = check_positive_int(func, "nperseg", nperseg, minimum=64)
    if n < 4 * nperseg:
        raise MeasurementError(
            f"{func}: {n} samples give fewer than 4 segments of nperseg={nperseg}; use a "
            "longer capture or a smaller nperseg")
    n_ch = x2.shape[0]
    if carrier_hz is None:
        ratios, _ = _line_frequency(x2)
    else:
        off = check_finite(func, "carrier_hz", carrier_hz) - fc
        if abs(off) >= fs / 2:
            raise ValueError(f"{func}: carrier_hz={carrier_hz} lies outside the captured band")
        ratios, _ = _line_frequency(x2, near=np.full(n_ch, off / fs),
                                    width=np.full(n_ch, 8.0 / nperseg))
    _require_tone(func, cap, x2, ratios, "carrier",
                  "phase noise is measured on an unmodulated carrier or test tone")
    if _capture.is_lazy(cap):
        import dask.array as da

        size = max(1, round(float(np.median(x2.chunks[1])) / nperseg)) * nperseg
        xa = x2.rechunk({0: -1, 1: size})

        nt = len(xa.chunks[1])
        chunk_fn = functools.partial(_blockwise_chunk, func=_phase_periodograms,
                                     args=(nperseg, ratios, n))
        parts = da.map_blocks(chunk_fn, xa, dtype=np.complex128, new_axis=[2],
                              chunks=(xa.chunks[0], (1,) * nt, (nperseg // 2 + 2,)))
        acc = np.asarray(parts.sum(axis=1).compute()).real
    else:
        acc = _phase_periodograms(np.asarray(x2), 0, nperseg, ratios, n)
    nbin = nperseg // 2 + 1
    count = acc[:, nbin]
    win = np.hanning(nperseg + 1)[:-1]
    # two-sided density of the phase at f > 0, rad^2/Hz: |FFT|^2 / (fs sum w^2)
    ell = acc[:, :nbin] / count[:, None] / (fs * np.sum(win**2))
    freqs = np.arange(nbin) * fs / nperseg
    rbw = fs / nperseg
    first = 2
    lo_valid = freqs[first]
    if offsets_hz is None:
        dec = 10.0 ** np.arange(1, 10)
        offs = dec[(dec >= 2 * lo_valid) & (dec <= 0.45 * fs)]
        if offs.size == 0:
            offs = np.array([freqs[nbin // 2]])
    else:
        offs = np.atleast_1d(np.asarray(offsets_hz, dtype=float))
        bad = offs[(offs < lo_valid) | (offs > fs / 2) | ~np.isfinite(offs)]
        if bad.size:
            raise MeasurementError(
                f"{func}: offsets {bad.tolist()} Hz are outside the measurable range "
                f"{lo_valid:g} .. {fs / 2:g} Hz (nperseg={nperseg}); use a larger nperseg or "
                "a longer capture for close-in offsets")
    at = np.empty((n_ch, offs.size))
    for j, f in enumerate(offs):
        sel = (freqs >= f / 1.1) & (freqs <= f * 1.1) & (np.arange(nbin) >= first)
        if not np.any(sel):
            sel = np.zeros(nbin, bool)
            sel[int(np.clip(np.argmin(np.abs(freqs - f)), first, nbin - 1))] = True
        at[:, j] = ell[:, sel].mean(axis=1)
    if integration_band_hz is None:
        band = (float(lo_valid), fs / 2)
    else:
        band = tuple(float(v) for v in integration_band_hz)
        if len(band) != 2 or not (lo_valid <= band[0] < band[1] <= fs / 2):
            raise MeasurementError(
                f"{func}: integration_band_hz={integration_band_hz} must lie within "
                f"{lo_valid:g} .. {fs / 2:g} Hz")
    in_band = (freqs >= band[0]) & (freqs <= band[1])
    var = 2.0 * ell[:, in_band].sum(axis=1) * rbw
    rms = np.sqrt(var)
    f_abs = fc + ratios * fs
    variables = {
        "phase_noise_dbc_hz": quantity(
            _db10(at) if "channel" in cap.dims else _db10(at[0]), "dBc/Hz",
            "single-sideband phase noise L(f)",
            dims=(("channel",) if "channel" in cap.dims else ()) + ("offset",)),
        "phase_noise_curve_dbc_hz": quantity(
            _db10(ell[:, first:]) if "channel" in cap.dims else _db10(ell[0, first:]), "dBc/Hz",
            "single-sideband phase noise L(f)",
            dims=(("channel",) if "channel" in cap.dims else ()) + ("curve_offset",)),
        "rms_phase_deg": _per_channel(cap, np.rad2deg(rms), "deg", "integrated rms phase"),
        "carrier_offset_hz": _per_channel(cap, ratios * fs, "Hz", "baseband offset of the carrier"),
        "carrier_frequency_hz": _per_channel(cap, f_abs, "Hz", "carrier frequency"),
    }
    if np.all(np.abs(f_abs) > 0):
        variables["rms_jitter_s"] = _per_channel(cap, rms / (2 * np.pi * np.abs(f_abs)), "s",
                                                 "rms jitter (rms phase over 2 pi f_carrier)")
    coords = dict(_channel_coords(cap))
    coords["offset"] = ("offset", offs, {"units": "Hz", "long_name": "offset from the carrier"})
    coords["curve_offset"] = ("curve_offset", freqs[first:],
                              {"units": "Hz", "long_name": "offset from the carrier"})
    # rbw_hz means what it means for spectral.psd: ENBW x bin spacing (periodic Hann: 1.5 bins,
    # Harris 1978); the bin spacing itself is what integrations over the curve use.
    attrs = {"rbw_hz": 1.5 * rbw, "bin_spacing_hz": rbw, "nperseg": nperseg,
             "n_segments": int(count.min()),
             "window": "hann (periodic)", "integration_start_hz": band[0],
             "integration_stop_hz": band[1], "definition": "IEEE Std 1139: L(f) = S_phi(f) / 2"}
    return result(variables, coords=coords, attrs=attrs)
