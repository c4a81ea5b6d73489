"""Tests of quadkit.recovery: tone frequency/amplitude/phase, sine fits, harmonics, analytic.

References are named beside each check. Monte Carlo tests run many trials at once as the
channels of one multi-channel capture (each channel is estimated on its own; that
multi-channel equals per-channel is tested separately).
"""

from __future__ import annotations

import math

import dask.array as da
import numpy as np
import pytest
import scipy.optimize
import scipy.signal
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

import quadkit
from quadkit import recovery
from quadkit.testing import assert_lazy, assert_units, raise_if_dask_computes


# --------------------------------------------------------------------------------------------
# helpers
# --------------------------------------------------------------------------------------------

def _lazy(cap: xr.DataArray, rng: np.random.Generator) -> xr.DataArray:
    """The same capture backed by dask, random chunk sizes along time, a short last chunk."""
    n = cap.sizes["time"]
    sizes = []
    left = n
    while left > 0:
        size = int(rng.integers(max(1, n // 9), max(2, n // 3)))
        size = min(size, left)
        sizes.append(size)
        left -= size
    if len(sizes) > 1 and sizes[-1] >= sizes[0]:  # make the last chunk the short one
        sizes[-1], sizes[0] = sizes[0], sizes[-1]
    chunks = (tuple(sizes),) if cap.ndim == 1 else ((1,) * cap.sizes["channel"], tuple(sizes))
    data = da.from_array(cap.values, chunks=chunks)
    attrs = {k: v for k, v in cap.attrs.items() if k not in ("sample_rate", "center_frequency")}
    out = quadkit.capture(data, sample_rate=cap.attrs["sample_rate"],
                          center_frequency=cap.attrs["center_frequency"], **attrs)
    return out


def _cnoise(rng, shape, sigma):
    """Complex circular white Gaussian noise of variance sigma**2 (E|w|^2 = sigma^2)."""
    return sigma * (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)) / math.sqrt(2)


def _wrap(a):
    return (np.asarray(a) + np.pi) % (2 * np.pi) - np.pi


def _assert_close_datasets(a: xr.Dataset, b: xr.Dataset, rtol=1e-9, atol=1e-9):
    assert set(a.data_vars) == set(b.data_vars)
    for name in a.data_vars:
        va, vb = np.asarray(a[name].values), np.asarray(b[name].values)
        if name.startswith("phase") or name.startswith("relative_phase"):
            scale = 180 / np.pi if name.endswith("_deg") else 1.0
            va, vb = va / scale, vb / scale
            np.testing.assert_allclose(_wrap(va - vb), 0, atol=atol, err_msg=name)
        else:
            np.testing.assert_allclose(va, vb, rtol=rtol, atol=atol, err_msg=name)


# --------------------------------------------------------------------------------------------
# Frequency, amplitude, phase against the Cramer-Rao bounds
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("n, snr_db", [(256, 10.0), (256, 30.0), (4096, 10.0)])
def test_complex_tone_reaches_cramer_rao_bounds(n, snr_db):
    # CRLB, complex tone in complex white Gaussian noise, rho = A^2 / sigma^2, n = 0..N-1
    # (Rife & Boorstyn, IEEE Trans. IT-20(5), 1974; Kay, Fundamentals I, Ex. 3.14, memory):
    #   var(w) >= 6 / (rho N (N^2 - 1)) rad^2/sample^2
    #   var(A) >= sigma^2 / (2N),  var(phase at n = 0) >= (2N - 1) / (rho N (N + 1))
    rng = np.random.default_rng(20240 + n + int(snr_db))
    trials = 400
    rho = 10 ** (snr_db / 10)
    sigma = math.sqrt(1 / rho)
    f = rng.uniform(-0.45, 0.45, trials)
    phase = rng.uniform(-np.pi, np.pi, trials)
    k = np.arange(n)
    x = np.exp(1j * (2 * np.pi * f[:, None] * k + phase[:, None])) + _cnoise(rng, (trials, n), sigma)
    res = recovery.measure_tone(quadkit.capture(x, sample_rate=1.0))
    w_err = 2 * np.pi * (res.offset_hz.values - f)
    a_err = res.amplitude.values - 1.0
    p_err = _wrap(res.phase_rad.values - phase)
    crlb_w = 6 / (rho * n * (n**2 - 1))
    crlb_a = sigma**2 / (2 * n)
    crlb_p = (2 * n - 1) / (rho * n * (n + 1))
    # The requirement: frequency MSE within 1 dB of the bound. With 400 trials the
    # sample MSE of an efficient estimator scatters by sqrt(2/400) = 7 % (0.3 dB) one sigma;
    # it may not beat the bound by more than that scatter either (that would mean a bug in the
    # reference or the test), hence the -0.8 dB floor.
    ratio_db = 10 * np.log10(np.mean(w_err**2) / crlb_w)
    assert -0.8 < ratio_db < 1.0, ratio_db
    # Amplitude and phase: unbiased (mean error under 4 standard errors) and within 1 dB.
    for err, bound in ((a_err, crlb_a), (p_err, crlb_p)):
        assert abs(err.mean()) < 4 * math.sqrt(bound / trials)
        assert -0.8 < 10 * np.log10(np.mean(err**2) / bound) < 1.0


@pytest.mark.parametrize("n, snr_db", [(256, 10.0), (4096, 10.0), (4096, 30.0)])
def test_real_tone_reaches_cramer_rao_bounds(n, snr_db):
    # Real tone A cos(w n + phi) in real white noise, eta = A^2 / (2 sigma^2) (Kay,
    # Fundamentals I, Ex. 3.14, memory; REFERENCES.md):
    #   var(f) >= 12 / ((2 pi)^2 eta N (N^2 - 1)) cycles^2/sample^2,
    #   var(A) >= 2 sigma^2 / N, var(phi) >= 2 (2N - 1) / (eta N (N + 1)).
    # The bounds hold asymptotically for frequencies away from 0 and fs/2 (the image term
    # vanishes there), hence the 0.05 .. 0.45 range.
    rng = np.random.default_rng(777 + n + int(snr_db))
    trials = 400
    eta = 10 ** (snr_db / 10)
    sigma = math.sqrt(1 / (2 * eta))
    f = rng.uniform(0.05, 0.45, trials)
    phase = rng.uniform(-np.pi, np.pi, trials)
    k = np.arange(n)
    x = np.cos(2 * np.pi * f[:, None] * k + phase[:, None]) + sigma * rng.standard_normal((trials, n))
    res = recovery.measure_tone(quadkit.capture(x, sample_rate=1.0))
    f_err = res.offset_hz.values - f
    a_err = res.amplitude.values - 1.0
    p_err = _wrap(res.phase_rad.values - phase)
    bounds = (12 / ((2 * np.pi) ** 2 * eta * n * (n**2 - 1)), 2 * sigma**2 / n,
              2 * (2 * n - 1) / (eta * n * (n + 1)))
    # Tolerances as in the complex case (400 trials: 0.3 dB one-sigma scatter).
    for err, bound in zip((f_err, a_err, p_err), bounds):
        assert abs(err.mean()) < 4 * math.sqrt(bound / trials)
        assert -0.8 < 10 * np.log10(np.mean(err**2) / bound) < 1.0


def test_measure_tone_values_and_units():
    # A tone of amplitude A gives power A^2 (complex) and A^2 / 2 (real): STYLE.md / DESIGN.md
    # power convention (common practice).
    cap = quadkit.synth.tone(-31.25e3, sample_rate=1e6, n_samples=10_000, amplitude=0.5,
                             phase_rad=-2.0, center_frequency=2.4e9, dtype=np.complex128)
    res = recovery.measure_tone(cap)
    assert_units(res)
    assert res.frequency_hz.attrs["units"] == "Hz" and res.amplitude.attrs["units"] == "FS"
    # noiseless complex128 tone: the estimate is exact to rounding (1e-9 of a bin is far
    # below anything noise could give)
    assert abs(float(res.offset_hz) + 31.25e3) < 1e-6
    assert abs(float(res.frequency_hz) - (2.4e9 - 31.25e3)) < 1e-3
    assert abs(float(res.amplitude) - 0.5) < 1e-9
    assert abs(float(res.power_dbfs) - 20 * math.log10(0.5)) < 1e-8
    assert abs(float(res.phase_rad) + 2.0) < 1e-8
    assert abs(float(res.phase_deg) - math.degrees(-2.0)) < 1e-6
    real = quadkit.synth.tone(100e3, sample_rate=1e6, n_samples=10_000, amplitude=1.0,
                              real=True, dtype=np.float64)
    r = recovery.measure_tone(real)
    # a real full-scale sine is -3.01 dBFS: 10 log10(1/2) (DESIGN.md)
    assert abs(float(r.power_dbfs) - 10 * math.log10(0.5)) < 1e-8
    for var in list(res.data_vars.values()) + list(r.data_vars.values()):
        assert not np.any(np.isnan(var.values))
    # noiseless: the residual is at rounding level, the SNR huge or unbounded (+inf)
    assert float(res.snr_db) > 200


def test_measure_tone_snr_estimate_and_residual():
    # Known SNR from synth.add_noise(exact_power): the residual power equals the added noise
    # power up to the fitted degrees of freedom (3 of 2N real values: 0.1 % at N = 4096 -- a
    # 0.05 dB tolerance covers it).
    cap = quadkit.synth.tone(12.3e3, sample_rate=1e6, n_samples=4096, amplitude=0.7)
    noisy = quadkit.synth.add_noise(cap, snr_db=25.0, rng=3)
    res = recovery.measure_tone(noisy)
    assert abs(float(res.snr_db) - 25.0) < 0.05
    noise_rms = math.sqrt(0.7**2 / 10**2.5)
    assert abs(float(res.residual_rms) / noise_rms - 1) < 0.01


def test_frequency_hint_selects_the_weaker_tone():
    cap = quadkit.synth.multitone([-200e3, 150e3], sample_rate=1e6, n_samples=8192,
                                  amplitudes=[1.0, 0.1], phases_rad=[0.0, 1.2],
                                  center_frequency=100e6)
    strongest = recovery.measure_tone(cap)
    assert abs(float(strongest.offset_hz) + 200e3) < 1.0
    weak = recovery.measure_tone(cap, 100e6 + 150e3 + 100.0)  # a hint 100 Hz off
    # the strong tone's sidelobes leak into the weak one: the joint least squares is not
    # made here, so allow the leakage level of a rectangular window 350 kHz / 122 Hz-bins away
    # (about 1/(pi * 2900) ~ 1e-4 relative)
    assert abs(float(weak.offset_hz) - 150e3) < 1.0
    assert abs(float(weak.amplitude) - 0.1) < 1e-3
    fixed = recovery.measure_tone(cap, 100e6 + 150e3, refine=False)
    assert float(fixed.offset_hz) == 150e3
    assert abs(float(fixed.phase_rad) - 1.2) < 1e-2


def test_phase_refers_to_the_first_sample_of_a_slice():
    # phase at sample k of A exp(j(w n + phi)) is phi + w k (definition of the model)
    cap = quadkit.synth.tone(1234.5, sample_rate=48e3, n_samples=20_000, phase_rad=0.3,
                             dtype=np.complex128)
    k = 777
    res = recovery.measure_tone(cap.isel(time=slice(k, None)))
    expected = _wrap(0.3 + 2 * np.pi * 1234.5 / 48e3 * k)
    assert abs(_wrap(float(res.phase_rad) - expected)) < 1e-8


@pytest.mark.parametrize("real", [False, True])
@pytest.mark.parametrize("phase", [np.pi / 4, 3 * np.pi / 4, -3 * np.pi / 4, -np.pi / 4,
                                   3.1, -3.1, 0.0])
def test_phase_in_every_quadrant(real, phase):
    # quadrant-correct phase (atan2): phi and -phi share their cosine and must differ
    cap = quadkit.synth.tone(5e3, sample_rate=1e6, n_samples=2000, phase_rad=phase,
                             real=real, dtype=np.float64 if real else np.complex128)
    for func in (lambda c: recovery.measure_tone(c), lambda c: recovery.sine_fit(c),
                 lambda c: recovery.iq_components(c, 5e3)):
        got = float(func(cap).phase_rad)
        assert abs(_wrap(got - phase)) < 1e-6, (func, got, phase)
    iq = recovery.iq_components(cap, 5e3)
    # I = A cos(phi), Q = A sin(phi) (DESIGN.md complex-envelope convention)
    assert abs(float(iq.i) - math.cos(phase)) < 1e-9
    assert abs(float(iq.q) - math.sin(phase)) < 1e-9


def test_same_cosine_different_phase():
    a = quadkit.synth.tone(5e3, sample_rate=1e6, n_samples=2000, phase_rad=2.0, real=True)
    b = quadkit.synth.tone(5e3, sample_rate=1e6, n_samples=2000, phase_rad=-2.0, real=True)
    pa = float(recovery.measure_tone(a).phase_rad)
    pb = float(recovery.measure_tone(b).phase_rad)
    # float32 samples: phase good to ~1e-6 rad; the two must be 4 rad apart, not equal
    assert abs(pa - 2.0) < 1e-4 and abs(pb + 2.0) < 1e-4


def test_iq_components_match_the_coherent_dft():
    # Coherent DFT: x = A cos(2 pi k n / N + phi) => 2|X[k]|/N = A, angle X[k] = phi
    # (Oppenheim & Schafer, memory); numpy.fft is the reference.
    rng = np.random.default_rng(5)
    n, k = 1024, 37
    x = 0.6 * np.cos(2 * np.pi * k * np.arange(n) / n + 2.2) + 0.01 * rng.standard_normal(n)
    cap = quadkit.capture(x, sample_rate=1024.0)
    iq = recovery.iq_components(cap, float(k))
    spec = np.fft.fft(x)[k] * 2 / n
    # coherent sampling: the fitted cos/sin/1 columns are orthogonal, so the least-squares
    # and DFT answers agree to rounding
    assert abs(complex(float(iq.i), float(iq.q)) - spec) < 1e-12
    assert abs(float(iq.amplitude) - abs(spec)) < 1e-12


# --------------------------------------------------------------------------------------------
# Sine fits (IEEE Std 1241)
# --------------------------------------------------------------------------------------------

def _noisy_sine(rng, n=3000, f=0.0123456, a=0.8, phi=-1.1, c=0.05, sigma=0.02):
    k = np.arange(n)
    return a * np.cos(2 * np.pi * f * k + phi) + c + sigma * rng.standard_normal(n)


def test_three_parameter_fit_equals_lstsq():
    # IEEE Std 1241 three-parameter fit = least squares on [cos, sin, 1] (REFERENCES.md);
    # numpy.linalg.lstsq is the reference.
    rng = np.random.default_rng(11)
    x = _noisy_sine(rng)
    fs, f = 1e5, 0.0123456 * 1e5
    t = np.arange(x.size) / fs
    d = np.stack([np.cos(2 * np.pi * f * t), np.sin(2 * np.pi * f * t), np.ones_like(t)], 1)
    (a, b, c), *_ = np.linalg.lstsq(d, x, rcond=None)
    fit = recovery.sine_fit(quadkit.capture(x, sample_rate=fs), f)
    assert fit.attrs["fit"] == "three-parameter"
    # both solve the same 3x3 normal equations in float64: agreement to ~1e-12
    assert abs(float(fit.amplitude) - math.hypot(a, b)) < 1e-10
    assert abs(_wrap(float(fit.phase_rad) - math.atan2(-b, a))) < 1e-10
    assert abs(float(fit.offset) - c) < 1e-10
    resid = x - d @ np.array([a, b, c])
    assert abs(float(fit.residual_rms) - math.sqrt(np.mean(resid**2))) < 1e-10


def test_four_parameter_fit_agrees_with_scipy_least_squares():
    # The four-parameter fit minimises the same sum of squares as a general solver
    # (scipy.optimize.least_squares, started from the true values).
    rng = np.random.default_rng(12)
    x = _noisy_sine(rng)
    k = np.arange(x.size)

    def resid(p):
        return p[0] * np.cos(2 * np.pi * p[3] * k + p[1]) + p[2] - x

    ref = scipy.optimize.least_squares(resid, [0.8, -1.1, 0.05, 0.0123456], xtol=1e-15,
                                       ftol=1e-15, gtol=1e-15).x
    fit = recovery.sine_fit(quadkit.capture(x, sample_rate=1.0))
    assert fit.attrs["fit"] == "four-parameter"
    # Both reach the same minimum; what is left is the solvers' convergence, required to be
    # below 1 % of the statistical error (the CRLB standard deviations, Kay Ex. 3.14, memory:
    # eta = A^2 / (2 sigma^2), var f = 12 / ((2 pi)^2 eta N (N^2 - 1)), var A = 2 sigma^2 / N,
    # var phi ~ 2 (2N - 1) / (eta N (N + 1)))
    n, sigma = x.size, 0.02
    eta = 0.8**2 / (2 * sigma**2)
    sd_f = math.sqrt(12 / ((2 * np.pi) ** 2 * eta * n * (n**2 - 1)))
    sd_a = math.sqrt(2 * sigma**2 / n)
    sd_p = math.sqrt(2 * (2 * n - 1) / (eta * n * (n + 1)))
    assert abs(float(fit.frequency_hz) - ref[3]) < 0.01 * sd_f
    assert abs(float(fit.amplitude) - ref[0]) < 0.01 * sd_a
    assert abs(_wrap(float(fit.phase_rad) - ref[1])) < 0.01 * sd_p
    assert abs(float(fit.offset) - ref[2]) < 0.01 * sd_a
    # the minimum itself: same sum of squares to 1e-9 relative
    assert abs(float(fit.residual_rms) / math.sqrt(np.mean(resid(ref) ** 2)) - 1) < 1e-9


def test_four_parameter_fit_agrees_with_curve_fit_complex():
    # complex model A exp(j(w n + phi)) + C, real and imaginary parts stacked for curve_fit
    rng = np.random.default_rng(13)
    n = 2000
    k = np.arange(n)
    z = 0.5 * np.exp(1j * (2 * np.pi * 0.0771 * k + 2.5)) + (0.03 - 0.02j) + _cnoise(rng, n, 0.01)

    def model(kk, a, phi, ci, cq, f):
        m = a * np.exp(1j * (2 * np.pi * f * kk + phi)) + ci + 1j * cq
        return np.concatenate([m.real, m.imag])

    ref, _ = scipy.optimize.curve_fit(model, k, np.concatenate([z.real, z.imag]),
                                      p0=[0.5, 2.5, 0.03, -0.02, 0.0771])
    fit = recovery.sine_fit(quadkit.capture(z, sample_rate=1.0))
    # same minimum; convergence differences below 1 % of the CRLB standard deviations
    # (complex tone, rho = A^2 / sigma^2: var w = 6 / (rho N (N^2 - 1)), var A = sigma^2/(2N),
    # Rife & Boorstyn 1974)
    rho = 0.5**2 / 0.01**2
    sd_f = math.sqrt(6 / (rho * n * (n**2 - 1))) / (2 * np.pi)
    sd_a = math.sqrt(0.01**2 / (2 * n))
    assert abs(float(fit.frequency_hz) - ref[4]) < 0.01 * sd_f
    assert abs(float(fit.amplitude) - ref[0]) < 0.01 * sd_a
    assert abs(_wrap(float(fit.phase_rad) - ref[1])) < 0.01 * math.sqrt(2 / (rho * n))
    assert abs(float(fit.offset_i) - ref[2]) < 0.01 * sd_a
    assert abs(float(fit.offset_q) - ref[3]) < 0.01 * sd_a


@pytest.mark.parametrize("level_dbfs", [-0.1, -6.0206])
def test_quantiser_residual_and_enob(level_dbfs):
    # Ideal mid-tread quantiser of step Q: residual rms ~ Q / sqrt(12) (Widrow & Kollar,
    # Quantization Noise, 2008, memory). IEEE Std 1241 ENOB = log2(FSR / (NAD_rms sqrt 12))
    # is then the number of bits at any level; the SINAD form (SINAD - 1.76) / 6.02 gives
    # bits - (level below full scale)/6.02 (Bennett 1948 SNR = 6.02 N + 1.76 dB).
    bits = 12
    q = 2.0 / 2**bits
    a = 10 ** (level_dbfs / 20)
    n = 1 << 16
    k = np.arange(n)
    # a frequency far from a ratio of small integers, so that the error is not periodic
    x = np.round(a * np.cos(2 * np.pi * 0.0131729383 * k + 0.4) / q) * q
    fit = recovery.sine_fit(quadkit.capture(x, sample_rate=1.0))
    # the quantisation error of a busy sine is uniform to within ~1 % in rms for 12 bits and
    # 65536 samples (its rms estimate scatters by ~0.3 %)
    assert abs(float(fit.residual_rms) / (q / math.sqrt(12)) - 1) < 0.01
    assert abs(float(fit.enob_bits) - bits) < 0.02
    expected_sinad_bits = bits + level_dbfs / (20 * math.log10(2))
    assert abs(float(fit.enob_sinad_bits) - expected_sinad_bits) < 0.03
    sinad = 20 * math.log10((a / math.sqrt(2)) / (q / math.sqrt(12)))
    assert abs(float(fit.sinad_db) - sinad) < 0.1


def test_noiseless_record_gives_unbounded_figures_not_nan():
    # an exact fit has no noise to measure: SINAD, ENOB and SNR are +inf, never NaN
    cap = quadkit.capture(np.cos(2 * np.pi * 0.25 * np.arange(8)), sample_rate=1.0)
    fit = recovery.sine_fit(cap, 0.25)
    for name in ("sinad_db", "enob_bits", "enob_sinad_bits"):
        assert float(fit[name]) == np.inf
    assert not any(np.isnan(v.values).any() for v in fit.data_vars.values())


# --------------------------------------------------------------------------------------------
# Harmonics
# --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("m", [20, 36])
def test_square_wave_harmonics(m):
    # +-1 square wave sampled with M samples per period: odd harmonics exactly
    # 4 / (M sin(pi h / M)), even ones zero (REFERENCES.md: the DFT series of one period);
    # phases from numpy.fft of one period.
    periods = 50
    x = np.where(np.arange(m * periods) % m < m // 2, 1.0, -1.0)
    fs = 1e3 * m
    nh = m // 2 - 1
    res = recovery.harmonics(quadkit.capture(x, sample_rate=fs), 1e3, nh)
    assert_units(res)
    h = np.arange(1, nh + 1)
    expected = np.where(h % 2 == 1, 4 / (m * np.sin(np.pi * h / m)), 0.0)
    # coherent record: the fit is exact to rounding
    np.testing.assert_allclose(res.amplitude.values, expected, atol=1e-12)
    c = np.fft.fft(x[:m])[1:nh + 1] / m
    odd = h % 2 == 1
    np.testing.assert_allclose(_wrap(res.phase_rad.values[odd] - np.angle(c[odd])), 0, atol=1e-9)
    # THD of the sampled square wave from the same series
    thd = math.sqrt(np.sum(expected[1:] ** 2)) / expected[0]
    assert abs(float(res.thd_percent) - 100 * thd) < 1e-9


def test_square_wave_harmonics_tend_to_fourier_series():
    # continuous square wave: odd harmonics 4 / (pi h) (Oppenheim & Willsky, Signals &
    # Systems, ch. 3, memory). At M samples per period the sampled value differs by the
    # factor (pi h / M) / sin(pi h / M) ~ 1 + (pi h / M)^2 / 6: 1.5e-5 for h = 7, M = 2000.
    m = 2000
    x = np.where(np.arange(m * 5) % m < m // 2, 1.0, -1.0)
    res = recovery.harmonics(quadkit.capture(x, sample_rate=float(m)), 1.0, 7)
    for h in (1, 3, 5, 7):
        bound = 1.2 * (np.pi * h / m) ** 2 / 6  # 20 % over the leading-order difference
        assert abs(float(res.amplitude.sel(harmonic=h)) / (4 / (np.pi * h)) - 1) < bound


def test_harmonic_above_nyquist_is_folded():
    # sampling folds h f0 to h f0 - k fs; A cos(2 pi h f0 n/fs + phi) is the same sequence
    # as A cos(2 pi (h f0 - k fs) n/fs + phi) (integer k) -- a fact of sampling (common
    # practice)
    fs, f0, n = 1000.0, 300.0, 5000
    t = np.arange(n) / fs
    x = np.cos(2 * np.pi * f0 * t + 0.2) + 0.05 * np.cos(2 * np.pi * 3 * f0 * t - 1.0)
    res = recovery.harmonics(quadkit.capture(x, sample_rate=fs), f0, 3)
    assert np.allclose(res.offset_hz.values, [300.0, -400.0, -100.0])
    assert abs(float(res.amplitude.sel(harmonic=3)) - 0.05) < 1e-9
    assert abs(_wrap(float(res.phase_rad.sel(harmonic=3)) + 1.0)) < 1e-8
    assert abs(float(res.level_dbc.sel(harmonic=3)) - 20 * math.log10(0.05)) < 1e-6


def test_harmonics_that_collide_raise():
    x = np.cos(2 * np.pi * 0.25 * np.arange(100))
    cap = quadkit.capture(x, sample_rate=1.0)
    with pytest.raises(quadkit.MeasurementError, match="Nyquist"):
        recovery.harmonics(cap, 0.25, 2)  # 2 x 0.25 = Nyquist
    with pytest.raises(quadkit.MeasurementError, match="same frequency"):
        recovery.harmonics(quadkit.capture(x, sample_rate=1.0), 0.2, 4)  # 3 x 0.2 -> -0.4


# --------------------------------------------------------------------------------------------
# Multi-channel and lazy
# --------------------------------------------------------------------------------------------

def test_multichannel_equals_per_channel_and_relative_phase():
    rng = np.random.default_rng(21)
    n = 5000
    offsets = np.array([0.0, 0.7, -2.0, 3.0])
    k = np.arange(n)
    x = np.exp(1j * (2 * np.pi * 0.0301 * k[None] + 0.5 + offsets[:, None]))
    x = x + _cnoise(rng, x.shape, 0.1)
    cap = quadkit.capture(x.astype(np.complex64), sample_rate=1e6, center_frequency=5.8e9)
    multi = recovery.measure_tone(cap)
    assert multi.amplitude.dims == ("channel",)
    for ch in range(4):
        single = recovery.measure_tone(cap.isel(channel=ch))
        one = multi.isel(channel=ch).drop_vars(["channel", "relative_phase_rad",
                                                "relative_phase_deg"])
        _assert_close_datasets(one, single, rtol=1e-12, atol=1e-9)
    # relative phase per channel: phase at the centre of each; std of the difference of two
    # phases each with var 1/(rho N) (CRLB at the centre, Rife & Boorstyn): sqrt(2/(100*5000))
    # = 2e-3 rad; 5 sigma tolerance
    rel = multi.relative_phase_rad.values
    np.testing.assert_allclose(_wrap(rel - _wrap(offsets)), 0, atol=1e-2)
    assert rel[0] == 0.0
    for func, args in ((recovery.sine_fit, ()), (recovery.iq_components, (5.8e9 + 30.1e3,)),
                       (recovery.harmonics, (5.8e9 + 30.1e3, 3))):
        m = func(cap, *args)
        for ch in (0, 3):
            _assert_close_datasets(m.isel(channel=ch).drop_vars("channel"),
                                   func(cap.isel(channel=ch), *args), rtol=1e-12, atol=1e-9)


CASES = {
    "complex": lambda: quadkit.synth.add_noise(
        quadkit.synth.tone(70.3e3, sample_rate=1e6, n_samples=30_011, amplitude=0.4,
                           phase_rad=1.0, center_frequency=1e9), snr_db=15, rng=1),
    "real": lambda: quadkit.synth.add_noise(
        quadkit.synth.tone(70.3e3, sample_rate=1e6, n_samples=30_011, amplitude=0.4,
                           phase_rad=-2.0, real=True), snr_db=15, rng=2),
    "multi": lambda: quadkit.capture(
        np.stack([quadkit.synth.tone(-123e3, sample_rate=1e6, n_samples=20_000,
                                     phase_rad=p).values for p in (0.1, 2.0, -2.9)])
        + (0.01 * np.random.default_rng(3).standard_normal((3, 20_000))).astype(np.float32),
        sample_rate=1e6),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_lazy_equals_eager_and_builds_nothing(case):
    cap = CASES[case]()
    rng = np.random.default_rng(len(case))
    lazy = _lazy(cap, rng)
    f = float(recovery.measure_tone(cap).frequency_hz.values.ravel()[0])
    calls = {
        "measure_tone": lambda c: recovery.measure_tone(c),
        "measure_tone_hint": lambda c: recovery.measure_tone(c, f + 50.0),
        "sine_fit": lambda c: recovery.sine_fit(c),
        "sine_fit3": lambda c: recovery.sine_fit(c, f),
        "iq_components": lambda c: recovery.iq_components(c, f),
        "harmonics": lambda c: recovery.harmonics(c, f, 3),
    }
    for name, call in calls.items():
        eager = call(cap)
        with raise_if_dask_computes():
            built = call(lazy)
        assert_lazy(built)
        # Sums over different block boundaries differ by rounding only; the iterations then
        # land on the same maximum: agreement far below the statistical error.
        _assert_close_datasets(built.compute(), eager, rtol=1e-7, atol=1e-7)


# analytic takes real captures only (a complex one raises: test_analytic_rejects_bad_input)
@pytest.mark.parametrize("func, real", [
    ("analytic", True), ("envelope", False), ("envelope", True),
    ("instantaneous_phase", False), ("instantaneous_phase", True),
    ("instantaneous_frequency", False), ("instantaneous_frequency", True),
])
def test_streaming_lazy_equals_eager(func, real):
    chirp = quadkit.synth.chirp(10e3, 200e3, sample_rate=1e6, n_samples=7001, real=real,
                                center_frequency=0.0 if real else 1e8)
    rng = np.random.default_rng(9)
    lazy = _lazy(chirp, rng)
    kw = {"method": "fir"} if real else {}
    with raise_if_dask_computes():
        built = getattr(recovery, func)(lazy, **kw)
    assert_lazy(built)
    eager = getattr(recovery, func)(chirp, **kw)
    assert built.dims == eager.dims and built.attrs == eager.attrs
    assert built.dtype == eager.dtype
    np.testing.assert_allclose(built.values, eager.values, rtol=1e-6, atol=1e-5)


# --------------------------------------------------------------------------------------------
# Analytic signal, envelope, instantaneous phase and frequency
# --------------------------------------------------------------------------------------------

def test_analytic_equals_scipy_hilbert():
    rng = np.random.default_rng(4)
    x = rng.standard_normal((2, 3001))
    z = recovery.analytic(quadkit.capture(x, sample_rate=1e3))
    assert z.dtype == np.complex128 and z.attrs["analytic_method"] == "fft"
    # same FFT algorithm: equal to rounding
    np.testing.assert_allclose(z.values, scipy.signal.hilbert(x, axis=-1), atol=1e-12)
    z32 = recovery.analytic(quadkit.capture(x.astype(np.float32), sample_rate=1e3))
    assert z32.dtype == np.complex64  # dtype kept (single in, single out)


def test_analytic_fir_matches_hilbert_in_band():
    # in-band multitone, away from the ends (the FIR's 256-sample half length): the FIR and
    # the FFT analytic signals agree to the FIR's stopband/ripple (Kaiser beta 8.6 ~ 80 dB:
    # ~1e-4, documented); the tones sit on FFT bins so the FFT one is exact
    n = 8192
    k = np.arange(n)
    x = sum(a * np.cos(2 * np.pi * b * k / n + p)
            for a, b, p in ((1.0, 300, 0.1), (0.5, 1700, 2.0), (0.25, 3900, -1.0)))
    ref = scipy.signal.hilbert(x)
    z = recovery.analytic(quadkit.capture(x, sample_rate=1.0), method="fir").values
    assert np.abs(z - ref)[300:-300].max() < 1e-4
    np.testing.assert_array_equal(z.real, x)  # the real part is the input itself


def test_analytic_rejects_bad_input():
    with pytest.raises(ValueError, match="already complex"):
        recovery.analytic(quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=100))
    real = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000, real=True)
    with pytest.raises(ValueError, match="method='fft' needs the whole capture"):
        recovery.analytic(_lazy(real, np.random.default_rng(0)), method="fft")
    with pytest.raises(ValueError, match="method='wavelet' is not one of"):
        recovery.analytic(real, method="wavelet")


def test_instantaneous_phase_and_frequency_of_a_chirp():
    # chirp phase 2 pi (f0 t + (f1 - f0) t^2 / (2T)) (synth.chirp's definition); numpy.unwrap
    # is the reference for the unwrapping
    fs, n, f0, f1 = 1e6, 5000, -300e3, 300e3
    cap = quadkit.synth.chirp(f0, f1, sample_rate=fs, n_samples=n, center_frequency=2e9,
                              dtype=np.complex128)
    ph = recovery.instantaneous_phase(cap)
    np.testing.assert_allclose(ph.values, np.unwrap(np.angle(cap.values)), atol=1e-12)
    assert ph.attrs["units"] == "rad"
    wrapped = recovery.instantaneous_phase(cap, unwrap=False)
    np.testing.assert_allclose(wrapped.values, np.angle(cap.values))
    freq = recovery.instantaneous_frequency(cap)
    t = np.arange(n) / fs
    # backward difference: mean frequency over (t - 1/fs, t]
    expected = 2e9 + f0 + (f1 - f0) * (t - 0.5 / fs) / (n / fs)
    np.testing.assert_allclose(freq.values[1:], expected[1:], rtol=0, atol=1e-3)
    assert freq.values[0] == freq.values[1]
    env = recovery.envelope(cap)
    np.testing.assert_allclose(env.values, 1.0, atol=1e-12)
    assert env.attrs["units"] == "FS"


def test_envelope_keeps_single_precision():
    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000, amplitude=0.3)
    env = recovery.envelope(cap)
    assert env.dtype == np.float32
    np.testing.assert_allclose(env.values, 0.3, atol=1e-6)
    real = quadkit.synth.tone(1e3, sample_rate=64e3, n_samples=6400, amplitude=0.3, real=True)
    # whole cycles: the FFT analytic signal of a cosine is exactly A exp(j...) -> envelope A
    np.testing.assert_allclose(recovery.envelope(real).values, 0.3, atol=1e-6)


@settings(max_examples=25, deadline=None)
@given(amp=st.floats(0.01, 1.0), phase=st.floats(-3.14, 3.14),
       bins=st.floats(5.0, 200.0), real=st.booleans())
def test_iq_round_trip(amp, phase, bins, real):
    # synthesise A cos / A exp with phase phi, recover I = A cos phi, Q = A sin phi
    n = 1000
    cap = quadkit.synth.tone(bins, sample_rate=float(n), n_samples=n, amplitude=amp,
                             phase_rad=phase, real=real,
                             dtype=np.float64 if real else np.complex128)
    iq = recovery.iq_components(cap, bins)
    # noiseless float64: least squares recovers the parameters to rounding
    assert abs(float(iq.i) - amp * math.cos(phase)) < 1e-9
    assert abs(float(iq.q) - amp * math.sin(phase)) < 1e-9
    mt = recovery.measure_tone(cap)
    assert abs(float(mt.offset_hz) - bins) < 1e-7
    assert abs(_wrap(float(mt.phase_rad) - phase)) < 1e-6


@settings(max_examples=15, deadline=None)
@given(seed=st.integers(0, 2**32 - 1))
def test_phase_and_envelope_rebuild_the_signal(seed):
    # inverse pair: envelope * exp(j phase) is the complex envelope again
    rng = np.random.default_rng(seed)
    z = _cnoise(rng, 500, 1.0)
    cap = quadkit.capture(z, sample_rate=1.0)
    env = recovery.envelope(cap).values
    ph = recovery.instantaneous_phase(cap).values
    np.testing.assert_allclose(env * np.exp(1j * ph), z, atol=1e-12)


# --------------------------------------------------------------------------------------------
# Bad input
# --------------------------------------------------------------------------------------------

def test_noise_only_raises_no_tone():
    cap = quadkit.synth.noise(sample_rate=1e6, n_samples=20_000, rng=1)
    with pytest.raises(quadkit.MeasurementError, match="no tone above the noise"):
        recovery.measure_tone(cap)
    real = quadkit.synth.noise(sample_rate=1e6, n_samples=20_000, rng=2, real=True)
    with pytest.raises(quadkit.MeasurementError, match="no tone above the noise"):
        recovery.measure_tone(real)
    lazy = recovery.measure_tone(_lazy(cap, np.random.default_rng(1)))
    with pytest.raises(quadkit.MeasurementError, match="no tone above the noise"):
        lazy.compute()


def test_a_weak_tone_is_still_found():
    # integrated SNR N A^2 / sigma^2 = 20000 * 10^-1.5 = 632 (28 dB) is far above the
    # detection threshold (ln N + 9.2 = 19.1, 12.8 dB)
    cap = quadkit.synth.add_noise(quadkit.synth.tone(1e3 * 37.7, sample_rate=1e6,
                                                     n_samples=20_000), snr_db=-15, rng=5)
    res = recovery.measure_tone(cap)
    assert abs(float(res.offset_hz) - 37.7e3) < 50.0  # CRLB std ~ 2 Hz here


def test_too_few_samples_and_out_of_band_frequencies():
    short = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=10)
    with pytest.raises(quadkit.MeasurementError, match="10 samples; at least 16"):
        recovery.measure_tone(short)
    with pytest.raises(quadkit.MeasurementError, match="at least"):
        recovery.sine_fit(quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=3), 1e3)
    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000, center_frequency=1e9)
    with pytest.raises(ValueError, match="outside the band"):
        recovery.measure_tone(cap, 1e9 + 600e3)
    real = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000, real=True)
    with pytest.raises(ValueError, match="Nyquist"):
        recovery.iq_components(real, 700e3)
    with pytest.raises(ValueError, match="Nyquist"):
        recovery.harmonics(real, -5.0, 3)
    with pytest.raises(ValueError, match="n=0 must be a positive integer"):
        recovery.harmonics(real, 1e3, 0)
    with pytest.raises(quadkit.MeasurementError, match="at least 2"):
        recovery.instantaneous_frequency(quadkit.synth.tone(1.0, sample_rate=1e3, n_samples=1))


def test_accessor_forwards():
    cap = quadkit.synth.tone(2e3, sample_rate=1e6, n_samples=4000, phase_rad=0.25)
    a = cap.qk.measure_tone()
    b = recovery.measure_tone(cap)
    xr.testing.assert_identical(a, b)
    for name in recovery._ACCESSOR:
        assert name in dir(cap.qk)


def test_real_tone_beside_a_large_dc_offset():
    # the four-parameter model fits the dc term (IEEE Std 1241): a dc three times the tone
    # neither wins the search nor biases the tone
    rng = np.random.default_rng(8)
    n = 8192
    x = 0.3 + 0.1 * np.cos(2 * np.pi * 0.0377 * np.arange(n) + 0.9) + 0.001 * rng.standard_normal(n)
    cap = quadkit.capture(x, sample_rate=1.0)
    res = recovery.measure_tone(cap)
    fit = recovery.sine_fit(cap)
    # noise 0.001 on A = 0.1 over 8192 samples: CRLB std of f ~ 2e-8 cycles, of A ~ 1.6e-5;
    # tolerances at ~50 sigma only guard against the dc being mistaken for the tone
    assert abs(float(res.offset_hz) - 0.0377) < 1e-6
    assert abs(float(res.amplitude) - 0.1) < 1e-3
    assert abs(float(fit.offset) - 0.3) < 1e-3


def test_results_turn_into_json():
    cap = quadkit.synth.tone(2e3, sample_rate=1e6, n_samples=4000, dtype=np.complex128)
    out = quadkit.to_json(recovery.harmonics(cap, 2e3, 3))
    # absent harmonics of a pure tone sit at the rounding level (about -300 dBc)
    assert out["level_dbc"][0] == 0.0 and out["level_dbc"][1] < -200
    assert all(isinstance(v, float) for v in out["amplitude"])
    assert isinstance(quadkit.to_json(recovery.measure_tone(cap))["frequency_hz"], float)


@pytest.mark.parametrize("ratio", [0.4999, -0.49995, 1e-5, -1e-5])
def test_complex_tone_at_the_band_edge_and_near_dc(ratio):
    # a complex tone anywhere in [-fs/2, fs/2) is found; at 20 dB over 1e5 samples the CRLB
    # std is ~1e-9 fs (Rife & Boorstyn); 1e-7 fs is a loose guard against folding mistakes
    cap = quadkit.synth.add_noise(quadkit.synth.tone(ratio * 1e6, sample_rate=1e6,
                                                     n_samples=100_000, dtype=np.complex128),
                                  snr_db=20, rng=1)
    res = recovery.measure_tone(cap)
    assert abs(float(res.offset_hz) / 1e6 - ratio) < 1e-7
    assert -0.5e6 <= float(res.offset_hz) < 0.5e6


def test_real_tone_near_dc_needs_a_hint():
    cap = quadkit.synth.add_noise(quadkit.synth.tone(10.0, sample_rate=48e3, n_samples=48_000,
                                                     real=True, dtype=np.float64,
                                                     phase_rad=1.0), snr_db=20, rng=1)
    with pytest.raises(quadkit.MeasurementError, match="give frequency_hz"):
        recovery.measure_tone(cap)
    res = recovery.measure_tone(cap, 10.0)
    # ten cycles in the record: the image term raises the bound above the asymptotic one
    # (std 8e-5 Hz, 2e-3 rad here); these tolerances are about 30x the asymptotic bounds
    assert abs(float(res.offset_hz) - 10.0) < 3e-3
    assert abs(float(res.phase_rad) - 1.0) < 0.05


def test_calibrated_power_in_dbm():
    # dBm = dBFS + calibration_db (DESIGN.md)
    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=4000, amplitude=0.1,
                             calibration_db=-20.0)
    res = recovery.measure_tone(cap)
    assert abs(float(res.power_dbm) - (20 * math.log10(0.1) - 20.0)) < 1e-4
    assert res.power_dbm.attrs["units"] == "dBm"


# --------------------------------------------------------------------------------------------
# full_scale: results in units of full scale, dBFS relative to it
# --------------------------------------------------------------------------------------------

def test_full_scale_absolute_level_and_dbm():
    # DESIGN.md: a complex tone of magnitude full_scale is 0 dBFS and dBm = dBFS +
    # calibration_db, so a tone of magnitude 0.5 full_scale is 20 log10(0.5) dBFS.
    fs_value, cal = 32768.0, -10.0
    x = 0.5 * fs_value * np.exp(2j * np.pi * 0.1 * np.arange(4096))
    cap = quadkit.capture(x.astype(np.complex64), sample_rate=1e6, full_scale=fs_value,
                          calibration_db=cal)
    res = recovery.measure_tone(cap)
    dbfs = 20 * math.log10(0.5)
    # complex64 samples: relative rounding ~6e-8 per sample, far inside 1e-6 of the amplitude
    assert abs(float(res.amplitude) - 0.5) < 1e-6
    assert abs(float(res.power_dbfs) - dbfs) < 1e-5
    assert abs(float(res.power_dbm) - (dbfs + cal)) < 1e-5
    # the residual is the complex64 rounding of the samples: |error| <= 2^-24 of 0.5 FS per
    # component, so well below 1e-7 FS rms once expressed in units of full scale
    assert float(res.residual_rms) < 1e-7
    assert float(res.noise_power_dbfs) < -140
    fit = recovery.sine_fit(cap, 1e5)
    assert abs(float(fit.amplitude) - 0.5) < 1e-6
    iq = recovery.iq_components(cap, 1e5)
    assert abs(float(iq.amplitude) - 0.5) < 1e-6
    assert abs(float(iq.i) - 0.5) < 1e-6  # phase 0 at the first sample: I = A, Q = 0
    h = recovery.harmonics(cap, 1e5, n=2)
    assert abs(float(h.amplitude[0]) - 0.5) < 1e-6
    assert abs(float(h.power_dbfs[0]) - dbfs) < 1e-5


def _scaled(cap: xr.DataArray, factor: float) -> xr.DataArray:
    """The same capture with samples times ``factor`` and full_scale = factor."""
    attrs = {k: v for k, v in cap.attrs.items()
             if k not in ("sample_rate", "center_frequency", "full_scale")}
    return quadkit.capture(cap.values * factor, sample_rate=cap.attrs["sample_rate"],
                           center_frequency=cap.attrs["center_frequency"],
                           full_scale=factor, **attrs)


@pytest.mark.parametrize("factor", [32768.0, 1000.0, 1e-3])
@pytest.mark.parametrize("case", sorted(CASES))
def test_results_do_not_depend_on_full_scale(case, factor):
    # dBFS and "FS" are relative to full_scale by definition (DESIGN.md): samples x F with
    # full_scale F are the same signal as x with full_scale 1, so every figure must agree.
    base = CASES[case]().astype(np.float64 if CASES[case]().dtype.kind == "f"
                                else np.complex128)
    base.attrs["calibration_db"] = -30.0
    cap = _scaled(base, factor)
    f = float(recovery.measure_tone(base).frequency_hz.values.ravel()[0])
    calls = {
        "measure_tone": lambda c: recovery.measure_tone(c),
        "sine_fit": lambda c: recovery.sine_fit(c),
        "sine_fit3": lambda c: recovery.sine_fit(c, f),
        "iq_components": lambda c: recovery.iq_components(c, f),
        "harmonics": lambda c: recovery.harmonics(c, f, 3),
    }
    for name, call in calls.items():
        # float64 samples scaled by F: the sums scale exactly up to rounding (~1e-16
        # relative), which the iterations cannot amplify beyond ~1e-9
        _assert_close_datasets(call(cap), call(base), rtol=1e-9, atol=1e-9)
    lazy = _lazy(cap, np.random.default_rng(7))
    with raise_if_dask_computes():
        built = recovery.measure_tone(lazy)
    _assert_close_datasets(built.compute(), recovery.measure_tone(base), rtol=1e-7, atol=1e-7)


@pytest.mark.parametrize("real", [False, True])
def test_envelope_and_analytic_stay_in_sample_units(real):
    # streaming operations return a capture: values stay in the capture's sample units and
    # carry the same full_scale attr, so the envelope of x F (full_scale F) is F times that
    # of x (full_scale 1) and a measurement on it still reads in units of full scale
    factor = 32768.0
    base = quadkit.synth.tone(1e3, sample_rate=64e3, n_samples=6400, amplitude=0.3,
                              real=real, dtype=np.float64 if real else np.complex128)
    cap = _scaled(base, factor)
    env = recovery.envelope(cap)
    np.testing.assert_allclose(env.values, factor * recovery.envelope(base).values,
                               rtol=1e-12)
    assert env.attrs["full_scale"] == factor
    assert env.attrs["units"] != "FS"  # sample units are FS / 32768 here
    assert recovery.envelope(base).attrs["units"] == "FS"
    if real:
        z = recovery.analytic(cap)
        assert z.attrs["full_scale"] == factor and z.attrs["units"] != "FS"
        # whole cycles: the analytic signal of 0.3 FS cos is 0.3 FS exp(j...) (scipy hilbert)
        assert abs(float(recovery.measure_tone(z).amplitude) - 0.3) < 1e-9


# --------------------------------------------------------------------------------------------
# No tone: modulated traffic, band-limited and white noise are refused (local-floor test)
# --------------------------------------------------------------------------------------------

def _qpsk_traffic(seed=0):
    # root-raised-cosine QPSK, 100 kBd at 1 MS/s: a flat-topped spectrum about 135 kHz wide,
    # no spectral line anywhere (random data)
    bits = np.random.default_rng(seed).integers(0, 2, 8000)
    return quadkit.modulation.modulate(bits, "qpsk", symbol_rate=100e3, sample_rate=1e6)


@pytest.mark.parametrize("lazy", [False, True])
def test_modulated_traffic_is_no_tone(lazy):
    cap = _qpsk_traffic()
    if lazy:
        cap = _lazy(cap, np.random.default_rng(3))
    run = (lambda r: r.compute()) if lazy else (lambda r: r)
    for func in (recovery.measure_tone, recovery.sine_fit):
        with pytest.raises(quadkit.MeasurementError, match="no tone"):
            run(func(cap))
    with pytest.raises(quadkit.MeasurementError, match="the fundamental 30000 Hz"):
        run(recovery.harmonics(cap, 30e3, 3))
    # a user asking for a frequency gets the fit there (three-parameter / lock-in use)
    fit = recovery.sine_fit(cap, 30e3)
    assert np.isfinite(float(fit.amplitude))
    assert np.isfinite(float(recovery.measure_tone(cap, 30e3, refine=False).amplitude))


def test_white_noise_is_no_tone_for_the_fit_and_harmonics():
    for real in (False, True):
        cap = quadkit.synth.noise(sample_rate=1e6, n_samples=20_000, rng=1, real=real)
        with pytest.raises(quadkit.MeasurementError, match="no tone above the noise"):
            recovery.sine_fit(cap)
        with pytest.raises(quadkit.MeasurementError, match="the fundamental 50000 Hz"):
            recovery.harmonics(cap, 50e3, 5)


def test_band_limited_noise_is_not_tone_shaped():
    # noise 5 kHz wide (20 bins of the 4096-point search spectrum) 40 dB above a white floor:
    # its peak stands far above the floor of the +-32-bin neighbourhood, but 3-4 bins from
    # the peak the spectrum is as high as at the peak, which no windowed tone does
    # (periodic Hann sidelobes past 2.5 bins are below -31 dB; Harris 1978, memory)
    rng = np.random.default_rng(4)
    band = quadkit.synth.noise(sample_rate=1e6, n_samples=40_000, bandwidth_hz=5e3, rng=rng)
    cap = quadkit.synth.add_noise(band, snr_db=40 - 10 * math.log10(1e6 / 5e3), rng=5)
    with pytest.raises(quadkit.MeasurementError, match="not tone-shaped"):
        recovery.measure_tone(cap)


def test_floor_threshold_false_alarm_rate_by_monte_carlo():
    # The local test's threshold T(averages, floor bins, looks, pfa) against the false-alarm
    # rate of white Gaussian noise itself (numpy Monte Carlo, averaged periodic-Hann spectra,
    # floor = median of the bins 4..32 from the tested one, as the test takes it). One bin
    # tested: the rate must be the asked 5 % (binomial std over 4000 draws 0.34 %; the median
    # is modelled as that of half the bins, slightly conservative: 3.5 .. 5.8 %). The maximum
    # of all 256 bins (Bonferroni over 256 correlated looks) may only be conservative:
    # between 1 % and 5.8 %.
    rng = np.random.default_rng(11)
    length, trials = 256, 4000
    win = 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(length) / length)
    d_all = np.arange(length)
    for nseg in (1, 4):
        x = rng.standard_normal((trials, nseg, length)) + 1j * rng.standard_normal(
            (trials, nseg, length))
        spec = (np.abs(np.fft.fft(x * win, axis=-1)) ** 2).sum(axis=1)
        near = (np.abs(d_all - 100) > 3) & (np.abs(d_all - 100) <= 32)
        t1 = recovery._floor_threshold(nseg, int(near.sum()), 1, 0.05)
        rate1 = np.mean(spec[:, 100] / np.median(spec[:, near], axis=1) > t1)
        assert 0.035 < rate1 < 0.058, (nseg, rate1)
        tmax = recovery._floor_threshold(nseg, int(near.sum()), length, 0.05)
        kmax = spec.argmax(axis=1)
        d = (d_all[None, :] - kmax[:, None] + length // 2) % length - length // 2
        mask = (np.abs(d) > 3) & (np.abs(d) <= 32)
        floor = np.array([np.median(spec[i, mask[i]]) for i in range(trials)])
        rate = np.mean(spec[np.arange(trials), kmax] / floor > tmax)
        assert 0.01 < rate < 0.058, (nseg, rate)


@pytest.mark.parametrize("real", [False, True])
def test_tone_at_10_db_in_a_short_capture_is_never_refused(real):
    # Hardest case of the Cramer-Rao tests (N = 256, SNR 10 dB: one 256-point segment, no
    # averaging). The tone's line stands N SNR / (ENBW 1.5 bins) ~ 32 dB (real: 26 dB, the
    # power split over +-f) above the floor, minus <= 1.4 dB scalloping, while the threshold
    # for one average, 58 floor bins and 256 looks is 15.6 dB; the 3-4 bin shape bins are
    # noise at the floor (P(exp variate > 100 x mean) ~ e^-100). The predicted refusal rate is
    # below 1e-6 per draw, so 200 draws must give none (P(any) < 2e-4); a single refusal
    # shows the test is stricter than its stated false-alarm level allows.
    rng = np.random.default_rng(99 + real)
    n, draws, refused = 256, 200, 0
    for i in range(draws):
        f = rng.uniform(0.05, 0.45)
        cap = quadkit.synth.tone(f, sample_rate=1.0, n_samples=n, real=real,
                                 phase_rad=rng.uniform(-np.pi, np.pi), dtype=np.complex128
                                 if not real else np.float64)
        cap = quadkit.synth.add_noise(cap, snr_db=10.0, rng=int(rng.integers(1 << 30)))
        try:
            res = recovery.measure_tone(cap)
            fit = recovery.sine_fit(cap)
        except quadkit.MeasurementError:
            refused += 1
            continue
        # 1/N cycles/sample is ~ 60 CRLB standard deviations here (Rife & Boorstyn 1974)
        assert abs(float(res.offset_hz) - f) < 1 / n
        assert abs(float(fit.offset_hz) - f) < 1 / n
    assert refused == 0


def test_tone_15_db_above_a_modulated_carrier_is_found():
    # a tone inside the QPSK band whose line stands 15 dB above the carrier's level in one
    # bin of the search spectrum (scipy.signal.welch, periodic Hann, 4096 points, no overlap,
    # "spectrum" scaling gives the carrier's power per bin; a tone of power A^2 at a bin
    # centre reads A^2 there)
    cap = _qpsk_traffic(1)
    x = cap.values.astype(np.complex128)
    fs, n = 1e6, x.size
    f, pbin = scipy.signal.welch(x, fs, window="hann", nperseg=4096, noverlap=0,
                                 return_onesided=False, scaling="spectrum", detrend=False)
    f0 = 20e3 + 0.3 * fs / 4096
    level = np.median(pbin[np.abs(f - f0) < 8 * fs / 4096])
    amp = math.sqrt(10 ** 1.5 * level)
    tone = amp * np.exp(2j * np.pi * f0 * np.arange(n) / fs + 0.7j)
    res = recovery.measure_tone(quadkit.capture(x + tone, sample_rate=fs))
    # CRLB with the carrier as locally white noise of density N0 (welch "density"):
    # sigma^2 = N0 fs, rho = A^2 / sigma^2, std(f) = fs / (2 pi) sqrt(6 / (rho N^3)),
    # std(A) = sqrt(sigma^2 / (2 N)) (Rife & Boorstyn 1974); 10 standard deviations allowed
    # (the carrier is not exactly white nor Gaussian)
    _, dens = scipy.signal.welch(x, fs, window="hann", nperseg=4096, noverlap=0,
                                 return_onesided=False, scaling="density", detrend=False)
    sigma2 = np.median(dens[np.abs(f - f0) < 8 * fs / 4096]) * fs
    rho = amp ** 2 / sigma2
    assert abs(float(res.offset_hz) - f0) < 10 * fs / (2 * np.pi) * math.sqrt(6 / (rho * n ** 3))
    assert abs(float(res.amplitude) - amp) < 10 * math.sqrt(sigma2 / (2 * n))
    h = recovery.harmonics(quadkit.capture(x + tone, sample_rate=fs), float(res.frequency_hz), 2)
    assert abs(float(h.amplitude[0]) - amp) < 10 * math.sqrt(sigma2 / (2 * n))
