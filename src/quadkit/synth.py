"""Synthetic test signals: tones, multitones, noise, chirps, and noise at a stated SNR.

Every function returns a capture (see :func:`quadkit.capture`) with its metadata. Complex
outputs follow the complex-envelope convention of the package: a complex tone of amplitude A
at baseband offset f is ``A * exp(j (2 pi f t + phase))``; with ``real=True`` the samples are
the real passband ``A * cos(2 pi f t + phase)``. Tones are computed from the absolute sample
index (see :mod:`quadkit._nco`), so they are phase-exact over long captures.

Warning: a generated waveform that is sent to a transmitter must respect your local radio
regulations and licensed practice; test transmitters on a cabled set-up with attenuators and
check the input power limits of the receiver first.
"""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
import xarray as xr

from . import _capture
from ._capture import capture
from ._checks import check_finite, check_option, check_positive, check_positive_int
from ._nco import phase_cycles

__all__ = ["tone", "multitone", "noise", "chirp", "add_noise"]
_ACCESSOR = ("add_noise",)


def _length(func: str, sample_rate: float, n_samples: int | None, duration_s: float | None) -> int:
    if (n_samples is None) == (duration_s is None):
        raise ValueError(f"{func}: give exactly one of n_samples= or duration_s=")
    if n_samples is not None:
        return check_positive_int(func, "n_samples", n_samples)
    duration_s = check_positive(func, "duration_s", duration_s)
    return max(1, int(round(duration_s * sample_rate)))


def _rng(rng: Any) -> np.random.Generator:
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def _dtype(real: bool, dtype: Any) -> np.dtype:
    if dtype is None:
        return np.dtype(np.float32 if real else np.complex64)
    dtype = np.dtype(dtype)
    allowed = (np.float32, np.float64) if real else (np.complex64, np.complex128)
    if dtype not in allowed:
        raise ValueError(f"synth: dtype={dtype} must be one of {[np.dtype(a).name for a in allowed]}")
    return dtype


def _tones(offsets, amplitudes, phases, fs, n, real, dtype) -> np.ndarray:
    acc = np.zeros(n, dtype=np.float64 if real else np.complex128)
    for f, a, p in zip(offsets, amplitudes, phases):
        if abs(f) > fs / 2:
            raise ValueError(
                f"synth: offset {f!r} Hz lies outside the band [-{fs / 2}, {fs / 2}] Hz of "
                f"sample_rate={fs}"
            )
        ph = 2 * np.pi * phase_cycles(f / fs, 0, n) + p
        acc += a * (np.cos(ph) if real else np.exp(1j * ph))
    return acc.astype(dtype)


def tone(
    offset_hz: float,
    *,
    sample_rate: float,
    n_samples: int | None = None,
    duration_s: float | None = None,
    amplitude: float = 1.0,
    phase_rad: float = 0.0,
    center_frequency: float = 0.0,
    real: bool = False,
    dtype: Any = None,
    **metadata: Any,
) -> xr.DataArray:
    """A single tone.

    Parameters
    ----------
    offset_hz : float
        Baseband frequency in Hz (the absolute frequency is ``center_frequency + offset_hz``).
    sample_rate : float
        Hz.
    n_samples, duration_s : int or float
        Length, one of the two.
    amplitude : float
        Peak amplitude A in units of full scale (a complex tone of A = 1 is 0 dBFS).
    phase_rad : float
        Phase at the first sample, radians.
    real : bool
        Real samples ``A cos(2 pi f t + phase)`` instead of ``A exp(j(2 pi f t + phase))``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.tone(250e3, sample_rate=1e6, n_samples=4, phase_rad=np.pi / 2)
    >>> np.round(cap.values, 6)  # a quarter cycle per sample, starting at +j
    array([ 0.+1.j, -1.+0.j, -0.-1.j,  1.-0.j], dtype=complex64)
    """
    fs = _capture._check_rate(sample_rate, source="tone")
    n = _length("tone", fs, n_samples, duration_s)
    amplitude = check_finite("tone", "amplitude", amplitude)
    phase_rad = check_finite("tone", "phase_rad", phase_rad)
    dt = _dtype(real, dtype)
    x = _tones([check_finite("tone", "offset_hz", offset_hz)], [amplitude], [phase_rad], fs, n, real, dt)
    metadata.setdefault("description", f"synthetic tone at {offset_hz:g} Hz offset")
    return capture(x, sample_rate=fs, center_frequency=center_frequency, **metadata)


def multitone(
    offsets_hz: Any,
    *,
    sample_rate: float,
    n_samples: int | None = None,
    duration_s: float | None = None,
    amplitudes: Any = 1.0,
    phases_rad: Any = 0.0,
    center_frequency: float = 0.0,
    real: bool = False,
    dtype: Any = None,
    **metadata: Any,
) -> xr.DataArray:
    """A sum of tones at ``offsets_hz`` with per-tone ``amplitudes`` and ``phases_rad``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.multitone([-100e3, 200e3], sample_rate=1e6, n_samples=1000,
    ...                               amplitudes=[0.5, 0.25])
    >>> round(float(np.mean(np.abs(cap.values) ** 2)), 4)  # powers add: 0.25 + 0.0625
    0.3125
    """
    fs = _capture._check_rate(sample_rate, source="multitone")
    n = _length("multitone", fs, n_samples, duration_s)
    offsets = np.atleast_1d(np.asarray(offsets_hz, dtype=float))
    if offsets.ndim != 1 or offsets.size == 0:
        raise ValueError("multitone: offsets_hz must be a non-empty list of frequencies")
    amps = np.broadcast_to(np.asarray(amplitudes, dtype=float), offsets.shape)
    phases = np.broadcast_to(np.asarray(phases_rad, dtype=float), offsets.shape)
    if not (np.all(np.isfinite(offsets)) and np.all(np.isfinite(amps)) and np.all(np.isfinite(phases))):
        raise ValueError("multitone: offsets, amplitudes and phases must be finite")
    x = _tones(offsets, amps, phases, fs, n, real, _dtype(real, dtype))
    metadata.setdefault("description", f"synthetic multitone of {offsets.size} tones")
    return capture(x, sample_rate=fs, center_frequency=center_frequency, **metadata)


def _white(rng: np.random.Generator, n: int, real: bool) -> np.ndarray:
    """Unit-power white Gaussian noise (complex: circular, E|x|^2 = 1)."""
    if real:
        return rng.standard_normal(n)
    return (rng.standard_normal(n) + 1j * rng.standard_normal(n)) / np.sqrt(2.0)


def _bandlimit(x: np.ndarray, fs: float, bandwidth_hz: float, real: bool) -> np.ndarray:
    """Brick-wall band-limit to |f| <= bandwidth/2 around 0 Hz (FFT domain)."""
    n = x.size
    freqs = np.fft.fftfreq(n, d=1.0 / fs)
    spec = np.fft.fft(x)
    spec[np.abs(freqs) > bandwidth_hz / 2] = 0
    y = np.fft.ifft(spec)
    return y.real if real else y


def noise(
    *,
    sample_rate: float,
    n_samples: int | None = None,
    duration_s: float | None = None,
    power_dbfs: float = 0.0,
    bandwidth_hz: float | None = None,
    real: bool = False,
    exact_power: bool = True,
    rng: Any = None,
    center_frequency: float = 0.0,
    dtype: Any = None,
    **metadata: Any,
) -> xr.DataArray:
    """Gaussian noise of mean power ``power_dbfs``.

    Complex noise is circular (I and Q independent, each carrying half the power). With
    ``bandwidth_hz`` the noise is band-limited to ``|f| <= bandwidth_hz / 2`` (for a real capture
    ``0 <= f <= bandwidth_hz / 2``) by an FFT brick wall. With ``exact_power`` (the default) the
    realised mean power is scaled to exactly ``power_dbfs``; set it False for true Gaussian
    statistics (Monte Carlo work).

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.noise(sample_rate=1e6, n_samples=10000, power_dbfs=-20, rng=1)
    >>> round(float(10 * np.log10(np.mean(np.abs(cap.values) ** 2))), 3)
    -20.0
    """
    fs = _capture._check_rate(sample_rate, source="noise")
    n = _length("noise", fs, n_samples, duration_s)
    power_dbfs = check_finite("noise", "power_dbfs", power_dbfs)
    gen = _rng(rng)
    x = _white(gen, n, real)
    if bandwidth_hz is not None:
        bandwidth_hz = check_positive("noise", "bandwidth_hz", bandwidth_hz)
        limit = fs if not real else fs
        if bandwidth_hz > limit:
            raise ValueError(f"noise: bandwidth_hz={bandwidth_hz} exceeds the sample rate {fs}")
        x = _bandlimit(x, fs, bandwidth_hz, real)
        if not exact_power:
            x = x / np.sqrt(bandwidth_hz / fs)
    full_scale = float(metadata.get("full_scale", 1.0))
    target = full_scale**2 * 10 ** (power_dbfs / 10)
    if real:
        target = target  # a real sample of power P reads 10 log10(P) dBFS, as a complex one
    if exact_power:
        x = x * np.sqrt(target / np.mean(np.abs(x) ** 2))
    else:
        x = x * np.sqrt(target)
    metadata.setdefault("description", f"synthetic Gaussian noise at {power_dbfs:g} dBFS")
    return capture(x.astype(_dtype(real, dtype)), sample_rate=fs,
                   center_frequency=center_frequency, **metadata)


def chirp(
    start_hz: float,
    stop_hz: float,
    *,
    sample_rate: float,
    n_samples: int | None = None,
    duration_s: float | None = None,
    amplitude: float = 1.0,
    phase_rad: float = 0.0,
    center_frequency: float = 0.0,
    real: bool = False,
    dtype: Any = None,
    **metadata: Any,
) -> xr.DataArray:
    """A linear frequency sweep from ``start_hz`` to ``stop_hz`` (baseband) over the capture.

    The instantaneous frequency at time t is ``start + (stop - start) t / T`` with T the
    duration, so the phase is ``2 pi (start t + (stop - start) t^2 / (2 T)) + phase``.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.chirp(-100e3, 100e3, sample_rate=1e6, n_samples=1000)
    >>> f = np.diff(np.unwrap(np.angle(cap.values))) * 1e6 / (2 * np.pi)
    >>> round(float(f[0]) / 1e3, 1), round(float(f[-1]) / 1e3, 1)
    (-99.9, 99.7)
    """
    fs = _capture._check_rate(sample_rate, source="chirp")
    n = _length("chirp", fs, n_samples, duration_s)
    f0 = check_finite("chirp", "start_hz", start_hz)
    f1 = check_finite("chirp", "stop_hz", stop_hz)
    for name, f in (("start_hz", f0), ("stop_hz", f1)):
        if abs(f) > fs / 2:
            raise ValueError(f"chirp: {name}={f} lies outside the band of sample_rate={fs}")
    t = np.arange(n) / fs
    duration = n / fs
    ph = 2 * np.pi * (f0 * t + (f1 - f0) * t**2 / (2 * duration)) + phase_rad
    x = amplitude * (np.cos(ph) if real else np.exp(1j * ph))
    metadata.setdefault("description", f"synthetic linear chirp {f0:g} Hz to {f1:g} Hz")
    return capture(x.astype(_dtype(real, dtype)), sample_rate=fs,
                   center_frequency=center_frequency, **metadata)


def add_noise(
    cap: xr.DataArray,
    *,
    snr_db: float,
    bandwidth_hz: float | None = None,
    rng: Any = None,
    exact_power: bool = True,
) -> xr.DataArray:
    """Add white Gaussian noise so that the SNR in ``bandwidth_hz`` is ``snr_db``.

    The signal power is the capture's mean power (per channel). The noise is white over the
    whole band, with its density chosen so that the noise power inside ``bandwidth_hz``
    (default: the whole band, the sample rate) is ``signal power / 10**(snr_db / 10)``. For a
    real capture the band is 0 to fs/2 and ``bandwidth_hz`` defaults to fs/2. With
    ``exact_power`` the realised noise power is scaled to exactly that value.

    The noise at each sample depends only on ``rng``, the channel and the sample's absolute
    index, so a lazy capture gives the same samples as the in-memory one whatever its
    chunking, and a slice of the result equals the result of the slice (exact power aside).
    For a lazy capture the signal and noise powers are reductions in the same graph.

    Examples
    --------
    >>> import numpy as np, quadkit
    >>> cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=100000)
    >>> noisy = quadkit.synth.add_noise(cap, snr_db=20, rng=0)
    >>> n = noisy.values - cap.values
    >>> round(float(10 * np.log10(1 / np.mean(np.abs(n) ** 2))), 3)
    20.0
    """
    snr_db = check_finite("add_noise", "snr_db", snr_db)
    fs = _capture.sample_rate(cap)
    real = not _capture.is_complex(cap)
    band = fs / 2 if real else fs
    if bandwidth_hz is None:
        bandwidth_hz = band
    bandwidth_hz = check_positive("add_noise", "bandwidth_hz", bandwidth_hz)
    if bandwidth_hz > band:
        raise ValueError(
            f"add_noise: bandwidth_hz={bandwidth_hz} exceeds the capture's band of {band} Hz"
        )
    seed = int(_rng(rng).integers(0, 2**63))
    data = cap.data
    first = _capture.start_index(cap)
    lazy = _capture.is_lazy(cap)
    if lazy:
        import dask.array as da

        white = da.map_blocks(_white_block, data, seed, first, real,
                              dtype=np.float64 if real else np.complex128)
    else:
        white = _white_block(np.asarray(data), seed, first, real)
    power = (abs(data) ** 2).astype(np.float64).mean(axis=-1, keepdims=True)
    if not lazy and np.any(power == 0):
        raise ValueError("add_noise: the capture has zero power; an SNR is undefined")
    if exact_power:
        white = white / np.sqrt((abs(white) ** 2).mean(axis=-1, keepdims=True))
    noise_total = power / 10 ** (snr_db / 10) * band / bandwidth_hz
    noisy = (data + white * np.sqrt(noise_total)).astype(data.dtype)
    return _capture.like(cap, noisy)


#: Noise is drawn in blocks of this many samples, each from its own seed, so that the noise
#: at a sample depends only on the seed, the channel and the sample's absolute index.
_NOISE_BLOCK = 1 << 16


def _white_block(x: np.ndarray, seed: int, first: int, real: bool,
                 block_info: Any = None) -> np.ndarray:
    """Unit-power white noise shaped like ``x`` (last axis time), keyed to absolute indices."""
    start = first
    if block_info is not None:  # inside dask: where this chunk sits in the capture
        start = first + block_info[0]["array-location"][-1][0]
    lead = x.shape[:-1]
    n = x.shape[-1]
    rows = int(np.prod(lead)) if lead else 1
    out = np.empty((rows, n), dtype=np.float64 if real else np.complex128)
    b0, b1 = start // _NOISE_BLOCK, (start + n - 1) // _NOISE_BLOCK if n else start // _NOISE_BLOCK
    ch0 = 0
    if block_info is not None and lead:
        ch0 = block_info[0]["array-location"][0][0]
    for r in range(rows):
        pieces = []
        for b in range(b0, b1 + 1):
            g = np.random.default_rng([seed, ch0 + r, b])
            pieces.append(_white(g, _NOISE_BLOCK, real))
        joined = np.concatenate(pieces) if pieces else np.zeros(0)
        off = start - b0 * _NOISE_BLOCK
        out[r] = joined[off: off + n]
    return out.reshape(x.shape)
