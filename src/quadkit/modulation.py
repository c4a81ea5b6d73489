"""Digital modulation: constellations, root-raised-cosine pulses, modulation and EVM.

- :func:`constellation` -- the 3GPP TS 38.211 section 5.1 mappers (BPSK, pi/2-BPSK, QPSK,
  16/64/256-QAM), unit mean energy, with their bit labels.
- :func:`rrc_taps` -- root-raised-cosine FIR taps of unit energy.
- :func:`modulate` -- bits or symbols to an RRC-shaped capture (complex64).
- :func:`analyze` -- blind (or data-aided) demodulation of a capture and its modulation
  quality: EVM, MER, frequency error, IQ offset, phase and magnitude error, per-symbol data.

Conventions
-----------
Time is counted in symbol periods T = 1 / symbol_rate inside the pulse formulas. The
continuous RRC pulse h(t) is normalised so that its energy over t (in units of T) is 1, which
makes h(0) = 1 - beta + 4 beta / pi and gives a stream of unit-energy symbols a mean power of 1.
Symbols are complex numbers in the complex-envelope convention of the package: the real
passband signal is Re{z(t) exp(j 2 pi f_c t)}.

EVM follows the definition of 3GPP TS 38.104 / TS 38.101-2 Annex F: the rms error vector
normalised to the rms of the ideal (reference) symbols, after the measured symbols are
corrected for carrier frequency, carrier phase, symbol timing, a complex gain and (by default)
the IQ origin offset. MER = 10 log10(sum |ideal|^2 / sum |error|^2) = -20 log10(EVM).

Warning: modulated waveforms from :func:`modulate` may end up on a transmitter. Respect your
local radio regulations and licensed practice, test on a cabled set-up with attenuators, and
check the input power limits of the receiver first.
"""

from __future__ import annotations

import math
from typing import Any, Literal

import numpy as np
import xarray as xr

from . import _capture
from ._checks import check_finite, check_option, check_positive, check_positive_int
from ._errors import MeasurementError
from ._nco import oscillator
from ._results import quantity, result

__all__ = ["SCHEMES", "constellation", "rrc_taps", "modulate", "analyze"]
_ACCESSOR = ("analyze",)

Scheme = Literal["bpsk", "pi/2-bpsk", "qpsk", "16qam", "64qam", "256qam"]
#: Schemes known to :func:`constellation`, :func:`modulate` and :func:`analyze`.
SCHEMES = ("bpsk", "pi/2-bpsk", "qpsk", "16qam", "64qam", "256qam")
_BITS = {"bpsk": 1, "pi/2-bpsk": 1, "qpsk": 2, "16qam": 4, "64qam": 6, "256qam": 8}
# Blind carrier recovery raises the symbols to this power to strip the modulation
# (Mengali & D'Andrea 1997, memory): 2 for BPSK (pi/2-BPSK once rotated back), 4 for the
# quadrant-symmetric sets.
_POWER = {"bpsk": 2, "pi/2-bpsk": 2, "qpsk": 4, "16qam": 4, "64qam": 4, "256qam": 4}

_MF_SPAN = 32  # matched-filter span (symbols) for the symbols themselves
_EST_SPAN = 8  # shorter span while estimating frequency and timing
_MIN_SYMBOLS = 16


# --------------------------------------------------------------------------- mappers

def _scheme(func: str, scheme: Any) -> str:
    if isinstance(scheme, str):
        scheme = scheme.lower().replace("_", "-")
        scheme = {"pi/2bpsk": "pi/2-bpsk", "pi2-bpsk": "pi/2-bpsk", "16-qam": "16qam",
                  "64-qam": "64qam", "256-qam": "256qam"}.get(scheme, scheme)
    return check_option(func, "scheme", scheme, SCHEMES)


def _map_bits(bits: np.ndarray, scheme: str) -> np.ndarray:
    """3GPP TS 38.211 section 5.1 mapping of a bit array (multiple of the bits per symbol)."""
    k = _BITS[scheme]
    b = (1 - 2 * bits.reshape(-1, k).astype(np.int64)).astype(np.float64)  # 1 - 2 b(i)
    if scheme in ("bpsk", "pi/2-bpsk"):
        d = (b[:, 0] + 1j * b[:, 0]) / math.sqrt(2)
        if scheme == "pi/2-bpsk":
            d = d * np.where(np.arange(d.size) % 2 == 1, 1j, 1.0)
        return d
    if scheme == "qpsk":
        return (b[:, 0] + 1j * b[:, 1]) / math.sqrt(2)
    # Square QAM, 38.211 5.1.4-5.1.6: nested (1-2b) [2^m - (1-2b) [ ... ]] per axis,
    # even bits on I, odd bits on Q.
    half = k // 2

    # Per axis: 16QAM (1-2b0)[2-(1-2b2)], 64QAM (1-2b0)[4-(1-2b2)[2-(1-2b4)]], and so on.
    def nested(cols: np.ndarray) -> np.ndarray:
        acc = 2.0 - cols[:, half - 1]
        for j in range(half - 2, 0, -1):
            acc = 2.0 ** (half - j) - cols[:, j] * acc
        return cols[:, 0] * acc

    i_axis = nested(b[:, 0::2])
    q_axis = nested(b[:, 1::2])
    norm = {"16qam": 10.0, "64qam": 42.0, "256qam": 170.0}[scheme]
    return (i_axis + 1j * q_axis) / math.sqrt(norm)


def _labels(k: int) -> np.ndarray:
    """All k-bit labels, b(0) first (the most significant bit of the label number)."""
    n = np.arange(2 ** k)
    return ((n[:, None] >> np.arange(k - 1, -1, -1)) & 1).astype(np.uint8)


def constellation(scheme: Scheme) -> xr.DataArray:
    """The constellation of a 3GPP TS 38.211 section 5.1 modulation mapper.

    Parameters
    ----------
    scheme : {"bpsk", "pi/2-bpsk", "qpsk", "16qam", "64qam", "256qam"}
        Case-insensitive; "16-QAM" style spellings are accepted.

    Returns
    -------
    xarray.DataArray
        Complex128 points of unit mean energy along dim ``point`` with coordinates ``label``
        (the bits b(0) b(1) ... as a binary number, b(0) most significant), ``bits`` (the same
        as a string, e.g. ``"0011"``) and, for pi/2-BPSK, ``parity`` (0 for symbols of even
        index i, 1 for odd: 38.211 rotates odd symbols by +pi/2, so pi/2-BPSK has four points,
        two per parity). attrs: ``scheme``, ``bits_per_symbol``, ``units``, ``long_name``.

        BPSK follows 38.211: its two points lie on the diagonal, (1 + j)/sqrt(2) for bit 0.
        The square QAMs are Gray coded: nearest neighbours differ in one bit.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> c = quadkit.modulation.constellation("16qam")
    >>> np.round(c.sel(point=c.bits == "0011").values * np.sqrt(10), 6)
    array([3.+3.j])
    >>> round(float(np.mean(np.abs(c.values) ** 2)), 12)  # unit mean energy
    1.0
    """
    scheme = _scheme("constellation", scheme)
    k = _BITS[scheme]
    labels = _labels(k)
    if scheme == "pi/2-bpsk":
        # Symbols i = 0, 1 carrying bit 0 and then bit 1: both parities of each bit.
        pts = np.array([_map_bits(np.array([b, b], np.uint8), scheme) for b in (0, 1)])
        points = np.array([pts[0, 0], pts[1, 0], pts[0, 1], pts[1, 1]])
        label = np.array([0, 1, 0, 1])
        parity = np.array([0, 0, 1, 1])
        coords = {"label": ("point", label), "bits": ("point", [str(v) for v in label]),
                  "parity": ("point", parity)}
    else:
        points = _map_bits(labels.reshape(-1), scheme)
        label = np.arange(2 ** k)
        coords = {"label": ("point", label),
                  "bits": ("point", ["".join(map(str, row)) for row in labels])}
    coords["point"] = ("point", np.arange(points.size))
    return xr.DataArray(
        points, dims=("point",), coords=coords, name="constellation",
        attrs={"scheme": scheme, "bits_per_symbol": k, "units": "1",
               "long_name": f"{scheme} constellation point (unit mean energy, 3GPP TS 38.211 5.1)"},
    )


def _points(scheme: str) -> np.ndarray:
    """Decision set of one symbol (pi/2-BPSK: the even-index points; rotate odd ones back)."""
    if scheme == "pi/2-bpsk":
        return _map_bits(np.array([0, 1], np.uint8), "bpsk")
    return _map_bits(_labels(_BITS[scheme]).reshape(-1), scheme)


def _pi2_rotation(n: int, start: int = 0) -> np.ndarray:
    """exp(j pi/2 (i mod 2)) for symbol indices start .. start + n - 1 (38.211 5.1.1)."""
    return np.where((np.arange(start, start + n) % 2) == 1, 1j, 1.0 + 0j)


# --------------------------------------------------------------------------- pulse

def _rrc(t: np.ndarray, beta: float) -> np.ndarray:
    """Continuous RRC pulse, t in symbol periods, unit energy (Proakis & Salehi, memory)."""
    t = np.asarray(t, dtype=np.float64)
    out = np.empty_like(t)
    if beta == 0.0:
        return np.sinc(t)
    at0 = np.abs(t) < 1e-8
    quarter = np.abs(np.abs(t) - 1.0 / (4.0 * beta)) < 1e-8
    gen = ~(at0 | quarter)
    tg = t[gen]
    num = np.sin(np.pi * tg * (1 - beta)) + 4 * beta * tg * np.cos(np.pi * tg * (1 + beta))
    den = np.pi * tg * (1 - (4 * beta * tg) ** 2)
    out[gen] = num / den
    out[at0] = 1 - beta + 4 * beta / np.pi
    a = np.pi / (4 * beta)
    out[quarter] = beta / math.sqrt(2) * ((1 + 2 / np.pi) * np.sin(a) + (1 - 2 / np.pi) * np.cos(a))
    return out


def rrc_taps(rolloff: float, samples_per_symbol: int, span_symbols: int) -> np.ndarray:
    """Root-raised-cosine FIR taps of unit energy.

    Parameters
    ----------
    rolloff : float
        Excess bandwidth beta in [0, 1].
    samples_per_symbol : int
        Taps per symbol period (>= 1).
    span_symbols : int
        Length in symbol periods; the filter has ``span_symbols * samples_per_symbol + 1``
        taps (an odd count, symmetric about the centre tap, linear phase). Give an even span.

    Returns
    -------
    numpy.ndarray, float64
        ``h(n / samples_per_symbol)`` for n = -L/2 .. L/2 scaled so that ``sum(taps**2) == 1``,
        where h is the continuous pulse (T = 1, unit energy)::

            h(t) = [sin(pi t (1 - b)) + 4 b t cos(pi t (1 + b))] / [pi t (1 - (4 b t)^2)]

        with h(0) = 1 - b + 4 b / pi and, at t = +-1/(4 b),
        h = (b / sqrt 2) [(1 + 2/pi) sin(pi / 4b) + (1 - 2/pi) cos(pi / 4b)].
        Since ``sum h(n/sps)^2`` tends to ``sps``, ``taps * sqrt(samples_per_symbol)`` is the
        continuous pulse to within the (tiny) truncated tail energy.
        A cascade of two filters (transmit and matched) is a raised-cosine Nyquist pulse:
        zero ISI at multiples of the symbol period, up to truncation.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> h = quadkit.modulation.rrc_taps(0.35, 8, 32)
    >>> h.size, round(float(np.sum(h ** 2)), 12)
    (257, 1.0)
    >>> round(float(h[128] * np.sqrt(8)), 4)  # 1 - 0.35 + 4 * 0.35 / pi
    1.0956
    """
    rolloff = check_finite("rrc_taps", "rolloff", rolloff)
    if not 0.0 <= rolloff <= 1.0:
        raise ValueError(f"rrc_taps: rolloff={rolloff!r} must lie in [0, 1]")
    sps = check_positive_int("rrc_taps", "samples_per_symbol", samples_per_symbol)
    span = check_positive_int("rrc_taps", "span_symbols", span_symbols)
    half = (span * sps) // 2
    h = _rrc(np.arange(-half, half + 1) / sps, rolloff)
    return h / np.sqrt(np.sum(h ** 2))


# --------------------------------------------------------------------------- modulate

def _as_symbols(func: str, data: Any, scheme: str) -> np.ndarray:
    arr = np.asarray(data.values if isinstance(data, xr.DataArray) else data)
    if arr.ndim != 1 or arr.size == 0:
        raise ValueError(f"{func}: bits_or_symbols must be a non-empty 1-D array, got shape {arr.shape}")
    if arr.dtype.kind == "c":
        return arr.astype(np.complex128)
    if arr.dtype.kind in "biu" or (arr.dtype.kind == "f" and np.all(np.isin(arr, (0, 1)))):
        if not np.all((arr == 0) | (arr == 1)):
            raise ValueError(f"{func}: bits must be 0 or 1")
        k = _BITS[scheme]
        if arr.size % k:
            raise ValueError(
                f"{func}: {arr.size} bits is not a multiple of {k} bits per {scheme} symbol"
            )
        return _map_bits(arr.astype(np.uint8), scheme)
    raise ValueError(f"{func}: bits_or_symbols must be bits (0/1 integers) or complex symbols")


def _pulse_rows(frac: np.ndarray, offsets: np.ndarray, beta: float) -> np.ndarray:
    """``h(frac[i] + offsets[i, j])`` computed once per distinct fractional part.

    Symbol instants and output samples at a rational rate ratio share a few fractional
    positions (one for an integer samples-per-symbol), so the pulse is evaluated only for
    those; ``frac`` is rounded to 1e-9 (samples or symbols) to find repeats.
    """
    frac = np.round(frac, 9)
    uniq, inv = np.unique(frac, return_inverse=True)
    first = np.zeros(uniq.size, np.int64)
    first[inv[::-1]] = np.arange(inv.size)[::-1]  # a representative row of each value
    return _rrc(uniq[:, None] + offsets[first], beta)[inv]


def _synthesize(symbols: np.ndarray, sps: float, beta: float, span: int, n_out: int,
                first: float) -> np.ndarray:
    """sum_k a_k h(n/sps - first - k) for n < n_out (exact for any real sps)."""
    half = span / 2
    q = round(sps)
    if abs(sps - q) < 1e-12 and abs(first - half) < 1e-12 and span % 2 == 0:
        # integer samples per symbol: the same sums as an upsampling FIR
        from scipy.signal import upfirdn

        taps = _rrc(np.arange(-(span * q) // 2, (span * q) // 2 + 1) / q, beta)
        return upfirdn(taps, symbols, up=q)[:n_out].astype(np.complex128)
    out = np.zeros(n_out, np.complex128)
    n_taps = span + 2
    block = max(1, 2 ** 20 // n_taps)
    j = np.arange(n_taps)
    for s in range(0, n_out, block):
        n = np.arange(s, min(n_out, s + block))
        u = n / sps - first  # position in symbols
        fl = np.floor(u)
        fr = u - fl
        rel = np.floor(fr - half)[:, None] + j  # k - floor(u)
        k = fl.astype(np.int64)[:, None] + rel.astype(np.int64)
        h = _pulse_rows(fr, -rel, beta)
        ok = (k >= 0) & (k < symbols.size) & (np.abs(fr[:, None] - rel) <= half)
        h = np.where(ok, h, 0.0)
        out[s:s + n.size] = np.sum(h * symbols[np.clip(k, 0, symbols.size - 1)], axis=1)
    return out


def modulate(
    bits_or_symbols: Any,
    scheme: Scheme,
    *,
    symbol_rate: float,
    sample_rate: float,
    rolloff: float = 0.35,
    span_symbols: int = 32,
    power_dbfs: float = -12.0,
    offset_hz: float = 0.0,
    phase_rad: float = 0.0,
    center_frequency: float = 0.0,
    dtype: Any = np.complex64,
    **metadata: Any,
) -> xr.DataArray:
    """Bits or symbols to a root-raised-cosine shaped capture.

    Parameters
    ----------
    bits_or_symbols : array_like, 1-D
        Bits (0/1 integers or booleans; a multiple of the bits per symbol, mapped by
        :func:`constellation`'s 3GPP TS 38.211 mapper) or complex symbols used as given.
    scheme : str
        One of :data:`SCHEMES`.
    symbol_rate, sample_rate : float
        Hz. Any ratio is allowed (the pulse is evaluated at the exact sample times), but the
        sample rate should exceed ``(1 + rolloff) * symbol_rate`` to hold the whole spectrum.
    rolloff : float
        RRC excess bandwidth beta in [0, 1].
    span_symbols : int
        Pulse length in symbols (even); the pulse is truncated beyond +-span/2.
    power_dbfs : float
        Mean power of the modulated stream (unit-energy symbols). The default -12 dBFS leaves
        headroom for the crest factor of QAM (peaks some 6-9 dB above the mean) below full
        scale.
    offset_hz : float
        Carrier offset of the burst from ``center_frequency`` (baseband Hz), e.g. to emulate
        a transmitter's frequency error. The phase is computed from the sample index.
    phase_rad : float
        Carrier phase at sample 0.
    center_frequency : float
        Hz, carried into the capture's attrs.
    dtype : complex64 or complex128

    Returns
    -------
    xarray.DataArray
        A capture of ``round((n_symbols - 1 + span_symbols) * fs / Rs) + 1`` samples: symbol k
        sits at time ``(span_symbols / 2 + k) / symbol_rate``, with the pulse tails before the
        first and after the last symbol. attrs record ``modulation_scheme``, ``symbol_rate``,
        ``rolloff``, ``span_symbols``, ``n_symbols``, ``first_symbol_s`` and an annotation
        covering the burst and its occupied band ``(1 + rolloff) * symbol_rate``.

    Warnings
    --------
    A modulated waveform sent to a transmitter is a radio emission: respect your local radio
    regulations and licensed practice (frequency, power, bandwidth, who may transmit), test on
    a cabled set-up with attenuators rather than over the air, and check the input power
    limits of the receiver (or analyser) before connecting it.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> bits = np.random.default_rng(1).integers(0, 2, 4 * 2000)
    >>> cap = quadkit.modulation.modulate(bits, "16qam", symbol_rate=1e6, sample_rate=8e6,
    ...                                   power_dbfs=0.0)
    >>> cap.dtype, cap.sizes["time"], cap.attrs["modulation_scheme"]
    (dtype('complex64'), 16249, '16qam')
    >>> p = np.mean(np.abs(cap.values[128:-128].astype(complex)) ** 2)  # skip the tails
    >>> round(float(10 * np.log10(p)), 2)  # 0 dBFS, to the randomness of 2000 symbols
    -0.03
    """
    scheme = _scheme("modulate", scheme)
    fs = check_positive("modulate", "sample_rate", sample_rate)
    rs = check_positive("modulate", "symbol_rate", symbol_rate)
    beta = check_finite("modulate", "rolloff", rolloff)
    if not 0.0 <= beta <= 1.0:
        raise ValueError(f"modulate: rolloff={rolloff!r} must lie in [0, 1]")
    span = check_positive_int("modulate", "span_symbols", span_symbols, minimum=2)
    power_dbfs = check_finite("modulate", "power_dbfs", power_dbfs)
    offset_hz = check_finite("modulate", "offset_hz", offset_hz)
    phase_rad = check_finite("modulate", "phase_rad", phase_rad)
    dtype = np.dtype(dtype)
    if dtype not in (np.complex64, np.complex128):
        raise ValueError(f"modulate: dtype={dtype} must be complex64 or complex128")
    if abs(offset_hz) > fs / 2:
        raise ValueError(f"modulate: offset_hz={offset_hz} lies outside +-sample_rate/2")
    symbols = _as_symbols("modulate", bits_or_symbols, scheme)
    sps = fs / rs
    n_out = int(round((symbols.size - 1 + span) * sps)) + 1
    x = _synthesize(symbols, sps, beta, span, n_out, span / 2)
    full_scale = float(metadata.get("full_scale", 1.0))
    x *= full_scale * 10 ** (power_dbfs / 20) * np.exp(1j * phase_rad)
    if offset_hz:
        x *= oscillator(offset_hz / fs, 0, n_out, np.complex128)
    first_s = span / 2 / rs
    band = (1 + beta) * rs / 2
    cf = float(center_frequency)
    annotation = {
        "start_sample": int(math.floor((span / 2 - 0.5) * sps)),
        "sample_count": int(round(symbols.size * sps)),
        "lower_frequency_hz": cf + offset_hz - band,
        "upper_frequency_hz": cf + offset_hz + band,
        "label": f"{scheme} burst",
        "comment": f"{symbols.size} symbols at {rs:g} Bd, RRC rolloff {beta:g}",
    }
    attrs = {
        "description": f"{scheme} burst, {symbols.size} symbols at {rs:g} Bd, RRC rolloff {beta:g}",
        "modulation_scheme": scheme, "symbol_rate": rs, "rolloff": beta,
        "span_symbols": span, "n_symbols": int(symbols.size), "first_symbol_s": first_s,
        "annotations": list(metadata.pop("annotations", [])) + [annotation],
    }
    attrs.update(metadata)
    return _capture.capture(x.astype(dtype), sample_rate=fs, center_frequency=cf, **attrs)


# --------------------------------------------------------------------------- analysis kernels

def _mf_at(xs: np.ndarray, u: np.ndarray, sps: float, beta: float, half_span: float) -> np.ndarray:
    """Matched-filter (RRC) outputs of each row of ``xs`` at fractional sample positions ``u``.

    ``y(u) = (1/sps) sum_n x[n] h((u - n) / sps)`` with the continuous pulse evaluated at the
    exact offsets, so any samples-per-symbol ratio and any timing work without interpolation;
    samples outside the capture count as zero. A unit-energy symbol gives an output of 1.
    """
    n_x = xs.shape[-1]
    hs = half_span * sps
    n_taps = int(math.floor(2 * hs)) + 2
    out = np.zeros((xs.shape[0], u.size), np.complex128)
    block = max(1, 2 ** 19 // n_taps)
    j = np.arange(n_taps)
    for s in range(0, u.size, block):
        uu = u[s:s + block]
        fl = np.floor(uu)
        fr = uu - fl
        rel = np.ceil(fr - hs)[:, None] + j  # n - floor(u)
        n = fl.astype(np.int64)[:, None] + rel.astype(np.int64)
        d = (fr[:, None] - rel) / sps
        h = _pulse_rows(fr / sps, -rel / sps, beta)
        ok = (n >= 0) & (n < n_x) & (np.abs(d) <= half_span)
        h = np.where(ok, h, 0.0) / sps
        idx = np.clip(n, 0, n_x - 1)
        for r in range(xs.shape[0]):
            out[r, s:s + uu.size] = np.einsum("ij,ij->i", xs[r][idx], h)
    return out


def _tone_fit(w: np.ndarray, center: float = 0.0, halfwidth: float = 0.5) -> tuple[float, complex, float]:
    """Maximum-likelihood frequency of one complex tone in ``w`` (cycles per sample).

    Periodogram peak within ``center +- halfwidth`` (4x zero padding), refined by Newton
    steps on the continuous periodogram (Rife & Boorstyn 1974, memory). Returns the frequency, the complex
    amplitude referred to the middle sample, and the ratio of the peak to the median of the
    periodogram in the search window (a detection statistic: about ln(n)/ln(2) for noise).
    """
    n = w.size
    k = np.arange(n) - (n - 1) / 2
    if halfwidth * n <= 0.5:
        # Refinement from a start already within a fraction of a bin: Newton steps only.
        fr, ratio, step_max, steps = float(center), math.nan, 0.5 / n, 3
    else:
        nfft = max(1024, 1 << int(math.ceil(math.log2(4 * n))))
        spec = np.abs(np.fft.fft(w, nfft)) ** 2
        f = np.fft.fftfreq(nfft)
        dist = (f - center + 0.5) % 1.0 - 0.5
        mask = np.abs(dist) <= halfwidth
        if not mask.any():
            mask[np.argmin(np.abs(dist))] = True
        cand = np.flatnonzero(mask)
        m = cand[np.argmax(spec[cand])]
        ratio = float(spec[m] / max(np.median(spec[cand]), 1e-300))
        # Newton from the padded peak (within 1/8 bin, inside the concave main lobe).
        fr, step_max, steps = float(f[m]), 1.0 / nfft, 4
    # Newton steps on P(f) = |S(f)|^2, S(f) = sum w_k exp(-j 2 pi f k).
    for _ in range(steps):
        e = w * np.exp(-2j * np.pi * fr * k)
        s0 = e.sum()
        s1 = np.dot(e, -2j * np.pi * k)
        s2 = np.dot(e, -(2 * np.pi * k) ** 2)
        d1 = 2 * (np.conj(s0) * s1).real
        d2 = 2 * (abs(s1) ** 2 + (np.conj(s0) * s2).real)
        if not d2 < 0:
            break
        step = float(np.clip(-d1 / d2, -step_max, step_max))
        fr += step
        if abs(step) < 1e-9 / n:
            break
    amp = complex(np.dot(w, np.exp(-2j * np.pi * fr * k)) / n)
    return fr, amp, ratio


def _moving_mean(p: np.ndarray, width: int) -> np.ndarray:
    c = np.concatenate(([0.0], np.cumsum(p)))
    lo = np.clip(np.arange(p.size) - width // 2, 0, p.size)
    hi = np.clip(lo + width, 0, p.size)
    return (c[hi] - c[lo]) / np.maximum(hi - lo, 1)


def _find_burst(x: np.ndarray, sps: float) -> tuple[int, int, bool]:
    """A generous sample range [start, stop) around the strongest burst, and whether the
    capture holds silence at all.

    ``x`` is the capture less its IQ origin offset (the mean), so that a receiver's LO
    leakage, present in the silence as well, neither hides the burst nor fakes one. The power
    averaged over 16 symbols (its relative spread is then about 1/4 even for
    256-QAM) is split at the geometric mean of its 1st and 99th percentiles when those differ
    by more than 10 dB; otherwise the capture is taken as continuous. Runs above the split
    that are closer than two averaging lengths are merged (dips of the signal's own power),
    the longest is the burst, widened by the averaging length and two symbols on each side.
    The exact first and last symbols are found later from the symbols themselves.
    """
    p = np.abs(x) ** 2
    if not np.any(p > 0):  # a constant capture: nothing but the origin offset
        return 0, x.size, False
    width = max(1, min(int(round(16 * sps)), x.size // 8))
    ps = _moving_mean(p, width)
    lo, hi = np.percentile(ps, [1, 99])
    if hi <= 10 * lo:
        return 0, x.size, False
    thr = math.sqrt(max(lo, hi * 1e-6) * hi)
    above = np.concatenate(([False], ps > thr, [False]))
    edges = np.flatnonzero(np.diff(above.astype(np.int8)))
    starts, stops = list(edges[0::2]), list(edges[1::2])
    runs = [[starts[0], stops[0]]]
    for st, sp in zip(starts[1:], stops[1:]):
        if st - runs[-1][1] < 2 * width:
            runs[-1][1] = sp
        else:
            runs.append([st, sp])
    a, b = max(runs, key=lambda r: r[1] - r[0])
    pad = width + int(math.ceil(2 * sps))
    return max(0, int(a) - pad), min(x.size, int(b) + pad), True


def _trim(y: np.ndarray, points: np.ndarray, sigma2: float) -> tuple[int, int]:
    """First and one-past-last symbol of a burst among normalised symbol-spaced outputs.

    Per instant, the log-likelihood ratio of "a constellation point plus complex Gaussian
    noise of variance sigma2" against "noise alone"; the burst starts where the running sum
    of the ratios is lowest and ends where the running sum from the end is lowest (Page's
    CUSUM change-point test, memory).
    """
    from scipy.special import logsumexp

    llr = np.empty(y.size)
    block = max(1, 2 ** 20 // points.size)
    for s in range(0, y.size, block):
        yy = y[s:s + block]
        d2 = np.abs(yy[:, None] - points[None, :]) ** 2
        llr[s:s + block] = logsumexp(-d2 / sigma2, axis=1) - math.log(points.size) \
            + np.abs(yy) ** 2 / sigma2
    i0 = int(np.argmin(np.concatenate(([0.0], np.cumsum(llr)))))
    j = int(np.argmin(np.concatenate(([0.0], np.cumsum(llr[::-1])))))
    return i0, y.size - j


def _decide(y: np.ndarray, points: np.ndarray, scheme: str = "") -> np.ndarray:
    """Nearest constellation point of each of ``y``.

    Square QAM and QPSK are sliced per axis (levels +-1, +-3, ... over sqrt(norm)), BPSK on
    its diagonal; the result equals the nearest of ``points``.
    """
    norm = {"qpsk": 2.0, "16qam": 10.0, "64qam": 42.0, "256qam": 170.0}.get(scheme)
    if norm is not None:
        top = math.isqrt(points.size) - 1
        scale = math.sqrt(norm)

        def axis(v: np.ndarray) -> np.ndarray:
            return np.clip(2 * np.floor(v * scale / 2) + 1, -top, top) / scale

        return axis(y.real) + 1j * axis(y.imag)
    if scheme in ("bpsk", "pi/2-bpsk"):
        diag = (1 + 1j) / math.sqrt(2)
        return np.where((y * np.conj(diag)).real >= 0, diag, -diag)
    out = np.empty_like(y)
    block = max(1, 2 ** 20 // points.size)
    for s in range(0, y.size, block):
        d = np.abs(y[s:s + block, None] - points[None, :])
        out[s:s + block] = points[np.argmin(d, axis=1)]
    return out


def _line_fraction(y: np.ndarray) -> tuple[float, float]:
    """Fraction of the power of ``y`` held by its strongest spectral line, and its frequency.

    ``max_f |mean_k y_k exp(-j 2 pi f k)|^2 / mean_k |y_k|^2`` over all f (cycles per
    symbol), found by :func:`_tone_fit`: 1 for a complex exponential (a carrier at any
    frequency offset), about ln(N)/N for N independent zero-mean symbols.
    """
    f, amp, _ = _tone_fit(y, 0.0, 0.5)
    total = float(np.mean(np.abs(y) ** 2))
    return (abs(amp) ** 2 / total if total > 0 else 1.0), f


def _line_limit(n: int, real: bool) -> float:
    """Largest line fraction (see :func:`_line_fraction`) accepted from ``n`` data symbols.

    For independent zero-mean symbols (Gaussian approximation) the fraction of one DFT bin
    is Beta(1, n - 1) distributed for complex symbols and Beta(1/2, (n - 1)/2) for symbols on
    one axis (BPSK, pi/2-BPSK rotated back). The limit is the point exceeded with probability
    1e-6 / (4 n) -- n bins, times 4 for the off-bin maximum -- so that random data is
    refused with a probability of about 1e-6; and at least 1/2 (a line with more power than
    all the rest is a carrier stronger than the modulation, whatever the data).
    """
    from scipy.stats import beta as beta_dist

    a, b = (0.5, (n - 1) / 2) if real else (1.0, n - 1.0)
    return max(0.5, float(beta_dist.isf(1e-6 / (4 * n), a, b)))


def _align(meas: np.ndarray, ref: np.ndarray) -> tuple[int, int, int]:
    """Lag and overlap of ``ref`` against ``meas`` maximising |sum meas_k conj(ref_{k+lag})|."""
    n = meas.size + ref.size - 1
    nfft = 1 << int(math.ceil(math.log2(n)))
    corr = np.fft.ifft(np.fft.fft(meas, nfft) * np.conj(np.fft.fft(ref, nfft)))
    # corr[j] = sum_k meas[k] conj(ref[k - j]); lag = -j
    j = np.concatenate((np.arange(0, meas.size), np.arange(-(ref.size - 1), 0)))
    vals = np.concatenate((corr[:meas.size], corr[nfft - (ref.size - 1):] if ref.size > 1 else []))
    best = int(j[np.argmax(np.abs(vals))])
    lag = -best
    k0 = max(0, -lag)
    k1 = min(meas.size, ref.size - lag)
    return lag, k0, k1


def _analyze_one(x: np.ndarray, scheme: str, fs: float, rs: float, beta: float,
                 ref: np.ndarray | None, max_offset_hz: float, remove_iq_offset: bool) -> dict:
    sps = fs / rs
    n_x = x.size
    if not np.any(x != 0):
        raise MeasurementError("analyze: the capture holds no signal (all samples are zero)")
    pts = _points(scheme)
    pi2 = scheme == "pi/2-bpsk"
    m_pow = _POWER[scheme]
    real = scheme in ("bpsk", "pi/2-bpsk")  # symbols on one (rotating) axis
    ref_is_line = ref is not None and _line_fraction(ref)[0] > _line_limit(ref.size, real)
    # 0. The IQ origin offset (LO leakage of a zero-IF receiver: a line at 0 Hz of the
    #    capture, however strong) is removed before any recovery step: it would swamp the
    #    M-th power line (its M-th power is a line at 0 Hz), bias the timing and the blind
    #    gain. Zero-mean data leave the mean of the samples at the offset, up to the data's
    #    own share: a signal of power P and about one symbol rate of bandwidth has a mean
    #    of variance ~P / N over N symbols. The mean over the capture serves to find the
    #    burst, the mean over the burst (with its margin) is the first estimate, and the
    #    fits of step 3 refine it jointly with the carrier. A mean within 4 sigma of that
    #    spread is not used (an exact zero is a better start than data self-noise of 1/sqrt(N)
    #    of the amplitude, which would upset the first decisions on dense constellations).
    def significant_mean(seg: np.ndarray) -> complex:
        m = complex(np.mean(seg))
        p_rest = float(np.mean(np.abs(seg - m) ** 2))
        return m if abs(m) ** 2 > 16 * p_rest * sps / seg.size else 0j

    a, b, burst = _find_burst(x - significant_mean(x), sps)
    dc0 = significant_mean(x[a:b])
    x0 = x - dc0 if dc0 else x
    u_lo, u_hi = float(a), float(b - 1)
    if a == 0:  # the signal runs into the capture's edge: keep the matched filter inside
        u_lo = max(u_lo, _EST_SPAN * sps)
    if b == n_x:
        u_hi = min(u_hi, n_x - 1 - _EST_SPAN * sps)
    if (u_hi - u_lo) / sps + 1 < _MIN_SYMBOLS:
        raise MeasurementError(
            f"analyze: only about {max(0, int((u_hi - u_lo) / sps + 1))} symbols to analyse, "
            f"need at least {_MIN_SYMBOLS}; give a longer capture or burst"
        )
    def instants(sig: np.ndarray) -> tuple[np.ndarray, float]:
        # Symbol timing from the symbol-rate line of the squared magnitude of the matched
        # filter output (Oerder & Meyr 1988, memory); it does not depend on the carrier
        # phase. With >= 4 samples per symbol the output at every sample (FFT convolution)
        # holds the line without aliasing; below that, four points per symbol are computed.
        if sps >= 4:
            from scipy.signal import fftconvolve

            half_taps = int(math.floor(_EST_SPAN / 2 * sps))
            taps = _rrc(np.arange(-half_taps, half_taps + 1) / sps, beta) / sps
            n0, n1 = int(math.ceil(u_lo)), int(math.floor(u_hi))
            r = fftconvolve(sig, taps, mode="same")[n0:n1 + 1]
            pos = np.arange(n0, n1 + 1, dtype=np.float64)
        else:
            pos = np.arange(u_lo, u_hi, sps / 4.0)
            r = _mf_at(sig[None, :], pos, sps, beta, _EST_SPAN / 2)[0]
        terms = np.abs(r) ** 2 * np.exp(-2j * np.pi * pos / sps)
        first = -np.angle(np.sum(terms)) / (2 * np.pi) * sps
        period = sps
        # A symbol clock off the nominal rate makes the timing phase drift linearly: measure
        # it per block of 128 symbols and keep the drift if it is significant (> 4 sigma of
        # its least-squares fit).
        per_block = int(round(128 * sps / (pos[1] - pos[0]))) if pos.size > 1 else pos.size
        n_blocks = pos.size // max(per_block, 1)
        if n_blocks >= 4:
            lines = terms[: n_blocks * per_block].reshape(n_blocks, per_block).sum(axis=1)
            centres = pos[: n_blocks * per_block].reshape(n_blocks, per_block).mean(axis=1)
            tau = np.unwrap(-np.angle(lines)) / (2 * np.pi) * sps  # samples, mod sps
            design = np.stack((np.ones(n_blocks), centres), axis=1)
            coef, res, *_ = np.linalg.lstsq(design, tau, rcond=None)
            resid = tau - design @ coef
            sigma2 = float(np.sum(resid ** 2)) / max(n_blocks - 2, 1)
            var_slope = sigma2 / max(float(np.sum((centres - centres.mean()) ** 2)), 1e-300)
            if coef[1] ** 2 > 16 * var_slope and abs(coef[1]) < 0.01:
                # tau(n) = u0 + (n - u0) s: instants u0 + k sps / (1 - s)
                period = sps / (1 - coef[1])
                first_d = coef[0] / (1 - coef[1])
                # keep the drift only if it raises the matched-filter output energy (the
                # energy is largest at the right instants; OM self-noise can fake a drift)
                cand = [grid_of(first, sps), grid_of(first_d, period)]
                energy = [np.mean(np.abs(_mf_at(sig[None, :], c, sps, beta, _EST_SPAN / 2)) ** 2)
                          for c in cand]
                if energy[1] > energy[0]:
                    return cand[1], period
                period = sps
        return grid_of(first, period), period

    def grid_of(first: float, period: float) -> np.ndarray:
        k_lo = math.ceil((u_lo - first) / period)
        k_hi = math.floor((u_hi - first) / period)
        return first + period * np.arange(k_lo, k_hi + 1)

    # 1. Timing, then the coarse carrier frequency from the line of the M-th power of the
    #    symbols (Mengali & D'Andrea 1997, memory); pi/2-BPSK is first rotated back to BPSK.
    u, _ = instants(x0)
    zc = _mf_at(x0[None, :], u, sps, beta, _EST_SPAN / 2)[0]
    if pi2:
        zc = zc * np.conj(_pi2_rotation(zc.size))
    half = m_pow * max_offset_hz / rs
    fr, _, ratio = _tone_fit(zc ** m_pow, 0.0, min(half, 0.5))
    # The same line test as in step 4b below, on these first symbols: a tone outside the
    # band that leaks through the short estimation filter is a line here and yields an
    # M-th power line, yet the full matched filter of the later steps suppresses it, so
    # that only noise would be "measured" there. Kept for after the fits (4b).
    rho1, f1 = _line_fraction(zc)
    limit1 = _line_limit(zc.size, real)
    line1 = rho1 > limit1 and not ref_is_line

    def carrier_error(f_hz: float, rho: float, n_sym: int, limit: float,
                      tail: str) -> MeasurementError:
        return MeasurementError(
            f"analyze: no {scheme} modulation found: the signal is an unmodulated carrier "
            f"(one tone at {f_hz:.6g} Hz, modulo the symbol rate, holds {100 * rho:.1f} % of "
            f"the power of the {n_sym} symbols; random data would put at most "
            f"{100 * limit:.1f} % in one line){tail}"
        )
    n_ind = max(2.0, zc.size * 2 * min(half, 0.5))
    if ratio < (math.log(n_ind) + 6.0) / math.log(2.0):
        # Nothing modulated is left once the origin offset is removed. If the offset holds
        # most of the in-band power (a unit-energy RRC matched filter passes a constant
        # with gain H(0) = 1), the capture is a carrier at the centre frequency.
        if abs(dc0) ** 2 > float(np.mean(np.abs(zc) ** 2)):
            if ref_is_line:
                raise MeasurementError(
                    "analyze: the reference symbols form a carrier at the capture's centre "
                    "frequency, which cannot be told from an IQ origin offset; shift the "
                    "carrier off centre or use a modulated reference"
                )
            share = abs(dc0) ** 2 / (abs(dc0) ** 2 + float(np.mean(np.abs(zc) ** 2)))
            raise MeasurementError(
                f"analyze: no {scheme} modulation found: the signal is an unmodulated carrier "
                f"(one tone at 0 Hz, the capture's centre, i.e. an IQ origin offset, holds "
                f"{100 * share:.1f} % of the in-band power, and no {m_pow}th-power carrier "
                "line of modulated symbols is left once it is removed)"
            )
        if line1:
            raise carrier_error((f1 + 0.5) % 1.0 * rs - rs / 2, rho1, zc.size, limit1, "")
        raise MeasurementError(
            f"analyze: no {scheme} signal found (the {m_pow}th-power carrier line of the "
            f"symbols is not above the noise: peak/median {ratio:.1f}); check the scheme, "
            "symbol_rate and rolloff"
        )
    df1 = fr * rs / m_pow
    rot = oscillator(-df1 / fs, 0, n_x, np.complex128)
    x1 = np.stack((x * rot, rot))  # signal and the capture's DC, both derotated
    # 2. Timing again on the derotated signal (origin offset removed), and the symbols with
    #    the full matched filter. The symbols z keep the offset; the model is
    #    z = gain * ideal * exp(j 2 pi nu k) + dc * dc_reg, dc starting at the mean.
    u, period = instants(x0 * rot)
    z, dc_reg = _mf_at(x1, u, sps, beta, _MF_SPAN / 2)
    idx = np.arange(z.size)  # symbol index; pi/2-BPSK parity and the phase ramp use it
    m_ref = np.mean(pts ** m_pow)

    def parity_rot(ix: np.ndarray) -> np.ndarray:
        return np.where(ix % 2 == 1, 1j, 1.0 + 0j)

    def decide(y: np.ndarray, ix: np.ndarray) -> np.ndarray:
        if pi2:
            rr = parity_rot(ix)
            return _decide(y * np.conj(rr), pts, scheme) * rr
        return _decide(y, pts, scheme)

    def normalise(sel: slice, nu: float, gain: complex, dc: complex) -> np.ndarray:
        return (z[sel] - dc * dc_reg[sel]) / (gain * np.exp(2j * np.pi * nu * idx[sel]))

    def fit(sel: slice, ideal: np.ndarray, nu: float, dc: complex,
            first_pass: bool = False) -> tuple[float, complex, complex]:
        # Maximum-likelihood frequency of z * conj(ideal), then least squares of
        # z = gain * ideal * exp(j 2 pi nu k) + dc * (matched-filtered, derotated DC).
        zz, uu, kk = z[sel], dc_reg[sel], idx[sel]
        w = (zz - dc * uu) * np.conj(ideal)
        nu, _, _ = _tone_fit(w, nu, 3.0 / kk.size if first_pass else 0.0)
        a_col = ideal * np.exp(2j * np.pi * nu * kk)
        # normal equations of the two-column least squares (well conditioned: the DC column
        # is nearly orthogonal to the zero-mean symbols)
        gram = np.array([[np.vdot(a_col, a_col), np.vdot(a_col, uu)],
                         [np.vdot(uu, a_col), np.vdot(uu, uu)]])
        rhs = np.array([np.vdot(a_col, zz), np.vdot(uu, zz)])
        coef = np.linalg.solve(gram, rhs)
        return nu, complex(coef[0]), complex(coef[1])

    def converge(sel: slice, nu: float, gain: complex, dc: complex, n_iter: int):
        for i in range(n_iter):
            ideal = decide(normalise(sel, nu, gain, dc), idx[sel])
            nu, gain, dc = fit(sel, ideal, nu, dc, first_pass=i == 0)
        return nu, gain, dc, decide(normalise(sel, nu, gain, dc), idx[sel])

    # 3. Fine frequency and phase from the M-th power of all instants (those outside a burst
    #    add only noise), the gain's magnitude from the middle half (inside any burst), then
    #    decision-directed fits with the IQ offset over windows growing from the middle, so
    #    that the phase error left by the previous stage stays well inside a decision
    #    region even for 256-QAM.
    n = z.size
    mid = slice(n // 4, n - n // 4) if n >= 4 * _MIN_SYMBOLS else slice(0, n)
    z0 = z - dc0 * dc_reg
    zb = z0 * np.conj(parity_rot(idx)) if pi2 else z0
    nu_m, _, _ = _tone_fit(zb ** m_pow, 0.0, 0.5)
    centre = (n - 1) / 2  # phase referred to the middle: uncorrelated with the frequency error
    amp = np.mean(zb ** m_pow * np.exp(-2j * np.pi * nu_m * (idx - centre)))
    nu = nu_m / m_pow
    gain = math.sqrt(np.mean(np.abs(z0[mid]) ** 2) / np.mean(np.abs(pts) ** 2)) * \
        np.exp(1j * ((np.angle(amp) - np.angle(m_ref)) / m_pow - 2 * np.pi * nu * centre))
    # The M-th power phase of 300 256-QAM symbols scatters by ~3 deg (self-noise), more than
    # decisions on the outer points tolerate: search the ambiguity interval (+-180/M deg) in
    # 0.5 deg steps for the least decision error over (at most) the middle 256 symbols. Only
    # the inner half (by magnitude) counts: the blind gain is a few % off, which moves the
    # outer points across decision boundaries but the inner ones hardly.
    search = np.arange(max(0, n // 2 - 128), min(n, n // 2 + 128))
    y0 = normalise(slice(search[0], search[-1] + 1), nu, gain, dc0)
    inner = np.abs(y0) <= np.median(np.abs(y0))
    y0, ix0 = y0[inner], search[inner]
    trial = np.deg2rad(np.arange(-180 / m_pow, 180 / m_pow, 0.5))
    cost = [np.sum(np.abs(y0 * np.exp(-1j * t) - decide(y0 * np.exp(-1j * t), ix0)) ** 2)
            for t in trial]
    gain = gain * np.exp(1j * trial[int(np.argmin(cost))])
    dc = dc0
    length = max(4 * _MIN_SYMBOLS, n // 16)
    while True:
        win = slice(max(0, n // 2 - length // 2), min(n, n // 2 + length // 2))
        nu, gain, dc, ideal = converge(win, nu, gain, dc, 3)
        if length >= n:
            break
        length *= 2
    sigma2 = max(float(np.mean(np.abs(normalise(mid, nu, gain, dc)
                                      - decide(normalise(mid, nu, gain, dc), idx[mid])) ** 2)), 1e-10)
    # 4. The burst's first and last symbols: instants outside carry only noise.
    y = normalise(slice(None), nu, gain, dc)
    i0, i1 = _trim(y * np.conj(parity_rot(idx)) if pi2 else y, pts, sigma2)
    if i1 - i0 < _MIN_SYMBOLS:
        raise MeasurementError(
            f"analyze: only {max(0, i1 - i0)} symbols found, need at least {_MIN_SYMBOLS}"
        )
    sel = slice(i0, i1)
    burst = burst or i0 + (n - i1) >= 4
    nu, gain, dc, ideal = converge(sel, nu, gain, dc, 2)
    # 4b. Is the signal modulated at all? An unmodulated carrier at any offset makes the
    #    corrected symbols one complex exponential, which the decisions would otherwise
    #    "measure" as excellent quality (a tone at 0 Hz decides to one point, at Rs/4 to
    #    points stepping 90 deg per symbol). Refused unless the reference is such a line too
    #    (then the data-aided EVM below measures the carrier against it).
    y_sel = normalise(sel, nu, gain, dc)
    rho, f_line = _line_fraction(y_sel)
    limit = _line_limit(y_sel.size, real)
    if rho > limit and not ref_is_line:
        dec = decide(y_sel, idx[sel])
        used = np.unique(np.round(dec * np.conj(parity_rot(idx[sel])) if pi2 else dec, 9)).size
        f_hz = df1 + ((f_line + nu + 0.5) % 1.0 - 0.5) * fs / period
        raise carrier_error(f_hz, rho, y_sel.size, limit, f" and the decided symbols use "
                            f"{used} of the {pts.size} {scheme} points")
    if line1:  # a line in the first symbols only (see step 1): out-of-band leakage
        raise carrier_error((f1 + 0.5) % 1.0 * rs - rs / 2, rho1, zc.size, limit1,
                            " before the full matched filter, which leaves only noise")
    lag = None
    if ref is not None:
        lag, k0, k1 = _align(normalise(sel, nu, gain, dc), ref)
        if k1 - k0 < _MIN_SYMBOLS:
            raise MeasurementError(
                f"analyze: the reference overlaps only {max(0, k1 - k0)} measured symbols"
            )
        ideal = ref[k0 + lag:k1 + lag]
        sel = slice(i0 + k0, i0 + k1)
        for i in range(2):
            nu, gain, dc = fit(sel, ideal, nu, dc, first_pass=i == 0)
    # The IQ origin offset must be separable from the symbols: it is not when the ideal
    # symbols are themselves a carrier at the capture's centre (a constant reference).
    # Coherence = squared correlation of the two regressors; above 1/2 the offset's least-
    # squares variance is more than doubled and its split from the carrier arbitrary
    # (random data gives about 1/N).
    a_col = ideal * np.exp(2j * np.pi * nu * idx[sel])
    u_col = dc_reg[sel]
    coherence = abs(np.vdot(a_col, u_col)) ** 2 / max(
        float(np.vdot(a_col, a_col).real * np.vdot(u_col, u_col).real), 1e-300)
    if coherence > 0.5:
        raise MeasurementError(
            f"analyze: the {'reference' if ref is not None else 'decided'} symbols form a "
            "carrier at the capture's centre frequency, which cannot be told from an IQ "
            "origin offset; shift the carrier off centre or use a modulated reference"
        )
    z, dc_reg, u, kk = z[sel], dc_reg[sel], u[sel], idx[sel]
    # The IQ offset is always fitted (and reported); removing it from the errors is optional.
    meas = (z - (dc * dc_reg if remove_iq_offset else 0)) / (gain * np.exp(2j * np.pi * nu * kk))
    err = meas - ideal
    ref_rms = math.sqrt(float(np.mean(np.abs(ideal) ** 2)))
    evm = np.abs(err) / ref_rms * 100
    evm_rms = math.sqrt(float(np.sum(np.abs(err) ** 2) / np.sum(np.abs(ideal) ** 2))) * 100
    phase_err = np.degrees(np.angle(meas * np.conj(ideal)))
    mag_err = (np.abs(meas) - np.abs(ideal)) / ref_rms * 100
    # Gain of the matched filter for a symbol at the mean fractional timing: converts the
    # fitted symbol gain back to the capture's amplitude for the IQ-offset ratio.
    frac = float(np.mean(u % 1.0))
    n_t = np.arange(-int(_MF_SPAN / 2 * sps) - 1, int(_MF_SPAN / 2 * sps) + 2)
    d = (frac - n_t) / sps
    g_mf = float(np.sum(_rrc(d[np.abs(d) <= _MF_SPAN / 2], beta) ** 2) / sps)
    sig_amp = abs(gain) / g_mf * ref_rms
    iq_db = 20 * math.log10(abs(dc) / sig_amp) if dc != 0 else -math.inf
    return {
        "evm_rms_percent": evm_rms,
        "evm_peak_percent": float(np.max(evm)),
        "mer_db": -20 * math.log10(evm_rms / 100) if evm_rms > 0 else math.inf,
        "frequency_error_hz": df1 + nu * rs,
        "iq_offset_db": iq_db,
        "phase_error_rms_deg": math.sqrt(float(np.mean(phase_err ** 2))),
        "magnitude_error_rms_percent": math.sqrt(float(np.mean(mag_err ** 2))),
        "symbol_count": int(z.size),
        "clock_ppm": (sps / period - 1) * 1e6,
        "burst": burst, "burst_start": u[0] / fs - 0.5 / rs, "burst_duration": z.size / rs,
        "measured": meas, "ideal": ideal, "evm": evm, "phase_err": phase_err,
        "mag_err": mag_err, "time": u / fs, "lag": lag,
    }


def analyze(
    cap: xr.DataArray,
    scheme: Scheme,
    *,
    symbol_rate: float,
    rolloff: float = 0.35,
    reference: Any = None,
    max_offset_hz: float | None = None,
    remove_iq_offset: bool = True,
) -> xr.Dataset:
    """Demodulate an RRC-shaped capture and measure its modulation quality.

    Works blind: the carrier frequency offset (up to ``max_offset_hz``), carrier phase,
    symbol timing, gain and IQ origin offset are unknown. The steps, per channel:

    0. The IQ origin offset (a line at the capture's 0 Hz, such as the LO leakage of a
       zero-IF receiver, which may be stronger than the signal) is estimated by the mean of
       the samples and removed before anything else, since it would swamp the M-th power
       line and upset timing and gain; after a carrier frequency offset it stays at 0 Hz
       while the signal moves. The mean over the whole capture is removed for the burst
       detection, the mean over the burst is the start of the joint fit in step 4. A mean
       within 4 sigma of the data's own contribution (variance about P / N for N symbols of
       power P) is not used.
    1. Burst detection by energy. When the capture holds silence (the power averaged over 16
       symbols varies by more than 10 dB) the longest burst, with a margin, is kept;
       otherwise the whole capture, less 8 symbols at each edge.
    2. Symbol timing from the symbol-rate line of the squared magnitude of the RRC
       matched-filter output (Oerder & Meyr), which does not depend on the carrier, with
       its linear drift (see below).
    3. Coarse carrier frequency from the line of the M-th power of the symbols (M = 2 for
       BPSK and for pi/2-BPSK rotated back, 4 for QPSK and square QAM; Mengali & D'Andrea),
       searched within ``max_offset_hz``; then the timing again on the derotated capture and
       the symbols by matched filtering evaluated at the exact symbol instants (any ratio of
       sample rate to symbol rate, no interpolation).
    4. Fine frequency and phase: M-th power of the symbols, a search of the phase ambiguity
       interval, then decision-directed maximum-likelihood fits over windows growing from
       the middle of the burst, jointly with a complex gain (normalising to the
       constellation's mean energy) and the IQ origin offset (modelled at the capture's
       0 Hz, i.e. at minus the carrier offset once the symbols are derotated).
    5. The burst's first and last symbols by a likelihood-ratio change-point test (symbol or
       noise), so that only the burst is analysed (reported as ``burst_start_s``,
       ``burst_duration_s`` and the attr ``burst``). With ``reference`` the transmitted
       symbols are aligned and the fits are repeated data-aided.
    6. A check that the signal is modulated at all (see below).
    7. EVM per 3GPP TS 38.104 / TS 38.101-2 Annex F: rms error vector over the rms of the ideal
       symbols; MER = -20 log10(EVM).

    A symbol clock off ``symbol_rate`` (a sample-clock offset between transmitter and
    capture) makes the timing drift linearly; the drift is measured per block of 128
    symbols, kept when significant and when it raises the matched-filter output energy, and
    reported as ``symbol_rate_error_ppm``. Faster timing wander is not tracked. Blind carrier
    recovery needs the M-th power line above the noise (QPSK from about 3 dB Es/N0 with a
    thousand symbols, 16-QAM from about 8 dB), otherwise a MeasurementError says so.

    An unmodulated carrier is refused. Decisions would otherwise turn it into a perfect
    symbol stream -- a tone at the centre decides to one point, a tone at Rs/4 to points
    stepping 90 deg per symbol (which also passes a ring or occupancy test) -- and report an
    excellent EVM. Whatever its offset, a carrier makes the corrected symbols (IQ origin
    offset removed) one complex exponential, while independent zero-mean data are white. The
    rule: the strongest spectral line of the N corrected symbols, ``max_f |mean_k y_k
    exp(-j 2 pi f k)|^2 / mean_k |y_k|^2``, must not exceed the limit that random data pass
    with probability 1 - 1e-6 (the same test also runs on the first symbols of step 1, which
    catches a tone outside the band that only the short estimation filter lets through;
    Gaussian approximation: one DFT bin holds a Beta(1, N - 1)
    fraction, Beta(1/2, (N - 1)/2) for BPSK and pi/2-BPSK, whose symbols lie on one axis; the
    search over about 4N frequencies is accounted for), nor 1/2 (a carrier with more power
    than the modulation). The limit is 70 % at 16 symbols, 50 % from 28 symbols on (89 % and
    66 % for BPSK at 16 and 32, 50 % from 51); a carrier is caught once its symbol SNR exceeds
    about 0 dB for long captures, 4 dB at 16 symbols. Data that are really one repeated
    point (all-zero bits, a 0, 1, 2, 3 QPSK cycle) are refused too: they cannot be told from a
    carrier. A carrier at the capture's centre is the IQ origin offset itself: when nothing
    with an M-th power line is left once the offset is removed and the offset holds most of
    the in-band power, the capture is refused as an unmodulated carrier at 0 Hz (LO leakage
    and noise alone read the same). A ``reference`` that is itself such a line (a constant
    pattern) exempts the capture, since then a carrier is expected, and its data-aided EVM is measured; only a
    carrier at the capture's centre frequency cannot be measured that way, since it cannot be
    told from an IQ origin offset (MeasurementError).

    Decision-directed EVM under-reads at low SNR (errors past a decision boundary are
    measured to the wrong point); give ``reference`` for data-aided figures.

    Parameters
    ----------
    cap : xarray.DataArray
        Complex capture, dims ``("time",)`` or ``("channel", "time")``. A lazy capture is
        loaded into memory (symbol recovery needs the whole burst): slice long recordings to
        the burst first.
    scheme : str
        One of :data:`SCHEMES`.
    symbol_rate : float
        Hz, below the sample rate.
    rolloff : float
        RRC excess bandwidth of the transmit pulse (the matched filter uses the same).
    reference : array_like, optional
        Transmitted bits or complex symbols (as for :func:`modulate`). They are aligned to
        the measured symbols by cross-correlation (which also removes the constellation's
        phase ambiguity); only the overlap is analysed.
    max_offset_hz : float, optional
        Largest carrier offset searched; default ``symbol_rate / 8`` (at most
        ``symbol_rate / 4``).
    remove_iq_offset : bool
        Remove the fitted IQ origin offset from the errors before the EVM (3GPP practice,
        memory); ``iq_offset_db`` reports the fitted offset either way.

    Returns
    -------
    xarray.Dataset
        Scalars (per channel along ``channel``): ``evm_rms_percent``, ``evm_peak_percent``,
        ``mer_db``, ``frequency_error_hz`` (carrier offset from the capture's centre,
        baseband Hz), ``carrier_frequency_hz`` (absolute), ``iq_offset_db`` (origin offset
        power over the mean power of the modulated signal in the capture: a DC of 0.01 on a
        unit-power signal reads -40 dB; positive when the leakage is the stronger), ``phase_error_rms_deg``,
        ``magnitude_error_rms_percent`` (magnitude errors over the rms reference),
        ``symbol_count``, ``symbol_rate_error_ppm`` (measured symbol clock against
        ``symbol_rate``; 0 when no significant drift), ``burst_start_s`` and
        ``burst_duration_s``.
        Per symbol along ``symbol``: ``measured_symbol`` (corrected, normalised),
        ``ideal_symbol`` (decided or reference), ``symbol_evm_percent``,
        ``symbol_phase_error_deg``, ``symbol_magnitude_error_percent``, ``symbol_time_s``
        (time of the symbol instant in the capture's time axis). With several channels the
        shorter symbol axes are padded with NaN (see ``symbol_count``).

    Raises
    ------
    MeasurementError
        If symbol_rate >= sample_rate, fewer than 16 symbols are found, there is no
        signal of the scheme (no carrier line above the noise), or the signal is an
        unmodulated carrier (see above).

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> rng = np.random.default_rng(7)
    >>> cap = quadkit.modulation.modulate(rng.integers(0, 2, 2 * 3000), "qpsk",
    ...     symbol_rate=1e6, sample_rate=4e6, offset_hz=12e3, phase_rad=1.0, power_dbfs=0)
    >>> noise = (rng.standard_normal(cap.shape) + 1j * rng.standard_normal(cap.shape))
    >>> noisy = cap + (noise * np.sqrt(4 / 2 / 10 ** 2.5)).astype(np.complex64)  # Es/N0 25 dB
    >>> res = quadkit.modulation.analyze(noisy, "qpsk", symbol_rate=1e6)
    >>> round(float(res.evm_rms_percent), 1), round(float(res.frequency_error_hz))  # 100/sqrt(10**2.5) = 5.6
    (5.6, 12000)
    """
    if not isinstance(cap, xr.DataArray) or "time" not in cap.dims:
        raise ValueError("analyze: cap must be a capture (xarray.DataArray with a time dim)")
    scheme = _scheme("analyze", scheme)
    fs = _capture.sample_rate(cap)
    rs = check_positive("analyze", "symbol_rate", symbol_rate)
    beta = check_finite("analyze", "rolloff", rolloff)
    if not 0.0 <= beta <= 1.0:
        raise ValueError(f"analyze: rolloff={rolloff!r} must lie in [0, 1]")
    if rs >= fs:
        raise MeasurementError(
            f"analyze: symbol_rate={rs:g} Hz is not below the sample rate {fs:g} Hz; "
            "the matched filter needs more than one sample per symbol"
        )
    if max_offset_hz is None:
        max_offset_hz = rs / 8
    max_offset_hz = check_positive("analyze", "max_offset_hz", max_offset_hz)
    if max_offset_hz > rs / 4:
        raise ValueError(f"analyze: max_offset_hz={max_offset_hz:g} exceeds symbol_rate/4")
    if not _capture.is_complex(cap):
        raise ValueError("analyze: needs a complex (IQ) capture; downconvert a real one first")
    ref = None if reference is None else _as_symbols("analyze", reference, scheme)
    data = np.asarray(cap.values, dtype=np.complex128)
    if not np.all(np.isfinite(data)):
        raise MeasurementError("analyze: the capture holds non-finite samples")
    rows = data[None, :] if data.ndim == 1 else data
    outs = [_analyze_one(row, scheme, fs, rs, beta, ref, max_offset_hz, remove_iq_offset)
            for row in rows]
    t0 = _capture.first_time(cap)
    multi = data.ndim == 2
    n_sym = max(o["symbol_count"] for o in outs)

    def per_symbol(key: str, dtype: Any, shift: float = 0.0) -> np.ndarray:
        arr = np.full((len(outs), n_sym), np.nan, dtype=dtype)
        for i, o in enumerate(outs):
            arr[i, :o["symbol_count"]] = o[key] + shift
        return arr if multi else arr[0]

    def scalar(key: str, fn=lambda v: v) -> np.ndarray:
        arr = np.array([fn(o[key]) if not callable(key) else None for o in outs])
        return arr if multi else arr[0]

    sdims = ("channel",) if multi else ()
    vdims = ("channel", "symbol") if multi else ("symbol",)
    cf = float(cap.attrs.get("center_frequency", 0.0))
    variables = {
        "evm_rms_percent": quantity(scalar("evm_rms_percent"), "%", "rms error vector magnitude", sdims),
        "evm_peak_percent": quantity(scalar("evm_peak_percent"), "%", "peak error vector magnitude", sdims),
        "mer_db": quantity(scalar("mer_db"), "dB", "modulation error ratio", sdims),
        "frequency_error_hz": quantity(scalar("frequency_error_hz"), "Hz",
                                       "carrier frequency error (offset from center frequency)", sdims),
        "carrier_frequency_hz": quantity(scalar("frequency_error_hz", lambda v: cf + v), "Hz",
                                         "measured carrier frequency", sdims),
        "iq_offset_db": quantity(scalar("iq_offset_db"), "dB",
                                 "IQ origin offset power relative to the signal power", sdims),
        "phase_error_rms_deg": quantity(scalar("phase_error_rms_deg"), "deg", "rms phase error", sdims),
        "magnitude_error_rms_percent": quantity(scalar("magnitude_error_rms_percent"), "%",
                                                "rms magnitude error", sdims),
        "symbol_count": quantity(scalar("symbol_count"), "1", "symbols analysed", sdims),
        "symbol_rate_error_ppm": quantity(
            scalar("clock_ppm"), "ppm",
            "symbol clock error against symbol_rate (0 unless a drift was significant)", sdims),
        "burst_start_s": quantity(scalar("burst_start", lambda v: t0 + v), "s",
                                  "start of the analysed symbols (half a symbol before the first)",
                                  sdims),
        "burst_duration_s": quantity(scalar("burst_duration"), "s",
                                     "duration of the analysed symbols", sdims),
        "measured_symbol": quantity(per_symbol("measured", np.complex128), "1",
                                    "measured symbol (corrected, unit mean reference energy)", vdims),
        "ideal_symbol": quantity(per_symbol("ideal", np.complex128), "1", "ideal symbol", vdims),
        "symbol_evm_percent": quantity(per_symbol("evm", np.float64), "%",
                                       "error vector magnitude per symbol", vdims),
        "symbol_phase_error_deg": quantity(per_symbol("phase_err", np.float64), "deg",
                                           "phase error per symbol", vdims),
        "symbol_magnitude_error_percent": quantity(per_symbol("mag_err", np.float64), "%",
                                                   "magnitude error per symbol", vdims),
        "symbol_time_s": quantity(per_symbol("time", np.float64, t0), "s",
                                  "time of the symbol instant", vdims),
    }
    coords: dict[str, Any] = {"symbol": ("symbol", np.arange(n_sym))}
    if multi:
        coords["channel"] = ("channel", cap.coords["channel"].values)
    bursts = [o["burst"] for o in outs]
    attrs = {
        "scheme": scheme, "symbol_rate": rs, "rolloff": beta,
        "method": "data-aided" if ref is not None else "decision-directed",
        "evm_definition": "rms error over rms ideal symbol (3GPP TS 38.104 / TS 38.101-2 Annex F)",
        "iq_offset_removed": "yes" if remove_iq_offset else "no",
        "burst": ("burst found (energy, then symbol likelihood); only its symbols were analysed"
                  if all(bursts) else
                  "continuous signal; the whole capture was analysed" if not any(bursts) else
                  "burst found in some channels only; see burst_start_s"),
    }
    return result(variables, coords=coords, attrs=attrs)
