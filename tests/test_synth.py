"""Synthetic signals: checked against their closed-form definitions."""

from __future__ import annotations

import numpy as np
import pytest
import dask.array as da
from hypothesis import given, settings, strategies as st

import quadkit
from quadkit import synth
from quadkit._nco import oscillator, phase_cycles


def test_tone_matches_definition():
    fs, f, a, ph = 1e6, 123.456e3, 0.7, -2.5
    cap = synth.tone(f, sample_rate=fs, n_samples=5000, amplitude=a, phase_rad=ph)
    n = np.arange(5000)
    ref = a * np.exp(1j * (2 * np.pi * f * n / fs + ph))  # complex exponential, definition
    # complex64 resolution is ~6e-8 relative; 1e-6 leaves room for cos/sin rounding
    np.testing.assert_allclose(cap.values, ref, atol=1e-6)
    assert cap.dtype == np.complex64


def test_real_tone_is_cosine():
    cap = synth.tone(1e3, sample_rate=48e3, n_samples=480, amplitude=0.5, phase_rad=1.0, real=True)
    n = np.arange(480)
    np.testing.assert_allclose(cap.values, 0.5 * np.cos(2 * np.pi * 1e3 * n / 48e3 + 1.0), atol=1e-6)
    assert cap.dtype == np.float32
    # RMS of a sine is A/sqrt(2) (common practice); 10 periods exactly
    assert np.sqrt(np.mean(cap.values.astype(float) ** 2)) == pytest.approx(0.5 / np.sqrt(2), rel=1e-6)


def test_nco_phase_exact_at_huge_indices():
    # Reference: exact rational arithmetic with Python integers. ratio = p / q.
    p, q = 123457, 1000003
    ratio = p / q
    start = 2**40 + 12345
    got = phase_cycles(ratio, start, 8)
    idx = np.arange(start, start + 8)
    # frac(ratio * n) from the float ratio, computed exactly with fractions.
    from fractions import Fraction

    r = Fraction(ratio)
    exp = np.array([float((r * int(n)) % 1) for n in idx])
    diff = (got - exp + 0.5) % 1 - 0.5
    assert np.max(np.abs(diff)) < 1e-8  # cycles; the 2^20 split keeps every product small
    osc = oscillator(ratio, 0, 16, np.complex128)
    np.testing.assert_allclose(osc, np.exp(2j * np.pi * ratio * np.arange(16)), atol=1e-12)


def test_noise_power_and_circularity():
    cap = synth.noise(sample_rate=1e6, n_samples=200_000, power_dbfs=-10, rng=0)
    x = cap.values.astype(np.complex128)
    assert np.mean(np.abs(x) ** 2) == pytest.approx(0.1, rel=1e-6)
    # circular: I and Q each carry half the power, uncorrelated (std of estimate ~ 1/sqrt(N))
    assert np.mean(x.real**2) == pytest.approx(0.05, rel=0.02)
    assert abs(np.mean(x.real * x.imag)) < 0.05 * 0.02


def test_bandlimited_noise_stays_in_band():
    fs, bw = 1e6, 200e3
    cap = synth.noise(sample_rate=fs, n_samples=2**16, bandwidth_hz=bw, rng=1)
    spec = np.abs(np.fft.fft(cap.values.astype(np.complex128))) ** 2
    f = np.fft.fftfreq(spec.size, 1 / fs)
    outside = spec[np.abs(f) > bw / 2 + fs / spec.size].sum() / spec.sum()
    assert outside < 1e-10  # brick wall; only float32 rounding leaks


def test_multitone_powers_add():
    cap = synth.multitone([-200e3, 50e3, 300e3], sample_rate=1e6, n_samples=10_000,
                          amplitudes=[1.0, 0.5, 0.25])
    # orthogonal tones over whole periods: power is the sum of A^2 (Parseval)
    assert np.mean(np.abs(cap.values) ** 2) == pytest.approx(1 + 0.25 + 0.0625, rel=1e-5)


def test_chirp_instantaneous_frequency():
    fs, n = 1e6, 10_000
    cap = synth.chirp(-400e3, 400e3, sample_rate=fs, n_samples=n)
    inst = np.diff(np.unwrap(np.angle(cap.values.astype(np.complex128)))) * fs / (2 * np.pi)
    t_mid = (np.arange(n - 1) + 0.5) / fs
    expected = -400e3 + 800e3 * t_mid / (n / fs)  # linear sweep definition
    np.testing.assert_allclose(inst, expected, atol=2.0)  # float32 phase noise ~ Hz


@settings(max_examples=15, deadline=None)
@given(snr_db=st.floats(-10, 40), real=st.booleans(), frac=st.floats(0.05, 1.0))
def test_add_noise_exact_snr_in_band(snr_db, real, frac):
    fs = 1e6
    cap = synth.tone(10e3, sample_rate=fs, n_samples=20_000, real=real, amplitude=0.3)
    band = fs / 2 if real else fs
    bw = frac * band
    noisy = synth.add_noise(cap, snr_db=snr_db, bandwidth_hz=bw, rng=5)
    noise = noisy.values.astype(np.float64 if real else np.complex128) - cap.values
    p_sig = np.mean(np.abs(cap.values.astype(np.complex128)) ** 2)
    p_noise_in_band = np.mean(np.abs(noise) ** 2) * bw / band  # white: density x bandwidth
    # float32 storage of the sum limits exactness to ~1e-6 relative of the signal
    assert 10 * np.log10(p_sig / p_noise_in_band) == pytest.approx(snr_db, abs=1e-3)


def test_add_noise_lazy_keeps_lazy():
    cap = synth.tone(10e3, sample_rate=1e6, n_samples=10_000)
    lazy = cap.copy(data=da.from_array(cap.values, chunks=3000))
    out = synth.add_noise(lazy, snr_db=10, rng=1)
    assert quadkit._capture.is_lazy(out)
    noise = out.values - cap.values
    assert 10 * np.log10(1 / np.mean(np.abs(noise) ** 2)) == pytest.approx(10, abs=0.1)


@pytest.mark.parametrize("call", [
    lambda: synth.tone(1e3, sample_rate=1e6),
    lambda: synth.tone(1e3, sample_rate=1e6, n_samples=0),
    lambda: synth.tone(2e6, sample_rate=1e6, n_samples=10),
    lambda: synth.noise(sample_rate=1e6, n_samples=10, bandwidth_hz=2e6),
    lambda: synth.add_noise(synth.tone(0, sample_rate=1, n_samples=4, amplitude=0), snr_db=3),
])
def test_bad_arguments(call):
    with pytest.raises(ValueError):
        call()


@pytest.mark.parametrize("exact", [True, False])
def test_add_noise_is_the_same_whatever_the_chunking(exact):
    from quadkit.testing import as_lazy, raise_if_dask_computes

    cap = synth.tone(10e3, sample_rate=1e6, n_samples=150_001)
    two = quadkit.capture(np.stack([cap.values, 0.5 * cap.values]), sample_rate=1e6)
    eager = synth.add_noise(two, snr_db=20, rng=1, exact_power=exact)
    for chunks in (10_000, 33_333, (100_000, 50_001)):
        with raise_if_dask_computes():
            lazy = synth.add_noise(as_lazy(two, chunks), snr_db=20, rng=1, exact_power=exact)
        # float32 output; the power reductions sum in another order: 1e-6 of full scale
        np.testing.assert_allclose(lazy.values, eager.values, atol=1e-6)
    # channels get independent noise
    n0 = eager.values[0] - two.values[0]
    n1 = eager.values[1] - two.values[1]
    assert abs(np.vdot(n0, n1)) / np.sqrt(np.vdot(n0, n0).real * np.vdot(n1, n1).real) < 0.02
