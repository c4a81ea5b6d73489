"""quadkit.impairments: the model, the estimators against known impairments, corrections."""

from __future__ import annotations

import math

import dask.array as da
import numpy as np
import pytest
import scipy.signal
import scipy.special
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

import quadkit
from quadkit import MeasurementError, _capture, impairments, synth
from quadkit.testing import assert_captures_close, assert_units, raise_if_dask_computes

FS = 1e6


# ------------------------------------------------------------------------------------------
# helpers: reference signals built here with numpy only
# ------------------------------------------------------------------------------------------

def rrc(beta: float, sps: int, span: int) -> np.ndarray:
    """Root-raised-cosine taps, unit energy (Proakis & Salehi, Digital Communications 5th
    ed., ch. 9 (memory)); t in symbols."""
    t = np.arange(-span * sps, span * sps + 1) / sps
    h = np.empty_like(t)
    for i, ti in enumerate(t):
        if abs(ti) < 1e-12:
            h[i] = 1 - beta + 4 * beta / np.pi
        elif abs(abs(ti) - 1 / (4 * beta)) < 1e-12:
            h[i] = beta / np.sqrt(2) * ((1 + 2 / np.pi) * np.sin(np.pi / (4 * beta))
                                        + (1 - 2 / np.pi) * np.cos(np.pi / (4 * beta)))
        else:
            h[i] = (np.sin(np.pi * ti * (1 - beta)) + 4 * beta * ti * np.cos(np.pi * ti * (1 + beta))) \
                / (np.pi * ti * (1 - (4 * beta * ti) ** 2))
    return h / np.sqrt(np.sum(h**2))


def qpsk(n_samples: int, sps: int, rng, *, power: float = 0.1, beta: float = 0.35) -> np.ndarray:
    """RRC-shaped QPSK of mean power ``power`` (3GPP TS 38.211 5.1.3 mapper, /sqrt(2))."""
    n_sym = n_samples // sps + 40
    bits = rng.integers(0, 2, size=(n_sym, 2))
    sym = ((1 - 2 * bits[:, 0]) + 1j * (1 - 2 * bits[:, 1])) / np.sqrt(2)
    up = np.zeros(n_sym * sps, complex)
    up[::sps] = sym
    x = scipy.signal.fftconvolve(up, rrc(beta, sps, 8))[20 * sps:20 * sps + n_samples]
    return x * np.sqrt(power / np.mean(np.abs(x) ** 2))


def noise(n: int, rng, power: float = 1.0) -> np.ndarray:
    return np.sqrt(power / 2) * (rng.standard_normal(n) + 1j * rng.standard_normal(n))


def cap_of(x, **attrs):
    return quadkit.capture(np.asarray(x).astype(np.complex64), sample_rate=FS, **attrs)


def lazy(cap, rng, n_chunks=4):
    """The same capture backed by dask with random chunk sizes and a short last chunk."""
    n = cap.sizes["time"]
    cuts = np.sort(rng.choice(np.arange(1, n - 10), size=n_chunks - 1, replace=False))
    sizes = tuple(int(v) for v in np.diff(np.concatenate([[0], cuts, [n - 7], [n]])))
    chunks = sizes if cap.ndim == 1 else (cap.shape[0], sizes)
    return _capture.like(cap, da.from_array(cap.values, chunks=chunks))


def razavi_irr_db(g_db, phi_deg):
    """IRR = (1 + 2 g cos(theta) + g^2) / (1 - 2 g cos(theta) + g^2), Razavi, RF
    Microelectronics 2nd ed. (memory)."""
    g = 10 ** (g_db / 20)
    th = math.radians(phi_deg)
    return 10 * math.log10((1 + 2 * g * math.cos(th) + g * g) / (1 - 2 * g * math.cos(th) + g * g))


def widely_linear_irr_db(g_db, phi_deg):
    """|mu|^2 / |nu|^2 with mu = (1 + g e^{-j theta}) / 2, nu = (1 - g e^{j theta}) / 2
    (Tarighat, Bagheri & Sayed, IEEE TSP 53(8), 2005 (memory))."""
    g = 10 ** (g_db / 20)
    th = math.radians(phi_deg)
    mu = (1 + g * np.exp(-1j * th)) / 2
    nu = (1 - g * np.exp(1j * th)) / 2
    return 10 * math.log10(abs(mu) ** 2 / abs(nu) ** 2)


# ------------------------------------------------------------------------------------------
# the formula
# ------------------------------------------------------------------------------------------

# REFERENCES.md check values (Razavi, memory): (gain dB, phase deg) -> IRR dB, 3 decimals
@pytest.mark.parametrize("g_db, phi, printed", [
    (1.0, 1.0, 24.708), (1.0, 0.0, 24.806), (0.0, 1.0, 41.183), (0.1, 1.0, 39.614),
    (0.5, 2.0, 29.459),
])
def test_image_rejection_formula(g_db, phi, printed):
    got = impairments.image_rejection(g_db, phi)
    # both published forms, recomputed here; float64 agreement to 1e-9 dB
    assert got == pytest.approx(razavi_irr_db(g_db, phi), abs=1e-9)
    assert got == pytest.approx(widely_linear_irr_db(g_db, phi), abs=1e-9)
    # the printed values are rounded to 3 decimals
    assert got == pytest.approx(printed, abs=5e-4)


def test_image_rejection_small_error_limit_and_arrays():
    # small errors: IRR ~ 4 / (eps^2 + theta^2) (Razavi, memory); eps = g - 1, theta in rad
    g_db, phi = 0.001, 0.01
    eps, th = 10 ** (g_db / 20) - 1, math.radians(phi)
    assert impairments.image_rejection(g_db, phi) == pytest.approx(
        10 * math.log10(4 / (eps**2 + th**2)), abs=1e-3)
    out = impairments.image_rejection(np.array([1.0, 0.0]), np.array([1.0, 0.0]))
    assert out[0] == pytest.approx(24.708, abs=5e-4) and np.isinf(out[1])
    # EVM floor from imbalance alone |nu| / |mu| = 5.816 % at 1 dB / 1 deg (REFERENCES)
    assert 100 * 10 ** (-impairments.image_rejection(1.0, 1.0) / 20) == pytest.approx(5.816, abs=5e-4)


# ------------------------------------------------------------------------------------------
# apply follows the written model
# ------------------------------------------------------------------------------------------

def test_apply_imbalance_and_dc_by_hand():
    rng = np.random.default_rng(1)
    x = noise(1000, rng, 0.2).astype(np.complex64)
    cap = cap_of(x)
    out = impairments.apply(cap, gain_imbalance_db=1.5, phase_skew_deg=-4.0, dc_i=0.02, dc_q=-0.01)
    i, q = x.real.astype(float), x.imag.astype(float)
    g, phi = 10 ** (1.5 / 20), math.radians(-4.0)
    # DESIGN.md model: I_m = I + dc_i; Q_m = g (Q cos phi - I sin phi) + dc_q
    expected = (i + 0.02) + 1j * (g * (q * math.cos(phi) - i * math.sin(phi)) - 0.01)
    assert out.dtype == np.complex64
    # complex64 output: 1e-6 of full scale is a few float32 ulps at these levels
    np.testing.assert_allclose(out.values, expected, atol=1e-6, rtol=0)
    assert out.attrs == cap.attrs


def test_apply_full_scale_units_of_dc_and_clip_quantize():
    x = np.array([0.3 + 0.9j, -2.5 + 0.04j, 0.001 - 0.6j, 1.2 + 1.2j])
    cap = quadkit.capture(x.astype(np.complex128), sample_rate=FS, full_scale=2.0)
    out = impairments.apply(cap, dc_i=0.1, clip_level=0.5, quantize_bits=4)
    # dc in units of full scale (0.1 * 2.0 = 0.2); clip each branch at 0.5 * 2.0 = 1.0;
    # 4-bit mid-tread quantiser: step 2.0 / 8, codes -8 .. 7 (common practice)
    step = 2.0 / 8
    i = np.clip(x.real + 0.2, -1.0, 1.0)
    q = np.clip(x.imag, -1.0, 1.0)
    i = np.clip(np.round(i / step), -8, 7) * step
    q = np.clip(np.round(q / step), -8, 7) * step
    np.testing.assert_array_equal(out.values, i + 1j * q)
    assert out.dtype == np.complex128


def test_apply_frequency_offset_uses_the_absolute_index():
    cap = cap_of(np.ones(5000))
    out = impairments.apply(cap, frequency_offset_hz=1234.5)
    n = np.arange(5000)
    # a pure LO error rotates by exp(j 2 pi f n / fs) (common practice)
    np.testing.assert_allclose(out.values, np.exp(2j * np.pi * 1234.5 * n / FS), atol=2e-6)
    # a slice then impair equals impair then slice (NCO phase from the absolute index)
    part = impairments.apply(cap.isel(time=slice(1234, None)), frequency_offset_hz=1234.5)
    np.testing.assert_allclose(part.values, out.values[1234:], atol=2e-6)


def test_apply_branch_filters_by_hand():
    rng = np.random.default_rng(2)
    x = noise(300, rng, 0.3)
    h_i, h_q = np.array([1.0, 0.05]), np.array([0.9, 0.08, -0.02])
    out = impairments.apply(cap_of(x), branch_filters=(h_i, h_q), gain_imbalance_db=0.5,
                            phase_skew_deg=2.0)
    x = x.astype(np.complex64).astype(complex)
    # causal FIR with zero initial state: numpy.convolve truncated (numpy reference)
    i = np.convolve(x.real, h_i)[:300]
    q = np.convolve(x.imag, h_q)[:300]
    g, phi = 10 ** (0.5 / 20), math.radians(2.0)
    expected = i + 1j * g * (q * math.cos(phi) - i * math.sin(phi))
    np.testing.assert_allclose(out.values, expected, atol=2e-6)


def test_apply_clock_offset_moves_a_tone_to_f_over_1_plus_eps():
    f, ppm = 123e3, 80.0
    cap = synth.tone(f, sample_rate=FS, n_samples=20000, dtype=np.complex128)
    out = impairments.apply(cap, sample_rate_offset_ppm=ppm)
    n = np.arange(20000)
    # REFERENCES: a tone at f appears at f / (1 + eps); away from the edges the 32-tap
    # windowed-sinc interpolator is accurate to about 1e-4 (-80 dBc)
    expected = np.exp(2j * np.pi * f / (1 + ppm * 1e-6) * n / FS)
    np.testing.assert_allclose(out.values[100:-100], expected[100:-100], atol=2e-4)


def kwargs_all():
    return dict(gain_imbalance_db=0.7, phase_skew_deg=-3.0, dc_i=0.01, dc_q=0.02,
                frequency_offset_hz=777.7, phase_noise={1e3: -80.0, 1e5: -110.0},
                phase_noise_linewidth_hz=20.0, sample_rate_offset_ppm=-30.0,
                branch_filters=([1.0, 0.1], [1.0, -0.05, 0.02]), clip_level=1.5,
                quantize_bits=14, rng=7)


def test_apply_lazy_equals_numpy_and_builds_lazily():
    rng = np.random.default_rng(3)
    cap = cap_of(noise(30000, rng, 0.1))
    eager = impairments.apply(cap, **kwargs_all())
    lz = lazy(cap, rng)
    with raise_if_dask_computes():
        out = impairments.apply(lz, **kwargs_all())
    assert out.chunks == lz.chunks
    # same draws and same arithmetic whatever the chunking; 14-bit codes make any
    # difference at least one step (1.2e-4), far above the 1e-7 allowed here
    assert_captures_close(out, eager, atol=1e-7)


def test_apply_multichannel_equals_per_channel():
    rng = np.random.default_rng(4)
    x = np.stack([noise(8000, rng, 0.1), noise(8000, rng, 0.2)])
    cap = cap_of(x)
    both = impairments.apply(cap, **kwargs_all())
    for c in range(2):
        one = impairments.apply(cap_of(x[c]), **kwargs_all())
        np.testing.assert_allclose(both.values[c], one.values, atol=1e-7)


def test_apply_rejects_bad_arguments():
    cap = cap_of(np.ones(100))
    with pytest.raises(ValueError, match="quantize_bits"):
        impairments.apply(cap, quantize_bits=1)
    with pytest.raises(ValueError, match="phase_noise"):
        impairments.apply(cap, phase_noise="loud")
    # a real capture is a plain argument error of a signal operation, not a failed measurement
    with pytest.raises(ValueError, match="apply: cap must be a complex") as err:
        impairments.apply(quadkit.capture(np.ones(100, np.float32), sample_rate=FS))
    assert not isinstance(err.value, MeasurementError)


# ------------------------------------------------------------------------------------------
# estimate: blind and tone, against known impairments
# ------------------------------------------------------------------------------------------

imbalance = dict(
    g_db=st.floats(-2.0, 2.0), phi=st.floats(-10.0, 10.0),
    dc_i=st.floats(-0.05, 0.05), dc_q=st.floats(-0.05, 0.05), seed=st.integers(0, 2**31),
)


@settings(max_examples=8, deadline=None)
@given(**imbalance)
def test_blind_estimate_recovers_known_imbalance(g_db, phi, dc_i, dc_q, seed):
    rng = np.random.default_rng(seed)
    cap = cap_of(noise(2**17, rng, 0.1))
    bad = impairments.apply(cap, gain_imbalance_db=g_db, phase_skew_deg=phi, dc_i=dc_i, dc_q=dc_q)
    est = impairments.estimate(bad, method="blind")
    assert est.attrs["method"] == "blind"
    truth = {"gain_imbalance_db": g_db, "phase_skew_deg": phi, "dc_i": dc_i, "dc_q": dc_q,
             "image_rejection_db": impairments.image_rejection(g_db, phi)}
    if truth["image_rejection_db"] > 45:
        del truth["image_rejection_db"]  # near balance the dB figure is dominated by noise
    for name, value in truth.items():
        # within 4.5 standard uncertainties (a 1e-5 two-sided Gaussian tail per figure)
        assert abs(float(est[name]) - value) <= 4.5 * float(est[name + "_uncertainty"]) + 1e-9, name


def test_blind_uncertainty_matches_theory_for_white_noise():
    # circular white Gaussian noise of power P, N samples: var of a sample variance is
    # 2 sigma^4 / N (Kendall & Stuart, memory), so std(ln g) = 1 / sqrt(N) and
    # std(g_dB) = 8.686 / sqrt(N); sin(phi) = -E[IQ] / (P/2) has std 1 / sqrt(N);
    # the mean has std sqrt(P / 2 / N). The jackknife (64 blocks) scatters ~ 1/sqrt(63).
    n, p = 2**18, 0.1
    rng = np.random.default_rng(11)
    est = impairments.estimate(cap_of(noise(n, rng, p)), method="blind")
    assert float(est.gain_imbalance_db_uncertainty) == pytest.approx(20 / math.log(10) / math.sqrt(n), rel=0.4)
    assert float(est.phase_skew_deg_uncertainty) == pytest.approx(math.degrees(1 / math.sqrt(n)), rel=0.4)
    assert float(est.dc_i_uncertainty) == pytest.approx(math.sqrt(p / 2 / n), rel=0.4)


@settings(max_examples=8, deadline=None)
@given(**imbalance, tone=st.floats(20e3, 400e3), sign=st.sampled_from([-1, 1]))
def test_tone_estimate_recovers_known_imbalance(g_db, phi, dc_i, dc_q, seed, tone, sign):
    rng = np.random.default_rng(seed)
    cap = synth.tone(sign * tone, sample_rate=FS, n_samples=2**16, amplitude=0.5,
                     phase_rad=float(rng.uniform(-np.pi, np.pi)))
    cap = synth.add_noise(cap, snr_db=40, rng=rng)
    bad = impairments.apply(cap, gain_imbalance_db=g_db, phase_skew_deg=phi, dc_i=dc_i, dc_q=dc_q)
    est = impairments.estimate(bad)  # auto: a dominant tone
    assert est.attrs["method"] == "tone"
    truth = {"gain_imbalance_db": g_db, "phase_skew_deg": phi, "dc_i": dc_i, "dc_q": dc_q,
             "image_rejection_db": impairments.image_rejection(g_db, phi)}
    if truth["image_rejection_db"] > 70:
        del truth["image_rejection_db"]  # near balance the dB figure is dominated by noise
    for name, value in truth.items():
        # 4.5 sigma; the 1e-6 floor covers complex64 rounding of the samples (~3e-8 FS)
        assert abs(float(est[name]) - value) <= 4.5 * float(est[name + "_uncertainty"]) + 1e-6, name


def test_accuracy_target_on_4m_samples_of_traffic_at_40_db():
    # Issue target: 4 M samples of band-limited traffic at 40 dB SNR -> gain within
    # 0.03 dB, phase within 0.1 deg, DC within 1e-3 of full scale. RRC 0.35 QPSK at
    # 2 samples per symbol, -10 dBFS, occupying 0.675 fs.
    rng = np.random.default_rng(2026)
    n = 4 * 2**20
    cap = cap_of(qpsk(n, 2, rng, power=0.1))
    bad = impairments.apply(cap, gain_imbalance_db=0.8, phase_skew_deg=-3.5, dc_i=0.004,
                            dc_q=-0.006)
    bad = synth.add_noise(bad, snr_db=40, rng=rng)
    est = impairments.estimate(bad)
    assert est.attrs["method"] == "blind"
    assert abs(float(est.gain_imbalance_db) - 0.8) < 0.03
    assert abs(float(est.phase_skew_deg) + 3.5) < 0.1
    assert abs(float(est.dc_i) - 0.004) < 1e-3 and abs(float(est.dc_q) + 0.006) < 1e-3
    # and the stated uncertainty is below the target (so the target is not luck)
    assert float(est.gain_imbalance_db_uncertainty) < 0.03 / 2
    assert float(est.phase_skew_deg_uncertainty) < 0.1 / 2


def test_dc_of_one_percent_is_minus_40_dbc():
    # REFERENCES (common practice): DC of 0.01 on a unit-power signal is -40 dBc
    cap = synth.tone(100e3, sample_rate=FS, n_samples=2**16)  # |z| = 1: unit power
    est = impairments.estimate(impairments.apply(cap, dc_i=0.01))
    # tone method: the DC fit is exact to float32 rounding of the samples
    assert float(est.dc_offset_dbc) == pytest.approx(10 * math.log10(0.01**2 / 1.0), abs=0.01)


def test_estimate_lazy_equals_numpy_and_multichannel_equals_per_channel():
    rng = np.random.default_rng(5)
    x = np.stack([noise(50000, rng, 0.1), noise(50000, rng, 0.05)])
    cap = impairments.apply(cap_of(x), gain_imbalance_db=0.5, phase_skew_deg=2.0, dc_q=0.01)
    eager = impairments.estimate(cap)
    lz = impairments.estimate(lazy(cap, rng))
    for name in eager.data_vars:
        # same moment sums in a different order: float64 rounding only
        np.testing.assert_allclose(lz[name].values, eager[name].values, rtol=1e-9, atol=1e-12)
    for c in range(2):
        one = impairments.estimate(cap.isel(channel=c).drop_vars("channel"))
        for name in one.data_vars:
            np.testing.assert_allclose(eager[name].values[c], one[name].values, rtol=1e-12)
    assert eager.gain_imbalance_db.dims == ("channel",)
    assert_units(eager)
    assert set(quadkit.to_json(eager)) >= {"dc_i", "dc_q", "gain_imbalance_db", "phase_skew_deg",
                                           "image_rejection_db"}


def test_estimate_with_one_chunk_per_channel():
    tones = np.stack([synth.tone(f, sample_rate=FS, n_samples=50000).values for f in (90e3, -60e3)])
    cap = impairments.apply(synth.add_noise(cap_of(tones), snr_db=40, rng=1),
                            gain_imbalance_db=0.3, phase_skew_deg=-2.0)
    eager = impairments.estimate(cap)
    chunked = impairments.estimate(_capture.like(cap, da.from_array(cap.values, chunks=(1, 7001))))
    assert eager.attrs["method"] == chunked.attrs["method"] == "tone"
    for name in eager.data_vars:
        np.testing.assert_allclose(chunked[name].values, eager[name].values, rtol=1e-9, atol=1e-12)


def test_estimate_tone_lazy_equals_numpy():
    rng = np.random.default_rng(6)
    cap = synth.add_noise(synth.tone(-150e3, sample_rate=FS, n_samples=40000, amplitude=0.3),
                          snr_db=50, rng=rng)
    cap = impairments.apply(cap, gain_imbalance_db=-0.4, phase_skew_deg=1.0, dc_i=0.003)
    eager = impairments.estimate(cap, method="tone")
    lz = impairments.estimate(lazy(cap, rng), method="tone")
    for name in eager.data_vars:
        np.testing.assert_allclose(lz[name].values, eager[name].values, rtol=1e-9, atol=1e-12)


def test_estimate_errors():
    with pytest.raises(ValueError, match="method"):
        impairments.estimate(cap_of(np.ones(1000)), method="psychic")
    with pytest.raises(MeasurementError, match="real-valued"):
        impairments.estimate(quadkit.capture(np.ones(1000, np.float32), sample_rate=FS))
    with pytest.raises(MeasurementError, match="tone"):
        impairments.estimate(cap_of(noise(2**15, np.random.default_rng(0))), method="tone")
    with pytest.raises(MeasurementError):
        impairments.estimate(cap_of(np.zeros(1000)))


# ------------------------------------------------------------------------------------------
# correct
# ------------------------------------------------------------------------------------------

IMPAIRED = dict(gain_imbalance_db=1.0, phase_skew_deg=5.0, dc_i=0.01, dc_q=0.02)


def fresh_check_tone(rng):
    """An independent capture through the same front end: a tone at another offset with its
    own noise, so the re-measured image is not the estimate's own samples (which the
    correction balances by construction)."""
    cap = synth.add_noise(synth.tone(-143e3, sample_rate=FS, n_samples=2**17, amplitude=0.5),
                          snr_db=60, rng=rng)
    return impairments.apply(cap, **IMPAIRED)


def test_correct_restores_image_rejection_tone():
    rng = np.random.default_rng(8)
    cap = synth.add_noise(synth.tone(87e3, sample_rate=FS, n_samples=2**18, amplitude=0.5),
                          snr_db=50, rng=rng)
    bad = impairments.apply(cap, **IMPAIRED)
    before = impairments.estimate(bad)
    # the textbook formula (Razavi) at 1 dB / 5 deg: the estimate's own IRR agrees
    assert float(before.image_rejection_db) == pytest.approx(razavi_irr_db(1.0, 5.0), abs=0.05)
    check = impairments.correct(fresh_check_tone(rng), before)
    assert check.dtype == np.complex64
    after = impairments.estimate(check, method="tone")
    assert float(after.image_rejection_db) >= 60.0  # issue requirement
    assert abs(float(after.dc_i)) < 1e-4 and abs(float(after.dc_q)) < 1e-4


def test_correct_restores_image_rejection_blind():
    # blind estimate on 4 M samples of white noise: errors ~ 5e-4 each, so ~ 65 dB
    rng = np.random.default_rng(9)
    bad = impairments.apply(cap_of(noise(4 * 2**20, rng, 0.1)), **IMPAIRED)
    est = impairments.estimate(bad)
    assert est.attrs["method"] == "blind"
    after = impairments.estimate(impairments.correct(fresh_check_tone(rng), est), method="tone")
    assert float(after.image_rejection_db) >= 60.0


@settings(max_examples=20, deadline=None)
@given(**imbalance)
def test_correct_after_apply_is_the_identity(g_db, phi, dc_i, dc_q, seed):
    cap = cap_of(noise(512, np.random.default_rng(seed), 0.2))
    bad = impairments.apply(cap, gain_imbalance_db=g_db, phase_skew_deg=phi, dc_i=dc_i, dc_q=dc_q)
    truth = xr.Dataset({"dc_i": dc_i, "dc_q": dc_q, "gain_imbalance_db": g_db, "phase_skew_deg": phi})
    # inverse pair; complex64 samples: a few float32 ulps of values up to ~1.5
    assert_captures_close(impairments.correct(bad, truth), cap, atol=2e-6)


def test_correct_inverts_the_model_exactly_and_lazily():
    rng = np.random.default_rng(10)
    x = np.stack([noise(20000, rng, 0.1), noise(20000, rng, 0.1)])
    cap = cap_of(x)
    bad = impairments.apply(cap, gain_imbalance_db=1.2, phase_skew_deg=-6.0, dc_i=0.01, dc_q=-0.02)
    truth = xr.Dataset({"dc_i": 0.01, "dc_q": -0.02, "gain_imbalance_db": 1.2, "phase_skew_deg": -6.0})
    fixed = impairments.correct(bad, truth)
    # the exact inverse of the DESIGN.md model: float32 rounding only
    assert_captures_close(fixed, cap, atol=1e-6)
    lz = lazy(bad, rng)
    with raise_if_dask_computes():
        fixed_lz = impairments.correct(lz, truth)
    assert_captures_close(fixed_lz, fixed, atol=1e-7)


# ------------------------------------------------------------------------------------------
# frequency-dependent imbalance
# ------------------------------------------------------------------------------------------

def wl_irr_db(h_i, h_q, g_db, phi_deg, f):
    """IRR(f) = |A(f)|^2 / |B(-f)|^2 of the branch-filter model, derived from
    z_m = a * z + b * conj(z) with a = (h_i (1 - j g sin) + g cos h_q) / 2,
    b = (h_i (1 - j g sin) - g cos h_q) / 2 (the widely-linear form of Tarighat et al.
    2005 applied per frequency); responses from scipy.signal.freqz."""
    g, ph = 10 ** (g_db / 20), math.radians(phi_deg)
    w = 2 * np.pi * np.asarray(f) / FS
    _, hi_p = scipy.signal.freqz(h_i, worN=w)
    _, hq_p = scipy.signal.freqz(h_q, worN=w)
    _, hi_m = scipy.signal.freqz(h_i, worN=-w)
    _, hq_m = scipy.signal.freqz(h_q, worN=-w)
    a = (hi_p * (1 - 1j * g * math.sin(ph)) + g * math.cos(ph) * hq_p) / 2
    b_m = (hi_m * (1 - 1j * g * math.sin(ph)) - g * math.cos(ph) * hq_m) / 2
    return 10 * np.log10(np.abs(a) ** 2 / np.abs(b_m) ** 2)


def test_image_rejection_vs_frequency_and_fir_correction():
    tones = [-410e3, -260e3, -90e3, 40e3, 170e3, 330e3]
    h_i, h_q = [1.0, 0.04], [0.93, 0.09, -0.015]
    cap = synth.multitone(tones, sample_rate=FS, n_samples=2**17, amplitudes=0.12,
                          phases_rad=np.arange(6) * 1.1)
    cap = synth.add_noise(cap, snr_db=60, rng=1)
    bad = impairments.apply(cap, branch_filters=(h_i, h_q), gain_imbalance_db=0.3,
                            phase_skew_deg=1.5)
    res = impairments.image_rejection_vs_frequency(bad, offsets_hz=tones)  # 5 taps
    theory = wl_irr_db(h_i, h_q, 0.3, 1.5, tones)
    # measured against the model's analytic response. Noise 60 dB below the total power
    # (sigma^2 = 6 x 0.12^2 x 1e-6), seen through a 2**17-sample projection, leaves the
    # weakest image (-43.6 dBc, amplitude 0.12 x 10**(-43.6 / 20)) about 60 dB over its
    # estimation noise: 1e-3 relative, 0.009 dB 1-sigma; 0.03 dB is over 3 sigma.
    np.testing.assert_allclose(res.image_rejection_db.values, theory, atol=0.03)
    assert np.all(np.abs(res.image_rejection_db.values - theory)
                  <= 4.5 * res.image_rejection_db_uncertainty.values + 1e-3)
    assert res.image_rejection_db.dims == ("frequency",)
    np.testing.assert_allclose(res.offset.values, tones, atol=1e-3)
    fixed = impairments.correct(bad, res)
    after = impairments.image_rejection_vs_frequency(fixed, offsets_hz=tones)
    assert np.all(after.image_rejection_db.values >= 60.0)
    assert res.compensator_taps.sizes["tap"] == 5
    # the 5-tap FIR (least squares on 6 tones) interpolates between the tones: a second
    # multitone at other offsets inside the same span
    other = [-350e3, -150e3, 100e3, 250e3]
    cap2 = synth.multitone(other, sample_rate=FS, n_samples=2**16, amplitudes=0.15)
    bad2 = impairments.apply(cap2, branch_filters=(h_i, h_q), gain_imbalance_db=0.3,
                             phase_skew_deg=1.5)
    between = impairments.image_rejection_vs_frequency(impairments.correct(bad2, res),
                                                       offsets_hz=other)
    assert np.all(between.image_rejection_db.values >= 55.0)
    with pytest.raises(ValueError, match="n_taps"):
        impairments.image_rejection_vs_frequency(bad, offsets_hz=tones, n_taps=7)
    lz = lazy(bad2, np.random.default_rng(3))
    with raise_if_dask_computes():
        fixed_lz = impairments.correct(lz, res)
    assert_captures_close(fixed_lz, impairments.correct(bad2, res), atol=1e-7)


def test_image_rejection_vs_frequency_from_a_chirp():
    h_i, h_q = [1.0, 0.04], [0.93, 0.09, -0.015]
    cap = synth.add_noise(synth.chirp(-450e3, 450e3, sample_rate=FS, n_samples=2**18,
                                      amplitude=0.3), snr_db=50, rng=4)
    bad = impairments.apply(cap, branch_filters=(h_i, h_q), gain_imbalance_db=0.3,
                            phase_skew_deg=1.5)
    res = impairments.image_rejection_vs_frequency(bad, stimulus="chirp", n_bins=16)
    assert res.attrs["method"] == "chirp" and res.sizes["frequency"] == 16
    theory = wl_irr_db(h_i, h_q, 0.3, 1.5, res.offset.values)
    err = np.abs(res.image_rejection_db.values - theory)
    # a sweep is a coarser stimulus than a multitone (each window sees a moving tone):
    # within 4.5 stated sigma, or 0.3 dB
    assert np.all(err <= np.maximum(4.5 * res.image_rejection_db_uncertainty.values, 0.3))
    fixed = impairments.correct(bad, res)
    after = impairments.image_rejection_vs_frequency(fixed, stimulus="chirp", n_bins=16)
    # from ~22-35 dB before to 45 dB or better across the swept band
    assert np.all(after.image_rejection_db.values >= 45.0)
    lz = impairments.image_rejection_vs_frequency(lazy(bad, np.random.default_rng(5)),
                                                  stimulus="chirp", n_bins=16)
    np.testing.assert_allclose(lz.image_rejection_db.values, res.image_rejection_db.values,
                               rtol=1e-9)


# ------------------------------------------------------------------------------------------
# frequency offset
# ------------------------------------------------------------------------------------------

@settings(max_examples=6, deadline=None)
@given(f=st.floats(-200e3, 200e3), seed=st.integers(0, 2**31))
def test_frequency_offset_of_a_tone_near_cramer_rao(f, seed):
    n, snr_db, amp = 2**16, 20.0, 0.5
    rng = np.random.default_rng(seed)
    cap = synth.add_noise(synth.tone(f, sample_rate=FS, n_samples=n, amplitude=amp,
                                     phase_rad=float(rng.uniform(-3, 3))), snr_db=snr_db, rng=rng)
    res = impairments.frequency_offset(cap)
    # CRB (Rife & Boorstyn 1974, REFERENCES): var(w) >= 6 / (rho N (N^2 - 1)) rad^2/sample^2
    rho = 10 ** (snr_db / 10)
    crb_hz = math.sqrt(6 / (rho * n * (n * n - 1))) * FS / (2 * math.pi)
    se = float(res.frequency_offset_hz_uncertainty)
    # the block-phase fit is close to efficient; its stated 1-sigma within 0.6 .. 2 x CRB
    assert 0.6 * crb_hz < se < 2.0 * crb_hz
    assert abs(float(res.frequency_offset_hz) - f) <= 4.5 * se


@pytest.mark.parametrize("cfo", [-7321.4, 512.25, 23456.0])
def test_frequency_offset_of_qpsk_within_5_hz(cfo):
    # Issue target: within 5 Hz at 1 MS/s on 2**18 samples of QPSK at 20 dB SNR
    rng = np.random.default_rng(int(abs(cfo)))
    cap = cap_of(qpsk(2**18, 4, rng, power=0.1), center_frequency=2.4e9)
    cap = impairments.apply(cap, frequency_offset_hz=cfo)
    cap = synth.add_noise(cap, snr_db=20, rng=rng)
    res = impairments.frequency_offset(cap, modulation="qpsk")
    assert res.attrs["method"] == "4th-power"
    assert abs(float(res.frequency_offset_hz) - cfo) < 5.0
    assert float(res.frequency_hz) == pytest.approx(2.4e9 + float(res.offset_hz), abs=1e-3)


def test_frequency_offset_lazy_and_expected():
    rng = np.random.default_rng(12)
    cap = synth.add_noise(synth.tone(10e3 + 42.0, sample_rate=FS, n_samples=2**15), snr_db=30, rng=rng)
    a = impairments.frequency_offset(cap, expected_offset_hz=10e3)
    b = impairments.frequency_offset(lazy(cap, rng), expected_offset_hz=10e3)
    assert float(a.frequency_offset_hz) == pytest.approx(42.0, abs=0.05)
    assert float(b.frequency_offset_hz) == pytest.approx(float(a.frequency_offset_hz), abs=1e-9)
    with pytest.raises(ValueError, match="modulation"):
        impairments.frequency_offset(cap, modulation="morse")


# ------------------------------------------------------------------------------------------
# phase noise
# ------------------------------------------------------------------------------------------

def test_white_phase_noise_level():
    # white phase noise of variance s^2 per sample: two-sided PSD s^2 / fs = L(f)
    # (IEEE Std 1139: L = S_phi / 2, S_phi one-sided)
    s2, n = 1e-5, 2**19
    rng = np.random.default_rng(13)
    phi = math.sqrt(s2) * rng.standard_normal(n)
    cap = quadkit.capture(np.exp(1j * (phi + 2 * np.pi * 50e3 * np.arange(n) / FS)).astype(np.complex64),
                          sample_rate=FS, center_frequency=1e9)
    pn = impairments.phase_noise(cap, offsets_hz=[1e3, 1e4, 1e5, 4e5])
    # each offset averages the +-10 % bins of 32 segments: std < 0.3 dB
    np.testing.assert_allclose(pn.phase_noise_dbc_hz.values, 10 * math.log10(s2 / FS), atol=0.5)
    # integrated over (nearly) the whole band: sigma^2 = 2 * integral of L = s^2
    assert float(pn.rms_phase_deg) == pytest.approx(math.degrees(math.sqrt(s2)), rel=0.02)
    fc = 1e9 + 50e3
    assert float(pn.rms_jitter_s) == pytest.approx(math.sqrt(s2) / (2 * math.pi * fc), rel=0.02)
    assert float(pn.carrier_frequency_hz) == pytest.approx(fc, abs=1e-3)
    assert_units(pn)


def test_sinusoidal_phase_modulation_sidebands():
    # beta sin(2 pi fm t): sidebands at J1(beta) / J0(beta) of the carrier (-46.02 dBc at
    # beta = 0.01, REFERENCES); scipy.special.jv as reference
    beta, fm, n = 0.01, 25e3, 2**18
    t = np.arange(n) / FS
    cap = quadkit.capture(np.exp(1j * beta * np.sin(2 * np.pi * fm * t)).astype(np.complex128),
                          sample_rate=FS)
    pn = impairments.phase_noise(cap, nperseg=4096, carrier_hz=0.0)
    curve = pn.phase_noise_curve_dbc_hz
    near = np.abs(curve.curve_offset.values - fm) <= 3 * pn.attrs["bin_spacing_hz"]
    line = np.sum(10 ** (curve.values[near] / 10)) * pn.attrs["bin_spacing_hz"]
    expected = 20 * math.log10(scipy.special.jv(1, beta) / scipy.special.jv(0, beta))
    # the phase detector sees beta^2/4 per side, equal to (J1/J0)^2 to 1e-4 dB at beta = 0.01
    assert 10 * math.log10(line) == pytest.approx(expected, abs=0.02)


def test_phase_noise_profile_from_apply_within_1_db():
    profile = {1e3: -78.0, 1e4: -92.0, 1e5: -108.0, 4e5: -118.0}
    offs = np.array([2e3, 5e3, 2e4, 5e4, 2e5])
    # the same interpolation the profile states: linear in dB against log10 offset
    truth = np.interp(np.log10(offs), np.log10(list(profile)), list(profile.values()))
    tone = synth.tone(30e3, sample_rate=FS, n_samples=2**20, dtype=np.complex128,
                      center_frequency=5.8e9)
    cap = impairments.apply(tone, phase_noise=profile, rng=5)
    pn = impairments.phase_noise(cap, offsets_hz=offs)
    np.testing.assert_allclose(pn.phase_noise_dbc_hz.values, truth, atol=1.0)  # issue target
    # integrated rms phase: 2 * integral of L over the band, by the trapezoid rule on a log grid
    lo, hi = pn.attrs["integration_start_hz"], pn.attrs["integration_stop_hz"]
    f = np.geomspace(lo, hi, 4000)
    ell = 10 ** (np.interp(np.log10(f), np.log10(list(profile)), list(profile.values())) / 10)
    sigma = math.sqrt(2 * np.trapezoid(ell, f))
    assert float(pn.rms_phase_deg) == pytest.approx(math.degrees(sigma), rel=0.1)


def test_wiener_phase_noise_is_lorentzian():
    # Wiener phase noise of linewidth dnu: L(f) = (dnu / 2pi) / ((dnu / 2)^2 + f^2)
    # (REFERENCES); its phase PSD is dnu / (2 pi f^2), the same for f >> dnu
    dnu = 50.0
    tone = synth.tone(0.0, sample_rate=FS, n_samples=2**19, dtype=np.complex128)
    cap = impairments.apply(tone, phase_noise_linewidth_hz=dnu, rng=2)
    offs = np.array([2e3, 1e4, 5e4, 2e5])
    pn = impairments.phase_noise(cap, offsets_hz=offs, carrier_hz=0.0)
    lorentz = 10 * np.log10((dnu / (2 * np.pi)) / ((dnu / 2) ** 2 + offs**2))
    np.testing.assert_allclose(pn.phase_noise_dbc_hz.values, lorentz, atol=1.0)


def test_phase_noise_lazy_equals_numpy_and_errors():
    rng = np.random.default_rng(14)
    tone = synth.tone(20e3, sample_rate=FS, n_samples=2**16)
    cap = impairments.apply(tone, phase_noise=-100.0, rng=1)
    a = impairments.phase_noise(cap, nperseg=2048)
    b = impairments.phase_noise(lazy(cap, rng), nperseg=2048)
    np.testing.assert_allclose(b.phase_noise_curve_dbc_hz.values, a.phase_noise_curve_dbc_hz.values,
                               atol=1e-9)
    with pytest.raises(MeasurementError, match="outside the measurable range"):
        impairments.phase_noise(cap, nperseg=2048, offsets_hz=[10.0])
    with pytest.raises(MeasurementError, match="segments"):
        impairments.phase_noise(cap, nperseg=2**15)


# ------------------------------------------------------------------------------------------
# sample-clock offset
# ------------------------------------------------------------------------------------------

@pytest.mark.parametrize("ppm", [-120.0, 3.5, 40.0])
def test_sample_rate_offset_one_tone(ppm):
    rng = np.random.default_rng(15)
    cap = synth.add_noise(synth.tone(150e3, sample_rate=FS, n_samples=2**17, amplitude=0.5),
                          snr_db=40, rng=rng)
    res = impairments.sample_rate_offset(impairments.apply(cap, sample_rate_offset_ppm=ppm),
                                         tone_offset_hz=150e3)
    se = float(res.sample_rate_offset_ppm_uncertainty)
    assert abs(float(res.sample_rate_offset_ppm) - ppm) <= 4.5 * se + 1e-4
    assert se < 0.01  # 2**17 samples at 40 dB: the tone is known to ~1e-3 Hz


def test_sample_rate_offset_two_tones_separate_the_oscillator():
    rng = np.random.default_rng(16)
    cap = synth.add_noise(synth.multitone([-180e3, 180e3], sample_rate=FS, n_samples=2**17,
                                          amplitudes=0.3), snr_db=40, rng=rng)
    bad = impairments.apply(cap, sample_rate_offset_ppm=-25.0, frequency_offset_hz=1500.0)
    res = impairments.sample_rate_offset(bad, tone_offsets_hz=(180e3, -180e3))
    # f_i' = (f_i + d) / (1 + eps) (REFERENCES, derived): both recovered
    assert abs(float(res.sample_rate_offset_ppm) + 25.0) <= 4.5 * float(res.sample_rate_offset_ppm_uncertainty) + 1e-4
    assert abs(float(res.frequency_offset_hz) - 1500.0) <= 4.5 * float(res.frequency_offset_hz_uncertainty) + 1e-4
    # one tone alone cannot tell a clock error from the oscillator offset
    one = impairments.sample_rate_offset(bad, tone_offset_hz=180e3)
    assert abs(float(one.sample_rate_offset_ppm) + 25.0) > 1000.0
    with pytest.raises(ValueError, match="exactly one"):
        impairments.sample_rate_offset(bad)


def test_accessor_forwards():
    cap = synth.tone(100e3, sample_rate=FS, n_samples=2**15)
    bad = cap.qk.apply(gain_imbalance_db=0.5)
    assert float(bad.qk.estimate().gain_imbalance_db) == pytest.approx(0.5, abs=1e-4)


def test_lazy_graphs_pickle_and_run_on_a_cluster():
    import pickle

    import distributed

    rng = np.random.default_rng(17)
    cap = synth.tone(60e3, sample_rate=FS, n_samples=30000, amplitude=0.5)
    lz = lazy(cap, rng)
    bad = impairments.apply(lz, gain_imbalance_db=0.6, phase_skew_deg=3.0, phase_noise=-110.0,
                            phase_noise_linewidth_hz=5.0, sample_rate_offset_ppm=10.0, rng=3)
    fixed = impairments.correct(bad, impairments.estimate(bad))
    # module-level functions and plain data only: plain pickle works, as worker processes need
    again = pickle.loads(pickle.dumps(fixed.data))
    bad_eager = impairments.apply(cap, gain_imbalance_db=0.6, phase_skew_deg=3.0,
                                  phase_noise=-110.0, phase_noise_linewidth_hz=5.0,
                                  sample_rate_offset_ppm=10.0, rng=3)
    eager = impairments.correct(bad_eager, impairments.estimate(bad_eager))
    np.testing.assert_allclose(again.compute(scheduler="sync"), eager.values, atol=1e-6)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=2, processes=False,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster):
        est = impairments.estimate(bad)
        got = fixed.compute()
    assert abs(float(est.gain_imbalance_db) - 0.6) <= 4.5 * float(est.gain_imbalance_db_uncertainty)
    np.testing.assert_allclose(got.values, eager.values, atol=1e-6)


def test_dc_in_units_of_full_scale_round_trip():
    # an int16-scaled capture: full_scale 32768; dc_i = 0.01 means 327.68 sample units
    # 62.5 kHz: 2048 whole cycles in 2**15 samples, so the tone itself has zero mean
    tone = synth.tone(62.5e3, sample_rate=FS, n_samples=2**15, amplitude=8000.0,
                      full_scale=32768.0)
    bad = impairments.apply(tone, dc_i=0.01, dc_q=-0.005, gain_imbalance_db=0.2)
    assert float(np.mean(bad.values.real)) == pytest.approx(327.68, abs=0.01)
    est = impairments.estimate(bad)
    assert float(est.dc_i) == pytest.approx(0.01, abs=1e-6)
    assert float(est.dc_q) == pytest.approx(-0.005, abs=1e-6)
    fixed = impairments.correct(bad, est)
    assert abs(float(np.mean(fixed.values.real))) < 0.01  # sample units, ~3e-7 FS


# ------------------------------------------------------------------------------------------
# traffic without a carrier
# ------------------------------------------------------------------------------------------

def traffic(scheme, seed=0, n_bits=8000, offset_hz=0.0):
    # RRC-shaped traffic at 100 kBd, 1 MS/s: power spread over ~135 kHz, no spectral line
    bits = np.random.default_rng(seed).integers(0, 2, n_bits)
    cap = quadkit.modulation.modulate(bits, scheme, symbol_rate=100e3, sample_rate=FS)
    if offset_hz:
        t = np.arange(cap.sizes["time"]) / FS
        cap = _capture.like(cap, (cap.values * np.exp(2j * np.pi * offset_hz * t))
                            .astype(np.complex64))
    return cap


@pytest.mark.parametrize("scheme", ["qpsk", "16qam"])
def test_phase_noise_refuses_traffic(scheme):
    cap = traffic(scheme)
    with pytest.raises(MeasurementError, match="no carrier"):
        impairments.phase_noise(cap)
    with pytest.raises(MeasurementError, match="no carrier"):
        impairments.phase_noise(cap, carrier_hz=0.0)


def test_frequency_offset_without_modulation_refuses_traffic():
    # 16-QAM traffic 3 kHz off: with modulation=None there is no tone to measure; told the
    # scheme, the 4th-power line gives the offset (Mengali & D'Andrea 1997). 16-QAM's 4th
    # power keeps a line of reduced strength, 16000 symbols place it within a few Hz.
    cap = traffic("16qam", seed=3, n_bits=64000, offset_hz=3000.0)
    with pytest.raises(MeasurementError, match='no tone.*modulation="qpsk"'):
        impairments.frequency_offset(cap)
    with pytest.raises(MeasurementError, match="no tone"):
        impairments.frequency_offset(traffic("qpsk"))
    res = impairments.frequency_offset(cap, modulation="16qam")
    assert float(res.frequency_offset_hz) == pytest.approx(3000.0, abs=5.0)  # issue target
    # a channel of traffic beside a channel with a tone: the message names the channel
    tone = synth.add_noise(synth.tone(12.5e3, sample_rate=FS, n_samples=cap.sizes["time"]),
                           snr_db=20, rng=5)
    two = quadkit.capture(np.stack([tone.values, cap.values]), sample_rate=FS)
    with pytest.raises(MeasurementError, match="channel 1"):
        impairments.frequency_offset(two)
    assert float(impairments.frequency_offset(tone).offset_hz) == pytest.approx(12.5e3, abs=1.0)
