"""Tests of quadkit.mixing against the DFT shift theorem, exact rational phase arithmetic and
the complex-envelope convention x(t) = Re{z(t) exp(j 2 pi f_c t)} of DESIGN.md."""

from __future__ import annotations

import math
from fractions import Fraction

import dask.array as da
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import quadkit
from quadkit import _capture
from quadkit.mixing import downconvert, shift, upconvert
from quadkit.testing import as_lazy, assert_lazy, raise_if_dask_computes


def noise(n, channels=None, dtype=np.complex64, seed=0):
    rng = np.random.default_rng(seed)
    shape = (n,) if channels is None else (channels, n)
    x = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
    return (x / math.sqrt(2)).astype(dtype)


lazy = as_lazy


def settled(y):
    a, b = y.attrs.get("unsettled_start", 0), y.attrs.get("unsettled_end", 0)
    return y.isel(time=slice(a, y.sizes["time"] - b))


def exact_phase_rad(ratio: float, n: int) -> float:
    """2 pi frac(ratio * n) computed exactly with rationals (ratio is the float as given)."""
    c = Fraction(ratio) * n
    frac = c - math.floor(c)
    if frac >= Fraction(1, 2):
        frac -= 1
    return 2 * math.pi * float(frac)


# --------------------------------------------------------------------------------------------
# shift
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("k", [1, 37, -200, 511])
def test_shift_dft_shift_theorem(k):
    # Oppenheim & Schafer, DFT properties (memory): x[n] exp(j 2 pi k n / N) <-> X[(m - k) mod N]
    n, fs = 1024, 1.024e6
    x = noise(n)
    y = shift(quadkit.capture(x, sample_rate=fs), k * fs / n)
    ref = np.roll(np.fft.fft(x.astype(complex)), k)
    # float32 samples and oscillator: |error| ~ 1e-7 per sample, sqrt(N) * that in the FFT
    np.testing.assert_allclose(np.fft.fft(y.values.astype(complex)), ref, atol=1e-4)
    assert y.dtype == np.complex64


def test_shift_keeps_absolute_frequency():
    fs, cf, f = 1e6, 2.45e9, 123e3
    cap = quadkit.synth.tone(f, sample_rate=fs, n_samples=1000, center_frequency=cf)
    for offset in (-300e3, 50e3, 250e3):
        y = shift(cap, offset)
        spec = np.fft.fftshift(np.fft.fft(y.values))
        freqs = np.fft.fftshift(np.fft.fftfreq(1000, 1 / fs))
        peak = freqs[np.argmax(np.abs(spec))]
        assert peak == pytest.approx(f + offset)  # the content moved by offset
        assert y.attrs["center_frequency"] == cf - offset
        assert y.attrs["center_frequency"] + peak == pytest.approx(cf + f, abs=1e-3)


@pytest.mark.parametrize("start", [2**30, 2**30 + 12345, 2**36 - 7, 2**44 + 3])
def test_shift_phase_exact_at_large_indices(start):
    # issue: phase error below 1e-5 rad after 2^30 samples. A capture whose first sample is
    # absolute index `start`, without allocating `start` samples.
    fs = 30.72e6
    offset = 1_234_567.891
    data = np.ones(5000, np.complex64)
    cap = _capture.from_array(data, {"sample_rate": fs, "center_frequency": 0.0,
                                     "full_scale": 1.0}, start_index=start)
    assert _capture.start_index(cap) == start
    y = shift(cap, offset)
    ratio = offset / fs
    idx = [0, 1, 4095, 4096, 4999]
    got = np.angle(y.values[idx].astype(complex))
    ref = np.array([exact_phase_rad(ratio, start + i) for i in idx])
    err = np.angle(np.exp(1j * (got - ref)))
    assert np.abs(err).max() < 1e-5
    assert np.abs(np.abs(y.values) - 1).max() < 1e-6  # float32 unit phasor


def test_shift_slice_commutes_and_chunking_bit_identical():
    fs = 1e6
    x = noise(20000)
    cap = quadkit.capture(x, sample_rate=fs)
    y = shift(cap, 77_777.7)
    ys = shift(cap.isel(time=slice(9001, 15000)), 77_777.7)
    np.testing.assert_array_equal(ys.values, y.values[9001:15000])
    lz = lazy(cap, (1, 4095, 4097, 333, 11474))
    with raise_if_dask_computes():
        yl = shift(lz, 77_777.7)
    assert_lazy(yl)
    np.testing.assert_array_equal(yl.values, y.values)  # independent of the chunking


def test_shift_dtypes_channels_and_accessor():
    x = noise(3000, channels=3)
    cap = quadkit.capture(x, sample_rate=1e6, center_frequency=915e6)
    y = shift(cap, 1e4)
    for c in range(3):
        one = shift(quadkit.capture(x[c], sample_rate=1e6, center_frequency=915e6), 1e4)
        np.testing.assert_array_equal(y.values[c], one.values)
    assert y.dims == ("channel", "time")
    assert shift(quadkit.capture(x.astype(np.complex128), sample_rate=1.0), 0.1).dtype \
        == np.complex128
    assert shift(quadkit.capture(x.real.astype(np.float32), sample_rate=1.0), 0.1).dtype \
        == np.complex64
    np.testing.assert_array_equal(cap.qk.shift(1e4).values, y.values)
    with pytest.raises(ValueError, match="offset_hz=nan must be finite"):
        shift(cap, float("nan"))


# --------------------------------------------------------------------------------------------
# downconvert / upconvert
# --------------------------------------------------------------------------------------------


@settings(max_examples=15, deadline=None)
@given(amp=st.floats(0.01, 1.0), phi=st.floats(-math.pi, math.pi),
       fc=st.floats(50e3, 450e3), dev=st.floats(-0.3, 0.3))
def test_downconvert_real_tone_gives_complex_envelope(amp, phi, fc, dev):
    # DESIGN.md: A cos(2 pi f_c t + phi) has z = A exp(j phi); a tone off the carrier by df
    # gives A exp(j (2 pi df t + phi)).
    fs, n = 1e6, 6000
    room = 2 * min(fc, fs / 2 - fc)
    df = dev * 0.8 * room / 2
    t = np.arange(n) / fs
    x = (amp * np.cos(2 * np.pi * (fc + df) * t + phi)).astype(np.float32)
    cap = quadkit.capture(x, sample_rate=fs)
    z = settled(downconvert(cap, fc))
    assert z.dtype == np.complex64 and z.attrs["center_frequency"] == fc
    tz = z["time"].values
    ref = amp * np.exp(1j * (2 * np.pi * df * tz + phi))
    # Kaiser ripple and image residue ~1e-4 of A each (80 dB), float32 ~1e-7
    assert np.abs(z.values - ref).max() <= 3e-4 * amp + 1e-6


@pytest.mark.parametrize("rate", [100e3, 300e3])
def test_downconvert_to_lower_rate(rate):
    fs, fc, amp, phi = 1e6, 250e3, 0.5, -2.0
    df = 12e3
    n = 20000
    t = np.arange(n) / fs
    x = (amp * np.cos(2 * np.pi * (fc + df) * t + phi)).astype(np.float32)
    z = settled(downconvert(quadkit.capture(x, sample_rate=fs), fc, sample_rate=rate))
    assert z.attrs["sample_rate"] == pytest.approx(rate)
    ref = amp * np.exp(1j * (2 * np.pi * df * z["time"].values + phi))
    assert np.abs(z.values - ref).max() <= 3e-4 * amp + 1e-6


def test_downconvert_rejects_the_image():
    # a pure carrier cos(2 pi f_c t) mixes to 1/2 at 0 Hz plus 1/2 at -2 f_c (the image);
    # after the low-pass and the factor 2 only z = 1 is left, the image 80 dB down
    fs, fc, bw = 1e6, 200e3, 100e3
    t = np.arange(20000) / fs
    for f_carrier in (fc, 0.37 * fs):
        x = np.cos(2 * np.pi * f_carrier * t).astype(np.float32)
        z = settled(downconvert(quadkit.capture(x, sample_rate=fs), f_carrier, bandwidth_hz=bw))
        resid = np.abs(z.values - 1.0).max()
        # 80 dB image rejection (1e-4) plus at most 1e-4 passband ripple at DC
        assert resid <= 2e-4


def test_downconvert_bad_input():
    x = quadkit.capture(np.zeros(1000, np.float32), sample_rate=1e6)
    with pytest.raises(ValueError, match=r"carrier_hz=600000.0 must lie in \(0, sample_rate/2\)"):
        downconvert(x, 600e3)
    with pytest.raises(ValueError, match="bandwidth_hz=500000.0 is too wide"):
        downconvert(x, 250e3, bandwidth_hz=500e3)
    with pytest.raises(ValueError, match="real samples"):
        downconvert(quadkit.capture(np.zeros(10, np.complex64), sample_rate=1e6), 1e5)
    with pytest.raises(ValueError, match="sample_rate=10000.0 must exceed bandwidth_hz"):
        downconvert(x, 250e3, bandwidth_hz=50e3, sample_rate=10e3)


def test_upconvert_matches_real_passband_formula():
    # DESIGN.md: x(t) = Re{z(t) exp(j 2 pi f_c t)}; z a tone of amplitude a at offset f
    fs, fc, out_rate = 100e3, 230e3, 1e6
    a, f, phi = 0.7, 13e3, 1.1
    z = quadkit.synth.tone(f, sample_rate=fs, n_samples=4000, amplitude=a, phase_rad=phi,
                           center_frequency=5.8e9)
    x = settled(upconvert(z, fc, sample_rate=out_rate))
    assert x.dtype == np.float32 and x.attrs["sample_rate"] == out_rate
    assert x.attrs["center_frequency"] == 5.8e9 - fc
    t = x["time"].values
    ref = a * np.cos(2 * np.pi * (fc + f) * t + phi)
    assert np.abs(x.values - ref).max() <= 3e-4 * a  # interpolation ripple/images 80 dB


@settings(max_examples=8, deadline=None)
@given(phases=st.lists(st.floats(-3, 3), min_size=3, max_size=3),
       amps=st.lists(st.floats(0.05, 0.3), min_size=3, max_size=3))
def test_upconvert_downconvert_round_trip(phases, amps):
    fs, fc = 200e3, 310e3
    offsets = [-60e3, 5e3, 71e3]  # inside the 80 % band
    z = quadkit.synth.multitone(offsets, sample_rate=fs, n_samples=3000, amplitudes=amps,
                                phases_rad=phases)
    x = upconvert(z, fc)  # default rate: the smallest multiple of fs >= 2 fc + fs
    assert x.attrs["sample_rate"] == math.ceil((2 * fc + fs) / fs) * fs
    back = downconvert(x, fc, sample_rate=fs)
    back = settled(back)
    ref = z.sel(time=back["time"], method="nearest")
    assert np.allclose(ref["time"].values, back["time"].values, rtol=1e-12, atol=1e-15)
    assert np.abs(back.values - ref.values).max() <= 5e-4 * sum(amps)
    assert back.attrs["center_frequency"] == z.attrs["center_frequency"]


def test_upconvert_bad_input():
    z = quadkit.capture(np.zeros(100, np.complex64), sample_rate=1e6)
    with pytest.raises(ValueError, match="carrier_hz=100000.0 must be at least half"):
        upconvert(z, 100e3)
    with pytest.raises(ValueError, match="sample_rate=2000000.0 must be at least"):
        upconvert(z, 1e6, sample_rate=2e6)
    with pytest.raises(ValueError, match="must be complex"):
        upconvert(quadkit.capture(np.zeros(10, np.float32), sample_rate=1e6), 1e6)


def test_conversions_lazy_equal_eager_and_multichannel():
    fs = 1e6
    rng = np.random.default_rng(9)
    x = rng.standard_normal((2, 9000)).astype(np.float32)
    cap = quadkit.capture(x, sample_rate=fs)
    lz = lazy(cap, (3000, 2500, 3490, 10))
    with raise_if_dask_computes():
        d1 = downconvert(lz, 200e3, sample_rate=250e3)
        d2 = downconvert(lz, 200e3, sample_rate=300e3)
    assert_lazy(d1) and assert_lazy(d2)
    e1 = downconvert(cap, 200e3, sample_rate=250e3)
    np.testing.assert_allclose(d1.values, e1.values, atol=1e-5)
    np.testing.assert_allclose(d2.values, downconvert(cap, 200e3, sample_rate=300e3).values,
                               atol=1e-5)
    for c in range(2):
        one = downconvert(quadkit.capture(x[c], sample_rate=fs), 200e3, sample_rate=250e3)
        np.testing.assert_allclose(e1.values[c], one.values, atol=1e-6)
    z = quadkit.capture(noise(4000, channels=2), sample_rate=fs)
    zl = lazy(z, (1000, 1999, 1001))
    with raise_if_dask_computes():
        u = upconvert(zl, 1e6)
    assert_lazy(u)
    np.testing.assert_allclose(u.values, upconvert(z, 1e6).values, atol=1e-5)


def test_segments_follow_the_center_frequency():
    seg = [{"start_sample": 0, "center_frequency": 1e9},
           {"start_sample": 500, "center_frequency": 1.001e9}]
    cap = quadkit.capture(noise(1000), sample_rate=1e6, center_frequency=1e9, segments=seg)
    y = shift(cap, 2e5)
    assert [s["center_frequency"] for s in y.attrs["segments"]] == [1e9 - 2e5, 1.001e9 - 2e5]
    assert cap.attrs["segments"][0]["center_frequency"] == 1e9  # input untouched


def test_shift_refuses_offsets_beyond_half_the_rate():
    # a shift by more than fs/2 folds the band onto itself: a 1 kHz tone shifted by 2 MHz at
    # 1 MS/s lands at 2.001 MHz = 1 kHz modulo fs, so its stated absolute frequency would be
    # off by 2 MHz (sampling theorem, common practice)
    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=64)
    for bad in (2e6, -2e6, 500_000.5):
        with pytest.raises(ValueError, match=r"shift: \|offset_hz\| <= sample_rate/2.*"
                                             + f"offset_hz={bad!r}".replace(".", r"\.")):
            shift(cap, bad)
    # the edges +-fs/2 themselves are allowed: the tone keeps its absolute frequency
    for edge in (5e5, -5e5):
        y = shift(cap, edge)
        assert y.attrs["center_frequency"] == -edge
