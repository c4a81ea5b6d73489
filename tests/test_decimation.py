"""Tests of quadkit.decimation against scipy.signal and textbook properties of FIR filters."""

from __future__ import annotations

import math
from fractions import Fraction

import dask.array as da
import numpy as np
import pytest
import scipy.signal as ss
from hypothesis import given, settings
from hypothesis import strategies as st

import quadkit
from quadkit import _capture
from quadkit.decimation import decimate, extract_channel, filter, lowpass_taps, resample
from quadkit.testing import as_lazy, assert_lazy, raise_if_dask_computes

RNG = np.random.default_rng(20261201)


def noise(n, channels=None, dtype=np.complex64, seed=0):
    rng = np.random.default_rng(seed)
    shape = (n,) if channels is None else (channels, n)
    x = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    return (x / math.sqrt(2)).astype(dtype)


lazy = as_lazy


def settled(y):
    a, b = y.attrs["unsettled_start"], y.attrs["unsettled_end"]
    return y.isel(time=slice(a, y.sizes["time"] - b))


def tones(freqs, fs, n, *, amplitude=1.0, phase=0.0):
    """One complex tone per channel, phase from the sample index (numpy float64 reference)."""
    k = np.arange(n)
    f = np.asarray(freqs, float)[:, None]
    x = amplitude * np.exp(1j * (2 * np.pi * f * k / fs + phase))
    return quadkit.capture(x.astype(np.complex64), sample_rate=fs)


def tone_amplitudes(y, freqs):
    """Complex amplitude of a tone at (aliased) frequency f in each channel of y, by a
    complex inner product with the exact tone over the settled samples."""
    y = settled(y)
    fs = y.attrs["sample_rate"]
    f = np.asarray(freqs, float)
    f_alias = (f + fs / 2) % fs - fs / 2
    t = y["time"].values
    ref = np.exp(2j * np.pi * f_alias[:, None] * t[None, :])
    return np.mean(np.asarray(y.values, complex) * ref.conj(), axis=-1)


# --------------------------------------------------------------------------------------------
# lowpass_taps
# --------------------------------------------------------------------------------------------


def test_kaiser_sizing_matches_scipy_kaiserord():
    # REFERENCES.md: kaiserord(80, 0.1) = (102, 7.857); Kaiser 1974, O&S §7.6 (memory).
    # Band edges 0.45 and 0.55 of fs/2 = 1 give a width of 0.1 (of Nyquist), as kaiserord.
    n_ref, beta_ref = ss.kaiserord(80, 0.1)
    assert (n_ref, round(beta_ref, 3)) == (102, 7.857)  # the published pair
    d = lowpass_taps(0.45, 0.55, sample_rate=2.0, stopband_db=80, passband_ripple_db=0.1)
    # Kaiser's estimate is the start; when the measured response falls a few tenths of a dB
    # short the design asks for a little more attenuation, so length and beta may grow by a
    # few per cent (beta: 0.1102 per dB, the formula's slope)
    assert beta_ref <= d.kaiser_beta <= beta_ref + 0.1102 * 1.0
    assert beta_ref == pytest.approx(0.1102 * (80 - 8.7), rel=1e-12)  # the formula itself
    assert n_ref <= d.n_taps <= 1.05 * n_ref + 2
    for a_db, width in [(60, 0.05), (90, 0.2), (100, 0.02)]:
        n_ref, beta_ref = ss.kaiserord(a_db, width)
        d = lowpass_taps(0.5 - width / 2, 0.5 + width / 2, sample_rate=2.0, stopband_db=a_db,
                         passband_ripple_db=0.5)
        assert beta_ref <= d.kaiser_beta <= beta_ref + 0.1102 * 1.0
        assert n_ref <= d.n_taps <= 1.05 * n_ref + 2


@pytest.mark.parametrize("fp, fst, a_db, ripple", [
    (100e3, 150e3, 80, 0.01), (10e3, 12e3, 100, 0.001), (0.0, 50e3, 60, 0.1),
])
def test_lowpass_measured_response_meets_spec(fp, fst, a_db, ripple):
    fs = 1e6
    d = lowpass_taps(fp, fst, sample_rate=fs, stopband_db=a_db, passband_ripple_db=ripple)
    taps = d.taps
    assert taps.size % 2 == 1 and d.delay_samples == taps.size // 2
    np.testing.assert_allclose(taps, taps[::-1], atol=1e-15)  # linear phase
    # independent measurement with scipy.signal.freqz on a dense FFT grid (2^20 points)
    f, h = ss.freqz(taps, worN=1 << 20, fs=fs)
    h = np.abs(h)
    h_pb, h_sb = h[f <= fp], h[f >= fst]
    ripple_meas = 20 * np.log10(h_pb.max() / h_pb.min())
    stop_meas = -20 * np.log10(h_sb.max())
    assert ripple_meas <= ripple
    assert stop_meas >= a_db
    # the design's own figures agree; a grid can only miss a peak, so the design's refined
    # figures are at most as good as the grid's (bin spacing 0.5 Hz: within 0.01 dB; the
    # refinement grid is itself finite, hence 1e-3 dB the other way)
    assert stop_meas - 0.01 <= d.stopband_db <= stop_meas + 1e-3
    assert ripple_meas - 1e-9 <= d.passband_ripple_db <= ripple_meas + 1e-4
    assert abs(taps.sum() - 1) < 1e-12  # unity DC gain


def test_lowpass_bad_spec():
    with pytest.raises(ValueError, match="passband_hz < stopband_hz"):
        lowpass_taps(200e3, 100e3, sample_rate=1e6)
    with pytest.raises(ValueError, match="sample_rate/2"):
        lowpass_taps(100e3, 600e3, sample_rate=1e6)
    with pytest.raises(ValueError, match="stopband_db"):
        lowpass_taps(100e3, 200e3, sample_rate=1e6, stopband_db=-3)


# --------------------------------------------------------------------------------------------
# filter
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("dtype", [np.complex64, np.complex128])
def test_filter_equals_centered_convolution(dtype):
    x = noise(3000, dtype=dtype)
    taps = RNG.standard_normal(41)
    y = filter(quadkit.capture(x, sample_rate=1e6), taps)
    # numpy.convolve 'full' shifted by the delay (L-1)/2 = 20: output k at input k's time
    ref = np.convolve(x.astype(complex), taps)[20:20 + 3000]
    assert y.dtype == dtype
    np.testing.assert_allclose(y.values, ref, atol=2e-5 if dtype == np.complex64 else 1e-12)
    assert y.attrs["unsettled_start"] == 20 and y.attrs["unsettled_end"] == 20
    np.testing.assert_allclose(y["time"].values, np.arange(3000) / 1e6, rtol=1e-12, atol=0)


def test_filter_causal_delay_zero_equals_lfilter():
    x = noise(2000)
    taps = RNG.standard_normal(24) + 1j * RNG.standard_normal(24)  # complex, even length
    y = filter(quadkit.capture(x, sample_rate=1.0), taps, delay_samples=0)
    ref = ss.lfilter(taps, [1.0], x.astype(complex))  # causal FIR, scipy reference
    # float32 FFT convolution: error ~1e-7 per unit of |taps| * rms(x) ~ 5 -> 1e-5 is ample
    np.testing.assert_allclose(y.values, ref, atol=2e-5)
    assert y.dtype == np.complex64


def test_filter_real_capture_stays_real_and_complex_taps_make_complex():
    x = RNG.standard_normal(500).astype(np.float32)
    cap = quadkit.capture(x, sample_rate=1.0)
    y = filter(cap, [0.25, 0.5, 0.25])
    assert y.dtype == np.float32
    np.testing.assert_allclose(y.values, np.convolve(x, [0.25, 0.5, 0.25])[1:501], atol=1e-6)
    assert filter(cap, [0.5, 1j, 0.5]).dtype == np.complex64


def test_filter_even_taps_need_a_delay():
    cap = quadkit.capture(noise(100), sample_rate=1.0)
    with pytest.raises(ValueError, match="even length 4.*delay_samples"):
        filter(cap, [1, 2, 2, 1])
    with pytest.raises(ValueError, match="delay_samples=4 must be below len"):
        filter(cap, [1, 2, 2, 1], delay_samples=4)


# --------------------------------------------------------------------------------------------
# decimate and resample against scipy with the same taps
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("factor", [2, 3, 8, 13])
def test_decimate_with_taps_equals_resample_poly(factor):
    x = noise(4000)
    taps = ss.firwin(8 * factor + 1, 0.9 / factor)
    y = decimate(quadkit.capture(x, sample_rate=1e6), factor, taps=taps)
    ref = ss.resample_poly(x.astype(complex), 1, factor, window=taps)
    assert y.shape == ref.shape and y.dtype == np.complex64
    np.testing.assert_allclose(y.values, ref, atol=1e-5)  # float32 FFT vs float64 direct
    # timestamps: output j is input j * factor (same time, no delay)
    np.testing.assert_allclose(y["time"].values, np.arange(ref.size) * factor / 1e6, rtol=1e-12)
    # unsettled: outputs whose support [jM - D, jM + D] reaches outside [0, N) (the sum)
    d = taps.size // 2
    j = np.arange(ref.size)
    assert y.attrs["unsettled_start"] == np.sum(j * factor - d < 0)
    assert y.attrs["unsettled_end"] == np.sum(j * factor + d > 3999)


@pytest.mark.parametrize("up, down", [(5, 12), (3, 2), (2, 3), (4, 1)])
def test_resample_with_taps_equals_resample_poly(up, down):
    x = noise(3000, channels=2)
    taps = ss.firwin(10 * max(up, down) + 1, 0.9 / max(up, down))
    fs = 1.2e6
    y = resample(quadkit.capture(x, sample_rate=fs), fs * up / down, taps=taps)
    ref = ss.resample_poly(x.astype(complex), up, down, axis=-1, window=taps)
    assert y.shape == ref.shape and y.dtype == np.complex64
    np.testing.assert_allclose(y.values, ref, atol=2e-5)
    assert y.attrs["sample_rate"] == pytest.approx(fs * up / down, rel=1e-15)


def test_decimate_bad_factor():
    cap = quadkit.capture(noise(100), sample_rate=1.0)
    for bad, msg in [(0, "factor=0 must be a positive integer"),
                     (-3, "factor=-3 must be a positive integer"),
                     (2.5, "factor=2.5 must be an integer"),
                     (4.0, "factor=4.0 must be an integer, not a float")]:
        with pytest.raises(ValueError, match=msg):
            decimate(cap, bad)


# --------------------------------------------------------------------------------------------
# decimate: designed response
# --------------------------------------------------------------------------------------------


def alias_frequencies(fs, factor, per_band):
    """Tones across every band that folds onto the new band: k * fs_new + u, k != 0."""
    fs_new = fs / factor
    u = (np.arange(per_band) + 0.5) / per_band - 0.5  # inside (-1/2, 1/2) of the new band
    out = []
    for k in range(-(factor // 2), factor // 2 + 1):
        if k == 0:
            continue
        f = (k + u) * fs_new
        out.append(f[np.abs(f) < fs / 2])
    return np.concatenate(out)


@pytest.mark.parametrize("factor, per_band, n, a_db", [
    (2, 24, 4000, 80), (5, 8, 8000, 80), (8, 6, 12000, 80), (4, 10, 8000, 100),
])
def test_decimate_alias_rejection(factor, per_band, n, a_db):
    fs = 1e6
    f = alias_frequencies(fs, factor, per_band)
    x = tones(f, fs, n)
    if a_db > 80:  # float32 rounding (~1e-7 of full scale) would hide a 100 dB stopband
        x = x.astype(np.complex128)
    y = decimate(x, factor, stopband_db=a_db)
    amp = np.abs(tone_amplitudes(y, f))
    # each alias at least a_db below its unit-amplitude tone; float32 rounding adds ~1e-7
    floor = 1e-6 if x.dtype == np.complex64 else 1e-9
    assert amp.max() <= 10 ** (-a_db / 20) + floor, 20 * np.log10(amp.max())


def test_decimate_1000_multi_stage_alias_rejection_and_flatness():
    fs = 1e6
    rng = np.random.default_rng(3)
    f_alias = alias_frequencies(fs, 1000, 1)
    f_alias = np.sort(rng.choice(f_alias, 24, replace=False))
    f_alias = f_alias + rng.uniform(-450, 450, f_alias.size)  # anywhere in the alias bands
    f_pass = np.linspace(-400, 400, 9)  # 80 % of the 1 kHz band
    f = np.concatenate([f_alias, f_pass])
    n = 240_000
    y = decimate(tones(f, fs, n), 1000)
    assert y.attrs["sample_rate"] == 1000.0 and y.sizes["time"] == 240
    assert settled(y).sizes["time"] >= 40
    amp = tone_amplitudes(y, f)
    assert np.abs(amp[: f_alias.size]).max() <= 1e-4 + 1e-6
    gain_db = 20 * np.log10(np.abs(amp[f_alias.size:]))
    assert gain_db.max() - gain_db.min() <= 0.01
    # zero delay: the phase of each passband tone equals the input's at the same times
    assert np.abs(np.angle(amp[f_alias.size:])).max() < 1e-4


@pytest.mark.parametrize("factor", [3, 8, 40])
def test_decimate_passband_flat_and_zero_delay(factor):
    fs = 1e6
    fs_new = fs / factor
    f = np.linspace(-0.4, 0.4, 17) * fs_new
    n = 120 * factor + 6000
    phase = 0.7
    y = decimate(tones(f, fs, n, amplitude=0.5, phase=phase), factor)
    amp = tone_amplitudes(y, f)
    gain_db = 20 * np.log10(np.abs(amp) / 0.5)
    # spec: 0.01 dB peak to peak over 80 % of the new band
    assert gain_db.max() - gain_db.min() <= 0.01
    assert np.abs(gain_db).max() <= 0.01
    # symmetric taps, delay removed: phase at the same timestamps unchanged (float32: 1e-5)
    assert np.abs(np.angle(amp * np.exp(-1j * phase))).max() < 2e-5


def test_decimate_timestamps_and_slices():
    fs = 1e6
    cap = quadkit.capture(noise(9000), sample_rate=fs)
    y = decimate(cap, 8)
    sub = cap.isel(time=slice(805, None))
    ys = decimate(sub, 8)
    # absolute alignment: the first output is the input at index ceil(805/8)*8 = 808
    assert float(ys["time"][0]) == pytest.approx(808 / fs, rel=1e-12)
    a = settled(ys)
    t0 = int(round(float(a["time"][0]) * fs / 8))
    ref = y.isel(time=slice(t0, t0 + a.sizes["time"]))
    # the same samples: float32 FFT frames fall differently, so allow rounding (1e-6)
    np.testing.assert_allclose(a.values, ref.values, atol=1e-6)
    np.testing.assert_allclose(a["time"].values, ref["time"].values, rtol=1e-12)


def test_decimate_keeps_dtype_attrs_and_channels():
    x = noise(5000, channels=3)
    cap = quadkit.capture(x, sample_rate=1e6, center_frequency=868e6, description="bench")
    y = decimate(cap, 5)
    assert y.dtype == np.complex64 and y.dims == ("channel", "time")
    assert y.attrs["center_frequency"] == 868e6 and y.attrs["description"] == "bench"
    assert y.attrs["sample_rate"] == 2e5
    for c in range(3):
        one = decimate(quadkit.capture(x[c], sample_rate=1e6, center_frequency=868e6), 5)
        np.testing.assert_allclose(y.values[c], one.values, atol=1e-6)
    y128 = decimate(quadkit.capture(x.astype(np.complex128), sample_rate=1e6), 5)
    assert y128.dtype == np.complex128
    yr = decimate(quadkit.capture(x.real.astype(np.float32), sample_rate=1e6), 5)
    assert yr.dtype == np.float32


def test_decimate_unsettled_edges_marked():
    # a constant input: settled samples equal it (within the 1e-4 ripple), edges do not
    cap = quadkit.capture(np.ones(20000, np.complex64), sample_rate=1e6)
    y = decimate(cap, 10)
    a, b = y.attrs["unsettled_start"], y.attrs["unsettled_end"]
    assert a > 0 and b > 0
    v = np.abs(y.values - 1)
    assert v[a:-b].max() < 2e-4
    assert v[0] > 0.1 and v[-1] > 1e-3  # the first saw half the filter on zeros
    # chaining adds up: decimating again keeps the marked edge from growing smaller
    z = decimate(y, 2)
    assert z.attrs["unsettled_start"] >= a // 2


# --------------------------------------------------------------------------------------------
# resample
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("fs, new", [(2.4e6, 1e6), (30.72e6, 1.92e6), (1e6, 1.5e6)])
def test_resample_rates_tones_and_aliases(fs, new):
    band = min(fs, new)
    f_pass = np.linspace(-0.4, 0.4, 9) * band
    # outside min(fs, new)/2: aliases (down) or images (up) must be 80 dB down
    f_stop = np.linspace(0.5 * band + 1, fs / 2 - 1, 12)
    f_stop = np.concatenate([f_stop, -f_stop])
    f = np.concatenate([f_pass, f_stop])
    n = int(fs / band * 6000)
    y = resample(tones(f, fs, n), new)
    assert y.attrs["sample_rate"] == pytest.approx(new, rel=1e-12)
    assert y.sizes["time"] == math.ceil(n * new / fs)
    amp = tone_amplitudes(y, f)
    gain_db = 20 * np.log10(np.abs(amp[: f_pass.size]))
    assert gain_db.max() - gain_db.min() <= 0.01
    assert np.abs(np.angle(amp[: f_pass.size])).max() < 2e-5  # no delay
    if new < fs:
        assert np.abs(amp[f_pass.size:]).max() <= 1e-4 + 1e-6
    else:
        # upsampling: the tones above fs/2 alias in the input already; check the images
        # instead: the output holds only the tone itself (residual 80 dB down)
        s = settled(y)
        t = s["time"].values
        ref = np.exp(2j * np.pi * f_pass[:, None] * t)
        resid = s.values[: f_pass.size] - amp[:, None][: f_pass.size] * ref
        assert np.abs(resid).max() <= 2e-4


def test_resample_taps_need_a_small_ratio():
    cap = quadkit.capture(noise(100), sample_rate=1e6)
    with pytest.raises(ValueError, match="not reachable.*up, down <= 1000.*1e-09.*taps="):
        resample(cap, 1e6 * math.pi / 3, taps=ss.firwin(63, 0.3))
    with pytest.raises(ValueError, match="sample_rate=-1"):
        resample(cap, -1.0)


# ratios that are no small fraction: a 1 ppm clock correction, pi/8 down, e/2 up
FRACTIONAL = [999_999.0, 1e6 * math.pi / 8, 1e6 * math.e / 2]


@pytest.mark.parametrize("new", FRACTIONAL)
def test_resample_fractional_passband_flat_and_zero_delay(new):
    fs, n = 1e6, 30_000
    band = min(fs, new)
    f = np.linspace(-0.4, 0.4, 9) * band  # the flat band |f| <= 0.8 * band / 2
    x = tones(f, fs, n, phase=0.4)
    y = resample(x, new)
    assert y.attrs["sample_rate"] == new and y.dtype == np.complex64
    # output sample j sits at j / new on the absolute axis (no delay)
    np.testing.assert_allclose(y["time"].values[:3], np.arange(3) / new, rtol=0, atol=1e-15)
    amp = tone_amplitudes(y, f) * np.exp(-0.4j)
    gain_db = 20 * np.log10(np.abs(amp))
    # spec: 0.01 dB peak to peak over the flat band
    assert gain_db.max() - gain_db.min() <= 0.01 and np.abs(gain_db).max() <= 0.01
    # zero delay: a timing error tau would turn the phase by 2 pi f tau (3e-4 rad ~ 0.1 ns at
    # 400 kHz); the linear-phase prototype has none, spurs 80 dB down move it by <= 1e-4 rad
    assert np.abs(np.angle(amp)).max() <= 3e-4
    # against the analytic tone at the new rate: 0.01 dB is 1.2e-3 of amplitude, plus spurs
    s = settled(y)
    ref = np.exp(1j * (2 * np.pi * f[:, None] * s["time"].values + 0.4))
    assert np.abs(s.values - ref).max() <= 1.3e-3


@pytest.mark.parametrize("new", FRACTIONAL)
def test_resample_fractional_alias_and_image_rejection(new):
    fs, n = 1e6, 30_000
    band = min(fs, new)
    # tones the filter must remove: above band / 2 (they would alias), one per channel
    stop = np.array([0.5, 0.6, 0.8, 0.99]) * fs / 2
    stop = np.concatenate([stop[stop >= band / 2 * 1.0001], -stop[stop >= band / 2 * 1.0001]])
    if stop.size:
        y = settled(resample(tones(stop, fs, n), new))
        rms = np.sqrt(np.mean(np.abs(np.asarray(y.values, complex)) ** 2, axis=-1))
        # at least 80 dB down (spec); the interpolation images, 10 dB lower still, may add to
        # the alias: -80 and -90 dB sum to -79.6 dB
        assert 20 * np.log10(rms.max()) <= -79.5
    # tones in the flat band: what is left after removing the tone itself (images of the
    # input at f +- k fs and of the phase interpolation, aliased to the new rate) is 80 dB down
    f = np.array([0.3, -0.38, 0.01]) * band
    y = resample(tones(f, fs, n), new)
    amp = tone_amplitudes(y, f)
    s = settled(y)
    resid = np.asarray(s.values, complex) - amp[:, None] * np.exp(
        2j * np.pi * f[:, None] * s["time"].values)
    rms = np.sqrt(np.mean(np.abs(resid) ** 2, axis=-1))
    assert 20 * np.log10(rms.max()) <= -79.5  # as above


def test_resample_fractional_slices_channels_and_dtypes():
    fs, new = 1e6, 999_999.0
    x = noise(20_000, channels=2, seed=5)
    cap = quadkit.capture(x, sample_rate=fs)
    y = resample(cap, new)
    # multi-channel equals per channel
    np.testing.assert_array_equal(y.values[1], resample(cap.isel(channel=1), new).values)
    # a slice, then resampling, gives the same samples at the same times (settled part)
    part = resample(cap.isel(time=slice(3000, 15000)), new)
    ps = settled(part)
    k0 = int(round(ps["time"].values[0] * new))
    np.testing.assert_allclose(ps["time"].values, y["time"].values[k0:k0 + ps.sizes["time"]],
                               rtol=0, atol=1e-12)
    np.testing.assert_allclose(ps.values, y.values[:, k0:k0 + ps.sizes["time"]], atol=1e-6)
    # dtype kept: float32 stays real float32, complex128 stays complex128
    assert resample(quadkit.capture(x.real.copy(), sample_rate=fs), new).dtype == np.float32
    assert resample(cap.astype(np.complex128), new).dtype == np.complex128


# --------------------------------------------------------------------------------------------
# extract_channel
# --------------------------------------------------------------------------------------------


def test_extract_channel_tone_exact_and_center_frequency():
    fs, cf = 1e6, 433.92e6
    f0, bw = 123_456.0, 25e3
    delta = np.array([-10e3, -3e3, 0.0, 7.5e3, 10e3])  # inside the channel
    y = extract_channel(tones(f0 + delta, fs, 30000, amplitude=0.8, phase=0.25), f0, bw)
    y.attrs["center_frequency"]  # present
    assert y.attrs["sample_rate"] == fs / math.floor(0.8 * fs / bw)
    assert y.dtype == np.complex64
    amp = tone_amplitudes(y, delta)
    # exact shift from the absolute index, no delay: the tone keeps amplitude and phase
    np.testing.assert_allclose(np.abs(amp), 0.8, rtol=2e-4)  # Kaiser ripple ~1e-4
    assert np.abs(np.angle(amp) - 0.25).max() < 2e-5
    y2 = extract_channel(quadkit.capture(noise(2000), sample_rate=fs, center_frequency=cf),
                         f0, bw)
    assert y2.attrs["center_frequency"] == cf + f0


def test_extract_channel_neighbours_80_db_down():
    fs, f0, bw = 1e6, -200e3, 40e3
    guard = 1.25 * bw / 2
    far = np.linspace(-fs / 2 + 1e3, fs / 2 - 1e3, 60)
    far = far[np.abs(far - f0) >= guard]
    near = f0 + np.array([-1, 1]) * guard * np.array([[1.0], [1.05], [1.5]])
    f = np.concatenate([far, near.ravel()])
    y = extract_channel(tones(f, fs, 20000), f0, bw)
    s = settled(y)
    assert s.sizes["time"] > 200
    worst = np.sqrt(np.mean(np.abs(s.values) ** 2, axis=-1)).max()
    assert 20 * np.log10(worst) <= -80


def test_extract_channel_equals_shift_then_filter_reference():
    # reference: exact float64 shift, then the same decimation of the shifted capture
    fs, f0, bw = 1e6, 150e3, 100e3
    x = noise(12000, seed=5)
    cap = quadkit.capture(x, sample_rate=fs)
    y = extract_channel(cap, f0, bw)
    n = np.arange(x.size)
    shifted = quadkit.capture((x * np.exp(-2j * np.pi * f0 * n / fs)).astype(np.complex64),
                              sample_rate=fs)
    # the same chain on the shifted samples: a band-pass at f0 equals a low-pass after shift
    from quadkit import decimation as dec

    stages = dec._decim_chain(fs, 8, bw / 2, 1.25 * bw / 2, 80.0, 0.01, func="t")
    ref = dec._apply(shifted, stages, fs / 8)
    np.testing.assert_allclose(y.values, ref.values, atol=5e-6)


def test_extract_channel_bad_input():
    cap = quadkit.capture(noise(1000), sample_rate=1e6)
    with pytest.raises(ValueError, match="bandwidth_hz=2000000.0 must not exceed the sample"):
        extract_channel(cap, 0.0, 2e6)
    with pytest.raises(ValueError, match="offset_hz=480000.0.*inside the capture's band"):
        extract_channel(cap, 480e3, 100e3)


# --------------------------------------------------------------------------------------------
# lazy equals eager
# --------------------------------------------------------------------------------------------


@st.composite
def chunkings(draw, n):
    cuts = draw(st.lists(st.integers(1, n - 30), max_size=6, unique=True))
    short = draw(st.integers(1, 20))  # a last chunk shorter than any filter here
    edges = sorted(set(cuts) | {n - short})
    return tuple(np.diff([0] + edges + [n]).tolist())


OPERATIONS = {
    "filter": lambda c: filter(c, ss.firwin(63, 0.3)),
    "decimate7": lambda c: decimate(c, 7),
    "decimate120": lambda c: decimate(c, 120),
    "resample": lambda c: resample(c, c.attrs["sample_rate"] * 5 / 12),
    "resample_clock": lambda c: resample(c, c.attrs["sample_rate"] - 1.0),  # fractional
    "extract": lambda c: extract_channel(c, -130e3, 30e3),
}


@pytest.mark.parametrize("name", sorted(OPERATIONS))
@settings(max_examples=6, deadline=None)
@given(data=st.data())
def test_lazy_equals_eager(name, data):
    n = 6000
    op = OPERATIONS[name]
    channels = data.draw(st.sampled_from([None, 2]))
    start = data.draw(st.integers(0, 50))
    x = noise(n + start, channels=channels, seed=start)
    whole = quadkit.capture(x, sample_rate=1e6, center_frequency=1e9)
    cap = whole.isel(time=slice(start, None))  # absolute start index != 0
    chunks = data.draw(chunkings(n))
    lz = lazy(cap, chunks)
    with raise_if_dask_computes():
        out = op(lz)
    assert_lazy(out)
    eager = op(cap)
    assert out.dtype == eager.dtype == np.complex64
    assert out.attrs == eager.attrs
    got = out.compute()
    np.testing.assert_allclose(got.values, eager.values, atol=1e-5)  # issue: 1e-5 of FS
    np.testing.assert_allclose(got["time"].values, eager["time"].values, rtol=1e-12)


def test_lazy_channel_chunks_and_time_never_one_chunk():
    x = noise(20000, channels=4)
    cap = quadkit.capture(x, sample_rate=1e6)
    lz = _capture.like(cap, da.from_array(x, chunks=(2, 3000)), start_index=0)
    out = decimate(lz, 4)
    assert len(out.data.chunks[-1]) >= 6  # one output chunk per input chunk
    assert out.data.chunks[0] == (2, 2)
    np.testing.assert_allclose(out.values, decimate(cap, 4).values, atol=1e-6)


def test_distributed_local_cluster_and_tasks_pickle():
    import pickle

    distributed = pytest.importorskip("distributed")
    x = noise(30000, channels=2)
    cap = quadkit.capture(x, sample_rate=1e6)
    lz = lazy(cap, (7000, 7000, 7000, 9000))
    dec = decimate(lz, 9)
    ext = extract_channel(lz, 100e3, 50e3)
    # the graphs hold module-level functions and plain data only: they pickle (pickle, not
    # cloudpickle), as worker processes need
    again = pickle.loads(pickle.dumps(ext.data))
    np.testing.assert_allclose(again.compute(scheduler="sync"),
                               extract_channel(cap, 100e3, 50e3).values, atol=1e-5)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        got_dec, got_ext = client.compute([dec.data, ext.data], sync=True)
    np.testing.assert_allclose(got_dec, decimate(cap, 9).values, atol=1e-5)
    np.testing.assert_allclose(got_ext, extract_channel(cap, 100e3, 50e3).values, atol=1e-5)


def test_accessor_forwards():
    cap = quadkit.capture(noise(3000), sample_rate=1e6)
    np.testing.assert_array_equal(cap.qk.decimate(4).values, decimate(cap, 4).values)
    np.testing.assert_array_equal(cap.qk.extract_channel(1e5, 5e4).values,
                                  extract_channel(cap, 1e5, 5e4).values)


def test_annotations_and_segments_follow_the_rate():
    ann = [{"start_sample": 1000, "sample_count": 4000, "label": "burst"}]
    seg = [{"start_sample": 0, "center_frequency": 1e9}, {"start_sample": 6000,
                                                          "center_frequency": 1.1e9}]
    cap = quadkit.capture(noise(10000), sample_rate=1e6, annotations=ann, segments=seg)
    y = decimate(cap, 4)
    assert y.attrs["annotations"] == [{"start_sample": 250, "sample_count": 1000,
                                       "label": "burst"}]
    assert [s["start_sample"] for s in y.attrs["segments"]] == [0, 1500]
    assert cap.attrs["annotations"][0]["start_sample"] == 1000  # input untouched
    r = resample(cap, 1e6 * 5 / 12)
    assert r.attrs["annotations"][0]["start_sample"] == round(1000 * 5 / 12)


def test_lazy_small_chunks_are_merged_for_long_filters():
    x = noise(200_000)
    cap = quadkit.capture(x, sample_rate=1e6)
    lz = lazy(cap, (1000,) * 200)
    out = decimate(lz, 100)
    # the 3-stage chain reaches ~2 ms each side: output chunks are not single samples
    assert min(out.data.chunks[-1]) > 1 and len(out.data.chunks[-1]) > 1
    np.testing.assert_allclose(out.values, decimate(cap, 100).values, atol=1e-5)


def test_design_response_curve_matches_freqz():
    d = lowpass_taps(100e3, 150e3, sample_rate=1e6)
    g = d.response(1001)
    _, h = ss.freqz(d.taps, worN=g["frequency"].values, fs=1e6)  # scipy reference
    # compared as amplitudes: dB would magnify rounding at the stopband nulls
    np.testing.assert_allclose(10 ** (g.values / 20), np.abs(h), rtol=1e-9, atol=1e-13)
    assert g.attrs["units"] == "dB" and g["frequency"].attrs["units"] == "Hz"


# --------------------------------------------------------------------------------------------
# Metadata carried through every operation (DESIGN: attrs carried forward, changed ones updated)
# --------------------------------------------------------------------------------------------

_ANN = [{"start_sample": 1000, "sample_count": 4000, "lower_frequency_hz": 1.0000e9,
         "upper_frequency_hz": 1.0002e9, "label": "burst"}]
_SEG = [{"start_sample": 0, "center_frequency": 1e9, "start_time": "2026-12-01T00:00:00Z"},
        {"start_sample": 6000, "center_frequency": 1.001e9}]


def _meta_cap(real=False):
    x = noise(12000, seed=3)
    x = x.real.copy() if real else x
    return quadkit.capture(x, sample_rate=1e6, center_frequency=1e9, annotations=_ANN,
                           segments=_SEG)


# (name, call, real input, expected new rate, expected move of 0 Hz in Hz)
_META_CASES = [
    ("shift", lambda c: quadkit.mixing.shift(c, 2e5), False, 1e6, -2e5),
    ("filter", lambda c: filter(c, [0.25, 0.5, 0.25]), False, 1e6, 0.0),
    ("decimate", lambda c: decimate(c, 4), False, 2.5e5, 0.0),
    ("resample", lambda c: resample(c, 1e6 * 5 / 12), False, 1e6 * 5 / 12, 0.0),
    ("resample_fractional", lambda c: resample(c, 1e6 * math.pi / 3), False, 1e6 * math.pi / 3,
     0.0),
    ("extract_channel", lambda c: extract_channel(c, 1e5, 2e4), False, 1e6 / 40, 1e5),
    ("downconvert", lambda c: quadkit.mixing.downconvert(c, 2e5), True, 1e6, 2e5),
    ("downconvert_rate", lambda c: quadkit.mixing.downconvert(
        c, 2e5, bandwidth_hz=1e5, sample_rate=2e5), True, 2e5, 2e5),
    ("downconvert_fraction", lambda c: quadkit.mixing.downconvert(
        c, 2e5, bandwidth_hz=1e5, sample_rate=3e5), True, 3e5, 2e5),
    ("upconvert", lambda c: quadkit.mixing.upconvert(c, 1e6, sample_rate=8e6), False, 8e6,
     -1e6),
]


@pytest.mark.parametrize("name,call,real,rate,move", _META_CASES, ids=[c[0] for c in _META_CASES])
def test_annotations_and_segments_follow_every_operation(name, call, real, rate, move):
    cap = _meta_cap(real)
    y = call(cap)
    assert y.attrs["sample_rate"] == pytest.approx(rate, rel=1e-12)
    # expected values from the definitions: sample indices scale by the rate ratio (rounded
    # to the nearest sample), baseband 0 Hz moves by `move`, absolute annotation band edges
    # and segment start times do not change
    r = Fraction(rate) / Fraction(1e6)
    scale = lambda n: int(math.floor(n * r + Fraction(1, 2)))  # noqa: E731
    assert y.attrs["center_frequency"] == pytest.approx(1e9 + move, abs=1e-3)
    want_ann = [{**a, "start_sample": scale(a["start_sample"]),
                 "sample_count": scale(a["sample_count"])} for a in _ANN]
    assert y.attrs["annotations"] == want_ann
    got = y.attrs["segments"]
    assert [s["start_sample"] for s in got] == [scale(s["start_sample"]) for s in _SEG]
    # 1e-3 Hz: float64 sums of GHz values and offsets (rounding ~1e-7 Hz)
    np.testing.assert_allclose([s["center_frequency"] for s in got],
                               [s["center_frequency"] + move for s in _SEG], rtol=0, atol=1e-3)
    assert got[0]["start_time"] == _SEG[0]["start_time"]
    assert cap.attrs["segments"] == _SEG and cap.attrs["annotations"] == _ANN  # untouched
