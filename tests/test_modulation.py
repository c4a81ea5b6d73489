"""quadkit.modulation: mappers, RRC pulse, modulate, and the EVM/MER analysis.

Outside references: 3GPP TS 38.211 section 5.1 (mapper formulas and the vectors of
REFERENCES.md), the RRC/RC pulse formulas of Proakis & Salehi (memory), ``scipy.signal.upfirdn``
for pulse shaping, the AWGN relation EVM = 1/sqrt(SNR) and MER = SNR (3GPP TS 38.104 EVM
definition), and the Cramer-Rao bound of a tone's frequency (Rife & Boorstyn 1974, memory).
"""

from __future__ import annotations

import json
import math

import dask.array as da
import numpy as np
import pytest
import scipy.signal
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

import quadkit
from quadkit import modulation as qm
from quadkit.testing import assert_units

RS = 1e6  # symbol rate of most tests, Hz
FS = 4e6  # sample rate, four samples per symbol


# ------------------------------------------------------------------ reference formulas

def rrc_formula(t, beta):
    """RRC pulse, T = 1, unit energy (Proakis & Salehi 5th ed. ch. 9, memory); general form only."""
    t = np.asarray(t, dtype=float)
    return (np.sin(np.pi * t * (1 - beta)) + 4 * beta * t * np.cos(np.pi * t * (1 + beta))) / (
        np.pi * t * (1 - (4 * beta * t) ** 2))


def rrc_pulse(t, beta):
    """The general formula with its two removable singularities filled by their limits,
    taken numerically (mean of the formula just left and right of the point)."""
    t = np.asarray(t, dtype=float)
    out = np.empty_like(t)
    for i, ti in enumerate(t):
        if abs(ti) < 1e-9 or abs(abs(ti) - 1 / (4 * beta)) < 1e-9:
            out[i] = 0.5 * (rrc_formula(ti - 1e-5, beta) + rrc_formula(ti + 1e-5, beta))
        else:
            out[i] = rrc_formula(ti, beta)
    return out


def rc_pulse(t, beta):
    """Raised cosine: sinc(t) cos(pi beta t) / (1 - (2 beta t)^2) (Proakis & Salehi, memory)."""
    t = np.asarray(t, dtype=float)
    den = 1 - (2 * beta * t) ** 2
    safe = np.abs(den) > 1e-9
    out = np.where(safe, np.sinc(t) * np.cos(np.pi * beta * t) / np.where(safe, den, 1), 0.0)
    # at t = +-1/(2 beta): limit (pi/4) sinc(1/(2 beta))
    return np.where(safe, out, np.pi / 4 * np.sinc(1 / (2 * beta)))


def qam_38211(bits, k):
    """38.211 5.1.4-5.1.6 written out for 16/64/256QAM (independent of the module)."""
    b = 1 - 2 * np.asarray(bits, dtype=float)
    if k == 4:
        i = b[0] * (2 - b[2])
        q = b[1] * (2 - b[3])
        norm = 10
    elif k == 6:
        i = b[0] * (4 - b[2] * (2 - b[4]))
        q = b[1] * (4 - b[3] * (2 - b[5]))
        norm = 42
    else:
        i = b[0] * (8 - b[2] * (4 - b[4] * (2 - b[6])))
        q = b[1] * (8 - b[3] * (4 - b[5] * (2 - b[7])))
        norm = 170
    return (i + 1j * q) / math.sqrt(norm)


def point(c, bits):
    return complex(c.values[np.flatnonzero(c.bits.values == bits)[0]])


def awgn(cap, es_n0_db, rng, *, power=1.0):
    """Complex white Gaussian noise (numpy) for a symbol SNR Es/N0: the per-sample variance is
    power * (fs / Rs) / SNR, since the matched filter keeps 1/sps of the white noise."""
    sps = cap.attrs["sample_rate"] / cap.attrs["symbol_rate"]
    var = power * sps / 10 ** (es_n0_db / 10)
    w = (rng.standard_normal(cap.shape) + 1j * rng.standard_normal(cap.shape)) * math.sqrt(var / 2)
    return cap + w.astype(cap.dtype)


def burst(scheme, n_symbols, rng, **kw):
    k = qm.constellation(scheme).attrs["bits_per_symbol"]
    bits = rng.integers(0, 2, k * n_symbols)
    kw.setdefault("power_dbfs", 0.0)
    return bits, qm.modulate(bits, scheme, symbol_rate=RS, sample_rate=kw.pop("fs", FS), **kw)


# ------------------------------------------------------------------ mappers

def test_16qam_vectors_of_38211():
    # REFERENCES.md "Modulation quality": x sqrt(10): 0000 -> 1+j, 0011 -> 3+3j,
    # 1111 -> -3-3j, 1010 -> -3+j, 0101 -> 1-3j (3GPP TS 38.211 5.1.4).
    c = qm.constellation("16qam")
    expected = {"0000": 1 + 1j, "0011": 3 + 3j, "1111": -3 - 3j, "1010": -3 + 1j, "0101": 1 - 3j}
    for bits, value in expected.items():
        assert point(c, bits) * math.sqrt(10) == pytest.approx(value, abs=1e-12)


@pytest.mark.parametrize("scheme,k", [("16qam", 4), ("64qam", 6), ("256qam", 8)])
def test_qam_equals_the_38211_formula(scheme, k):
    c = qm.constellation(scheme)
    assert c.sizes["point"] == 2 ** k and c.attrs["bits_per_symbol"] == k
    for label, value in zip(c.bits.values, c.values):
        bits = [int(ch) for ch in label]
        assert value == pytest.approx(qam_38211(bits, k), abs=1e-12)
    # per-axis amplitude levels {+-1, +-3, ...}/sqrt(norm): 38.211 normalisations
    norm = {4: 10, 6: 42, 8: 170}[k]
    levels = np.arange(-(2 ** (k // 2) - 1), 2 ** (k // 2), 2)
    np.testing.assert_allclose(np.unique(np.round(c.values.real * math.sqrt(norm), 9)), levels)
    np.testing.assert_allclose(np.unique(np.round(c.values.imag * math.sqrt(norm), 9)), levels)


def test_psk_points_of_38211():
    s2 = 1 / math.sqrt(2)
    q = qm.constellation("qpsk")  # 38.211 5.1.3: ((1-2b0) + j(1-2b1))/sqrt 2
    for bits, value in {"00": 1 + 1j, "01": 1 - 1j, "10": -1 + 1j, "11": -1 - 1j}.items():
        assert point(q, bits) == pytest.approx(value * s2, abs=1e-12)
    b = qm.constellation("bpsk")  # 38.211 5.1.2: ((1-2b) + j(1-2b))/sqrt 2
    assert point(b, "0") == pytest.approx((1 + 1j) * s2) and point(b, "1") == pytest.approx(-(1 + 1j) * s2)
    p = qm.constellation("pi/2-bpsk")  # 5.1.1: odd symbols rotated by e^{j pi/2}
    even = p.values[p.parity.values == 0]
    odd = p.values[p.parity.values == 1]
    np.testing.assert_allclose(odd, even * 1j, atol=1e-12)
    # modulate applies the rotation by symbol index: bits 0,0,0,0 -> a, ja, a, ja
    cap = qm.modulate([0, 0, 0, 0], "pi/2-bpsk", symbol_rate=RS, sample_rate=8 * RS, power_dbfs=0)
    assert cap.attrs["n_symbols"] == 4


@pytest.mark.parametrize("scheme", qm.SCHEMES)
def test_unit_mean_energy(scheme):
    c = qm.constellation(scheme)
    assert np.mean(np.abs(c.values) ** 2) == pytest.approx(1.0, abs=1e-12)
    assert c.attrs["units"] and c.attrs["long_name"]


@pytest.mark.parametrize("scheme", ["qpsk", "16qam", "64qam", "256qam"])
def test_gray_nearest_neighbours_differ_in_one_bit(scheme):
    c = qm.constellation(scheme)
    pts = c.values
    d = np.abs(pts[:, None] - pts[None, :])
    dmin = np.min(d[d > 1e-12])
    labels = c.label.values
    pairs = np.argwhere(np.abs(d - dmin) < 1e-9)
    assert len(pairs) > 0
    for i, j in pairs:
        assert bin(int(labels[i]) ^ int(labels[j])).count("1") == 1


def test_scheme_option_is_checked():
    with pytest.raises(ValueError, match="scheme='8psk' is not one of"):
        qm.constellation("8psk")
    assert qm.constellation("16-QAM").attrs["scheme"] == "16qam"


# ------------------------------------------------------------------ RRC

@pytest.mark.parametrize("beta,sps", [(0.35, 8), (0.22, 4), (0.5, 10)])
def test_rrc_taps_follow_the_formula(beta, sps):
    h = qm.rrc_taps(beta, sps, 32)
    assert h.size == 32 * sps + 1 and h.dtype == np.float64
    assert np.sum(h ** 2) == pytest.approx(1.0, abs=1e-12)  # unit energy, by definition
    np.testing.assert_allclose(h, h[::-1], atol=1e-15)  # linear phase
    t = np.arange(-16 * sps, 16 * sps + 1) / sps
    # taps * sqrt(sps) -> h(t): the truncated tail energy beyond +-16 T is ~1e-5 of the total,
    # so the normalisations differ by ~1e-5 relative (tolerance 1e-4 of h(0)).
    np.testing.assert_allclose(h * math.sqrt(sps), rrc_pulse(t, beta), atol=1e-4)
    # h(0) = 1 - beta + 4 beta / pi (Proakis & Salehi, memory): 1.095634 at beta = 0.35
    assert h[16 * sps] * math.sqrt(sps) == pytest.approx(1 - beta + 4 * beta / math.pi, rel=1e-4)


def test_rrc_special_points():
    assert 1 - 0.35 + 4 * 0.35 / math.pi == pytest.approx(1.095634, abs=1e-6)  # REFERENCES.md
    # beta = 0.25, 8 samples per symbol: t = 1/(4 beta) = 1 T falls on tap 8 from the centre.
    beta, sps = 0.25, 8
    h = qm.rrc_taps(beta, sps, 32) * math.sqrt(sps)
    a = math.pi / (4 * beta)
    special = beta / math.sqrt(2) * ((1 + 2 / math.pi) * math.sin(a) + (1 - 2 / math.pi) * math.cos(a))
    # the closed form equals the limit of the general formula ...
    # (mean of the two sides 1e-5 away: error ~ 1e-10 from curvature and rounding)
    t0 = 1 / (4 * beta)
    limit = 0.5 * (rrc_formula(t0 - 1e-5, beta) + rrc_formula(t0 + 1e-5, beta))
    assert special == pytest.approx(limit, rel=1e-8)
    # ... and the taps hold it on both sides (tolerance: truncation normalisation, see above)
    assert h[16 * sps + 8] == pytest.approx(special, rel=1e-4)
    assert h[16 * sps - 8] == pytest.approx(special, rel=1e-4)
    assert np.all(np.isfinite(qm.rrc_taps(0.5, 2, 16)))  # t = 0.5 T falls on a tap


@pytest.mark.parametrize("beta", [0.22, 0.35, 0.5])
def test_rrc_cascade_is_a_nyquist_raised_cosine(beta):
    sps, span = 8, 32
    h = qm.rrc_taps(beta, sps, span)
    p = np.convolve(h, h)  # transmit and matched filter
    c = p.size // 2
    k = np.arange(-span + 1, span)
    at_symbols = p[c + k * sps]
    # Zero ISI at multiples of T: the cascade of two pulses truncated at +-16 T keeps ISI
    # terms of ~1e-3 (tails ~ 1/(4 pi beta t^2) at t = 16, times the pulse's central lobe).
    assert at_symbols[k == 0][0] == pytest.approx(1.0, abs=1e-4)
    assert np.max(np.abs(at_symbols[k != 0])) < 2e-3
    # and the cascade is the raised cosine pulse (same truncation tolerance)
    t = np.arange(-span * sps // 2, span * sps // 2 + 1) / sps
    np.testing.assert_allclose(p[c - span * sps // 2: c + span * sps // 2 + 1], rc_pulse(t, beta), atol=2e-3)


def test_rrc_taps_argument_checks():
    with pytest.raises(ValueError, match="rolloff"):
        qm.rrc_taps(1.5, 8, 16)
    with pytest.raises(ValueError, match="samples_per_symbol=0 must be a positive integer"):
        qm.rrc_taps(0.35, 0, 16)


# ------------------------------------------------------------------ modulate

def test_modulate_equals_upfirdn_of_the_pulse():
    # scipy.signal.upfirdn with the sampled pulse is the textbook shaping filter; our
    # modulate evaluates the pulse at every sample time, so both agree to float rounding.
    rng = np.random.default_rng(1)
    sps, span, beta = 8, 16, 0.35
    bits = rng.integers(0, 2, 4 * 300)
    cap = qm.modulate(bits, "16qam", symbol_rate=RS, sample_rate=sps * RS, rolloff=beta,
                      span_symbols=span, power_dbfs=0.0, dtype=np.complex128)
    symbols = np.array([qam_38211(b, 4) for b in bits.reshape(-1, 4)])
    g = rrc_pulse(np.arange(-span * sps // 2, span * sps // 2 + 1) / sps, beta)
    ref = scipy.signal.upfirdn(g, symbols, up=sps)[: cap.sizes["time"]]
    assert cap.dtype == np.complex128
    np.testing.assert_allclose(cap.values, ref, atol=1e-9)
    assert cap.sizes["time"] == (300 - 1 + span) * sps + 1


def test_modulate_any_rate_ratio_and_attrs():
    # fs / Rs = 2.5: the output is sum_k a_k h(t_n - (span/2 + k) T), computed here directly.
    rng = np.random.default_rng(2)
    sym = qm.constellation("qpsk").values[rng.integers(0, 4, 40)]
    cap = qm.modulate(sym, "qpsk", symbol_rate=RS, sample_rate=2.5 * RS, span_symbols=8,
                      power_dbfs=-6.0, center_frequency=2.4e9)
    t = np.arange(cap.sizes["time"]) / 2.5  # in symbols
    ref = sum(a * np.where(np.abs(t - 4 - k) <= 4, rrc_pulse(t - 4 - k, 0.35), 0)
              for k, a in enumerate(sym)) * 10 ** (-6 / 20)
    assert cap.dtype == np.complex64  # the default
    np.testing.assert_allclose(cap.values, ref, atol=2e-6)  # complex64 rounding
    a = cap.attrs
    assert (a["modulation_scheme"], a["symbol_rate"], a["rolloff"], a["n_symbols"]) == ("qpsk", RS, 0.35, 40)
    assert a["first_symbol_s"] == pytest.approx(4 / RS) and a["center_frequency"] == 2.4e9
    ann = a["annotations"][-1]
    assert ann["upper_frequency_hz"] - ann["lower_frequency_hz"] == pytest.approx(1.35 * RS)
    quadkit.validate(cap)


def test_modulate_power_offset_and_phase():
    rng = np.random.default_rng(3)
    bits = rng.integers(0, 2, 2 * 20000)
    base = qm.modulate(bits, "qpsk", symbol_rate=RS, sample_rate=FS, power_dbfs=-12.0,
                       dtype=np.complex128)
    # mean power of unit-energy symbols through a unit-energy pulse = 1, times -12 dBFS; the
    # sample mean over 20000 random QPSK symbols scatters by ~0.3 %, so 0.05 dB.
    inner = base.values[64:-64]
    assert 10 * np.log10(np.mean(np.abs(inner) ** 2)) == pytest.approx(-12.0, abs=0.05)
    shifted = qm.modulate(bits, "qpsk", symbol_rate=RS, sample_rate=FS, power_dbfs=-12.0,
                          offset_hz=30e3, phase_rad=0.5, dtype=np.complex128)
    n = np.arange(base.sizes["time"])
    np.testing.assert_allclose(shifted.values, base.values * np.exp(1j * (2 * np.pi * 30e3 / FS * n + 0.5)),
                               atol=1e-9)


def test_modulate_cautions_and_bit_checks():
    doc = " ".join(qm.modulate.__doc__.split())
    for word in ("regulations", "licensed", "cabled", "attenuators", "input power limits"):
        assert word in doc
    with pytest.raises(ValueError, match="not a multiple of 4 bits"):
        qm.modulate([0, 1, 1], "16qam", symbol_rate=RS, sample_rate=FS)
    with pytest.raises(ValueError, match="bits must be 0 or 1"):
        qm.modulate([0, 2, 1, 1], "16qam", symbol_rate=RS, sample_rate=FS)


# ------------------------------------------------------------------ analyze: accuracy

def _isi_floor_percent(beta=0.35, sps=8, tx_span=32, rx_span=32):
    """rms ISI of a tx pulse truncated at +-tx_span/2 through a matched filter truncated at
    +-rx_span/2, relative to the main tap: the EVM floor of a noiseless burst (in %)."""
    tx = rrc_pulse(np.arange(-tx_span * sps // 2, tx_span * sps // 2 + 1) / sps, beta)
    rx = rrc_pulse(np.arange(-rx_span * sps // 2, rx_span * sps // 2 + 1) / sps, beta)
    p = np.convolve(tx, rx)
    c = p.size // 2
    isi = np.delete(p[c % sps::sps], c // sps)
    return 100 * math.sqrt(np.sum(isi ** 2)) / p[c]


@pytest.mark.parametrize("scheme", qm.SCHEMES)
def test_blind_noiseless_burst_all_schemes(scheme):
    # Unknown carrier offset (2.3 % of Rs), phase, timing (fs/Rs = 4.3 puts every symbol at a
    # different fractional sample), silence around the burst.
    rng = np.random.default_rng(10)
    _, cap = burst(scheme, 600, rng, fs=4.3 * RS, offset_hz=23e3, phase_rad=2.0)
    x = np.concatenate([np.zeros(777, np.complex64), cap.values, np.zeros(1234, np.complex64)])
    padded = quadkit.capture(x, sample_rate=4.3 * RS)
    res = qm.analyze(padded, scheme, symbol_rate=RS)
    floor = _isi_floor_percent()
    # only the truncation ISI of the span-32 pulses remains (~0.1 %); allow 2x for the
    # fits' own residuals
    assert float(res.evm_rms_percent) < 2 * floor
    assert float(res.frequency_error_hz) == pytest.approx(23e3, abs=1.0)
    assert int(res.symbol_count) == 600
    assert "burst found" in res.attrs["burst"]
    # start of the burst: half a symbol before the first symbol instant
    t_first = 777 / (4.3 * RS) + cap.attrs["first_symbol_s"]
    assert float(res.burst_start_s) == pytest.approx(t_first - 0.5 / RS, abs=0.02 / RS)
    assert float(res.burst_duration_s) == pytest.approx(600 / RS)
    assert_units(res)


def test_burst_in_noise_only_the_burst_is_analysed():
    # 1500 16QAM symbols in a capture five times as long whose silence holds the same noise:
    # if noise-only instants were counted, the EVM would exceed 1/sqrt(SNR) by far (each
    # counts as a ~100 % error); analysing exactly the burst gives 1/sqrt(SNR) (REFERENCES.md).
    rng = np.random.default_rng(12)
    bits, cap = burst("16qam", 1500, rng, offset_hz=31e3, phase_rad=-2.0)
    lead, tail = 9000, 11003
    x = np.concatenate([np.zeros(lead, np.complex64), cap.values, np.zeros(tail, np.complex64)])
    noisy = awgn(quadkit.capture(x, sample_rate=FS, symbol_rate=RS), 20.0, rng)
    res = qm.analyze(noisy, "16qam", symbol_rate=RS, reference=bits)
    assert abs(int(res.symbol_count) - 1500) <= 2  # a noisy edge symbol may fall either way
    expected = math.hypot(10.0, _isi_floor_percent())
    tol = 4 / (2 * math.sqrt(1500))  # 4 sigma of the chi-square spread, as above
    assert float(res.evm_rms_percent) == pytest.approx(expected, rel=tol)
    t_first = lead / FS + cap.attrs["first_symbol_s"]
    assert float(res.burst_start_s) == pytest.approx(t_first - 0.5 / RS, abs=2.1 / RS)
    assert "burst found" in res.attrs["burst"]
    blind = qm.analyze(noisy, "16qam", symbol_rate=RS)
    assert abs(int(blind.symbol_count) - 1500) <= 2
    # CRB (Rife & Boorstyn, see below) for 1500 symbols at 20 dB: 0.67 Hz rms; 5 Hz is 7.5 sigma
    assert float(blind.frequency_error_hz) == pytest.approx(31e3, abs=5.0)


@pytest.mark.parametrize("scheme", ["qpsk", "16qam"])
@pytest.mark.parametrize("snr_db", [10.0, 20.0, 30.0])
def test_data_aided_evm_under_awgn(scheme, snr_db):
    # REFERENCES.md (3GPP TS 38.104 EVM definition): data-aided EVM under AWGN = 1/sqrt(SNR),
    # 10/20/30 dB -> 31.62/10.00/3.162 %, and MER = SNR.
    rng = np.random.default_rng(int(snr_db) + len(scheme))
    n = 6000
    bits, cap = burst(scheme, n, rng, offset_hz=-17e3, phase_rad=0.3)
    noisy = awgn(cap, snr_db, rng)
    res = qm.analyze(noisy, scheme, symbol_rate=RS, reference=bits)
    assert res.attrs["method"] == "data-aided"
    expected = 100 / math.sqrt(10 ** (snr_db / 10))
    expected = math.hypot(expected, _isi_floor_percent())  # the noiseless floor adds in power
    # EVM^2 is a mean of n_sym scaled chi-square(2) terms: relative std of EVM = 1/(2 sqrt n);
    # 4 sigma is 2.6 % for 6000 symbols (the edge symbols lost to the trim change nothing).
    tol = 4 / (2 * math.sqrt(int(res.symbol_count)))
    assert float(res.evm_rms_percent) == pytest.approx(expected, rel=tol)
    assert float(res.mer_db) == pytest.approx(-20 * math.log10(expected / 100), abs=-20 * math.log10(1 - tol))
    assert int(res.symbol_count) >= n - 2
    # the per-symbol errors are those of the figures
    np.testing.assert_allclose(
        math.sqrt(np.mean(np.abs(res.measured_symbol - res.ideal_symbol) ** 2)
                  / np.mean(np.abs(res.ideal_symbol) ** 2)) * 100, float(res.evm_rms_percent), rtol=1e-9)
    # decision-directed reads the same where decisions are right (20/30 dB) ...
    dd = qm.analyze(noisy, scheme, symbol_rate=RS)
    if snr_db >= 20:
        assert float(dd.evm_rms_percent) == pytest.approx(float(res.evm_rms_percent), rel=0.01)
    elif scheme == "16qam":
        # ... and under-reads at 10 dB for 16QAM (~12 % of the components cross a boundary)
        assert float(dd.evm_rms_percent) < 0.95 * float(res.evm_rms_percent)


def test_frequency_error_against_the_cramer_rao_bound():
    # Rife & Boorstyn 1974 (memory): var(omega) >= 6 / (rho N (N^2 - 1)) rad^2/symbol^2 for
    # N symbols at SNR rho once the data are removed. 20 draws at Es/N0 = 20 dB: their rms
    # error stays below 1.6 x the bound unless the estimator is inefficient or biased
    # (an efficient one exceeds it with chi-square(20) probability ~ 1e-3).
    n, snr_db = 300, 20.0
    errors = []
    for seed in range(20):
        rng = np.random.default_rng(100 + seed)
        offset = rng.uniform(-0.04, 0.04) * RS  # "a few % of the symbol rate"
        _, cap = burst("qpsk", n, rng, offset_hz=offset, phase_rad=rng.uniform(0, 2 * np.pi))
        res = qm.analyze(awgn(cap, snr_db, rng), "qpsk", symbol_rate=RS)
        errors.append(float(res.frequency_error_hz) - offset)
    rho = 10 ** (snr_db / 10)
    crb_hz = RS * math.sqrt(6 / (rho * n * (n ** 2 - 1))) / (2 * math.pi)
    assert math.sqrt(np.mean(np.square(errors))) < 1.6 * crb_hz


def test_iq_offset_of_a_known_dc():
    # Common practice: a DC of 0.01 on a unit-power signal is -40 dB carrier leakage and,
    # left in, 1 % EVM.
    rng = np.random.default_rng(5)
    _, cap = burst("16qam", 4000, rng, offset_hz=9e3, phase_rad=-1.0)
    dc = 0.01 * np.exp(0.7j)
    noisy = awgn(cap, 40.0, rng) + np.complex64(dc)
    res = qm.analyze(noisy, "16qam", symbol_rate=RS)
    # the LS fit of the DC has a relative std of ~ (1/sqrt(SNR)) / (0.01 sqrt(N)) = 1.6 %
    # at 40 dB and 4000 symbols: 0.5 dB is > 10 sigma
    assert float(res.iq_offset_db) == pytest.approx(20 * math.log10(0.01), abs=0.5)
    noise_evm = 100 / math.sqrt(1e4)
    assert float(res.evm_rms_percent) == pytest.approx(math.hypot(noise_evm, _isi_floor_percent()), rel=0.1)
    kept = qm.analyze(noisy, "16qam", symbol_rate=RS, remove_iq_offset=False)
    # with the offset left in the errors, the 1 % adds in power (10 % tolerance: the noise
    # term's sampling spread and the floor)
    assert float(kept.evm_rms_percent) == pytest.approx(math.hypot(noise_evm, 1.0), rel=0.1)
    assert kept.attrs["iq_offset_removed"] == "no"
    assert float(kept.iq_offset_db) == pytest.approx(float(res.iq_offset_db), abs=0.5)


def _leaky(level_db, *, scheme="qpsk", n=2000, es_n0_db=25.0, cfo=0.03 * RS, seed=0, lead=0):
    """A burst at a carrier offset of a few % of Rs with a zero-IF receiver's LO leakage:
    a DC of power level_db relative to the mean power of the modulated signal, present over
    the whole capture (also in any silence before and after the burst)."""
    rng = np.random.default_rng(seed)
    bits, cap = burst(scheme, n, rng, offset_hz=cfo, phase_rad=rng.uniform(0, 2 * np.pi),
                      dtype=np.complex128)
    clean = np.concatenate([np.zeros(lead), cap.values, np.zeros(lead)])
    # signal power measured with numpy over the symbols (pulse tails excluded)
    inner = clean[lead + 16 * 4: lead + (16 + n) * 4]
    p_sig = float(np.mean(np.abs(inner) ** 2))
    dc = math.sqrt(p_sig * 10 ** (level_db / 10)) * np.exp(0.7j)
    x = awgn(quadkit.capture(clean, sample_rate=FS, symbol_rate=RS), es_n0_db, rng).values + dc
    return bits, quadkit.capture(x.astype(np.complex64), sample_rate=FS), dc, p_sig


@pytest.mark.parametrize("level_db", [-20.0, -3.0, 0.0, 10.0])
def test_strong_lo_leakage_is_removed(level_db):
    # LO leakage of -20 .. +10 dB relative to the signal, CFO 3 % of Rs, Es/N0 = 25 dB.
    # Left in the M-th power estimate, -3 and 0 dB read EVM ~48 % and +10 dB was refused as
    # an unmodulated carrier. With the offset removed the EVM is that of the noise alone:
    # 1/sqrt(Es/N0) (REFERENCES.md, 3GPP TS 38.104 EVM definition), the truncation floor
    # adding in power; tolerance 4 sigma of the chi-square spread, 1/(2 sqrt N) relative.
    n, es_n0_db = 2000, 25.0
    bits, cap, dc, p_sig = _leaky(level_db, n=n, es_n0_db=es_n0_db)
    assert cap.dtype == np.complex64
    expected = math.hypot(100 / math.sqrt(10 ** (es_n0_db / 10)), _isi_floor_percent())
    tol = 4 / (2 * math.sqrt(n))
    aided = qm.analyze(cap, "qpsk", symbol_rate=RS, reference=bits)
    blind = qm.analyze(cap, "qpsk", symbol_rate=RS)
    for res in (aided, blind):
        assert int(res.symbol_count) >= n - 2
        assert float(res.evm_rms_percent) == pytest.approx(expected, rel=tol)
        # the CRB (Rife & Boorstyn, test above) at 2000 symbols and 25 dB is 0.12 Hz rms
        assert float(res.frequency_error_hz) == pytest.approx(0.03 * RS, abs=2.0)
        # iq_offset_db = 10 log10(|dc|^2 / P_signal) (common practice: DC 0.01 on unit power
        # is -40 dB), P_signal the numpy mean power of the clean burst. The LS fit of the DC
        # has a relative amplitude std of sqrt(N0 / N) / |dc| (per-symbol noise N0 =
        # 1/(Es/N0)): 4 sigma of it in dB, plus 0.1 dB for the conversion of the fitted
        # symbol gain to the capture's power (truncated matched filter, sampled power).
        delta = math.sqrt(10 ** (-es_n0_db / 10) / n) / abs(dc)
        want = 10 * math.log10(abs(dc) ** 2 / p_sig)
        assert want == pytest.approx(level_db, abs=1e-9)
        tol_db = 20 * math.log10(1 + 4 * delta) + 0.1
        assert float(res.iq_offset_db) == pytest.approx(want, abs=tol_db)
    # decisions are right at 25 dB (QPSK symbol error rate ~1e-70), so blind equals aided
    assert float(blind.evm_rms_percent) == pytest.approx(float(aided.evm_rms_percent), rel=1e-6)
    # Left in the errors (remove_iq_offset=False), the offset adds 100 |dc| / sqrt(P) in power
    # to the noise EVM (RRC matched filter gain 1 at 3 % of Rs, inside its flat band); 5 %
    # tolerance covers the noise term's spread where it dominates (-20 dB: 10 % vs 5.6 %).
    kept = qm.analyze(cap, "qpsk", symbol_rate=RS, reference=bits, remove_iq_offset=False)
    assert float(kept.evm_rms_percent) == pytest.approx(
        math.hypot(expected, 100 * abs(dc) / math.sqrt(p_sig)), rel=0.05)


@pytest.mark.parametrize("scheme,level_db", [("16qam", 0.0), ("pi/2-bpsk", 10.0)])
def test_burst_in_silence_with_lo_leakage(scheme, level_db):
    # The leakage fills the silence too: at 0 dB the burst is only 3 dB above it, and at
    # +10 dB 0.4 dB, so burst detection must look at the capture less its mean. The burst
    # is found (symbol count, as in the burst test above), EVM and iq_offset_db as above.
    n, es_n0_db, lead = 1500, 25.0, 12000
    bits, cap, dc, p_sig = _leaky(level_db, scheme=scheme, n=n, es_n0_db=es_n0_db, lead=lead,
                                  seed=3, cfo=-0.04 * RS)
    res = qm.analyze(cap, scheme, symbol_rate=RS, reference=bits)
    assert abs(int(res.symbol_count) - n) <= 2 and "burst found" in res.attrs["burst"]
    expected = math.hypot(100 / math.sqrt(10 ** (es_n0_db / 10)), _isi_floor_percent())
    assert float(res.evm_rms_percent) == pytest.approx(expected, rel=4 / (2 * math.sqrt(n)))
    delta = math.sqrt(10 ** (-es_n0_db / 10) / n) / abs(dc)
    want = 10 * math.log10(abs(dc) ** 2 / p_sig)  # = level_db, by construction
    assert float(res.iq_offset_db) == pytest.approx(want, abs=20 * math.log10(1 + 4 * delta) + 0.1)


def test_a_carrier_behind_strong_leakage_is_still_refused():
    # Removing the origin offset must not make a carrier pass: a tone off centre under a
    # +10 dB DC is still one spectral line of the corrected symbols, ...
    cw = _cw(7e3)
    dc = np.complex64(0.5 * math.sqrt(10) * np.exp(0.3j))  # tone amplitude 0.5: +10 dB
    with pytest.raises(quadkit.MeasurementError,
                       match="no qpsk modulation found: the signal is an unmodulated carrier"):
        qm.analyze(cw + dc, "qpsk", symbol_rate=RS_CW)
    # ... and leakage with noise alone (nothing modulated once the offset is removed) is a
    # carrier at the centre: refused as such, not measured as modulation.
    noise_only = quadkit.synth.noise(sample_rate=4 * RS_CW, n_samples=8000, power_dbfs=-40, rng=2)
    with pytest.raises(quadkit.MeasurementError, match="unmodulated carrier .one tone at 0 Hz"):
        qm.analyze(noise_only + dc, "qpsk", symbol_rate=RS_CW)


def test_phase_and_magnitude_error_of_a_known_rotation_free_distortion():
    # A residual phase error: a sinusoidal phase modulation of amplitude 2 deg at 1/50 of the
    # symbol rate (too fast for the fitted linear phase) has rms 2/sqrt(2) deg. Memoryless
    # AM of 3 % rms by the same argument has rms magnitude error 3 % on constant-modulus QPSK.
    rng = np.random.default_rng(6)
    _, cap = burst("qpsk", 4000, rng, fs=8 * RS)
    t = np.arange(cap.sizes["time"]) / (8 * RS)
    ph = np.deg2rad(2.0) * np.sin(2 * np.pi * RS / 50 * t)
    am = 1 + 0.03 * math.sqrt(2) * np.sin(2 * np.pi * RS / 37 * t)
    dist = quadkit.capture((cap.values * np.exp(1j * ph) * am).astype(np.complex64), sample_rate=8 * RS)
    res = qm.analyze(dist, "qpsk", symbol_rate=RS)
    # the matched filter averages over ~1 symbol: at 1/50 and 1/37 of Rs the modulation passes
    # with < 0.3 % loss; the sampling of a sinusoid by 4000 symbols adds ~1 %: 5 % tolerance
    assert float(res.phase_error_rms_deg) == pytest.approx(2 / math.sqrt(2), rel=0.05)
    assert float(res.magnitude_error_rms_percent) == pytest.approx(3.0, rel=0.05)


# ------------------------------------------------------------------ analyze: structure

def test_multichannel_equals_per_channel():
    rng = np.random.default_rng(7)
    _, a = burst("16qam", 800, rng, offset_hz=11e3)
    _, b = burst("16qam", 800, rng, offset_hz=-25e3, phase_rad=1.0)
    a, b = awgn(a, 25, rng), awgn(b, 30, rng)
    two = quadkit.capture(np.stack([a.values, b.values]), sample_rate=FS)
    res = qm.analyze(two, "16qam", symbol_rate=RS)
    assert res.evm_rms_percent.dims == ("channel",) and res.measured_symbol.dims == ("channel", "symbol")
    for ch, single in enumerate((a, b)):
        one = qm.analyze(single, "16qam", symbol_rate=RS)
        for name in one.data_vars:
            got = res[name].isel(channel=ch).values
            want = one[name].values
            if "symbol" in one[name].dims:
                got = got[: want.size]
            np.testing.assert_allclose(got, want, rtol=1e-9, atol=1e-12, err_msg=name)


def test_lazy_capture_gives_the_same_result():
    rng = np.random.default_rng(8)
    _, cap = burst("qpsk", 500, rng, offset_hz=5e3)
    cap = awgn(cap, 25, rng)
    n = cap.sizes["time"]
    cuts = np.sort(rng.choice(np.arange(1, n - 10), 5, replace=False))
    chunks = tuple(np.diff(np.concatenate([[0], cuts, [n]])).tolist())  # random, short last
    lazy = quadkit.capture(da.from_array(cap.values, chunks=(chunks,)), sample_rate=FS)
    want = qm.analyze(cap, "qpsk", symbol_rate=RS)
    got = qm.analyze(lazy, "qpsk", symbol_rate=RS)
    xr.testing.assert_allclose(got, want)


def test_accessor_json_and_per_symbol_variables():
    rng = np.random.default_rng(9)
    _, cap = burst("qpsk", 200, rng)
    res = cap.qk.analyze("qpsk", symbol_rate=RS)
    assert set(res.data_vars) >= {
        "evm_rms_percent", "evm_peak_percent", "mer_db", "frequency_error_hz", "iq_offset_db",
        "phase_error_rms_deg", "magnitude_error_rms_percent", "measured_symbol", "ideal_symbol",
        "symbol_evm_percent"}
    assert res.measured_symbol.dims == ("symbol",) and res.measured_symbol.dtype == np.complex128
    assert float(res.evm_peak_percent) >= float(res.evm_rms_percent)
    # the symbol instants are one symbol period apart
    np.testing.assert_allclose(np.diff(res.symbol_time_s.values), 1 / RS, rtol=1e-9)
    json.dumps(quadkit.to_json(res))


@settings(max_examples=8, deadline=None)
@given(scheme=st.sampled_from(qm.SCHEMES), sps=st.sampled_from([2.0, 3.0, 4.7, 8.0]),
       seed=st.integers(0, 2 ** 16))
def test_round_trip_symbols(scheme, sps, seed):
    # modulate then analyze blind returns the transmitted symbols, up to the constellation's
    # rotational symmetry (k * 90 deg, 180 deg for BPSK) and a shift of the first symbol.
    rng = np.random.default_rng(seed)
    k = qm.constellation(scheme).attrs["bits_per_symbol"]
    bits = rng.integers(0, 2, k * 300)
    cap = qm.modulate(bits, scheme, symbol_rate=RS, sample_rate=sps * RS, power_dbfs=0,
                      offset_hz=rng.uniform(-0.03, 0.03) * RS, phase_rad=rng.uniform(0, 6.3))
    res = qm.analyze(cap, scheme, symbol_rate=RS)
    dec = res.ideal_symbol.values
    sent = qm._as_symbols("test", bits, scheme)  # the 38.211 mapping tested above
    best = 0
    for lag in range(0, sent.size - dec.size + 1):
        seg = sent[lag: lag + dec.size]
        for r in (1, 1j, -1, -1j):
            best = max(best, int(np.sum(np.abs(seg * r - dec) < 1e-9)))
    assert best == dec.size >= 296
    # a noiseless signal: only the truncation floor (0.1 %; 2 samples per symbol aliases
    # the pulse's skirts a little, hence 0.5 %)
    assert float(res.evm_rms_percent) < 0.5


# ------------------------------------------------------------------ analyze: errors

def test_measurement_errors():
    rng = np.random.default_rng(11)
    _, cap = burst("qpsk", 100, rng)
    with pytest.raises(quadkit.MeasurementError, match="not below the sample rate"):
        qm.analyze(cap, "qpsk", symbol_rate=FS)
    _, short = burst("qpsk", 10, rng)
    with pytest.raises(quadkit.MeasurementError, match="symbols"):
        qm.analyze(short, "qpsk", symbol_rate=RS)
    zeros = quadkit.capture(np.zeros(4000, np.complex64), sample_rate=FS)
    with pytest.raises(quadkit.MeasurementError, match="no signal"):
        qm.analyze(zeros, "qpsk", symbol_rate=RS)
    noise = quadkit.synth.noise(sample_rate=FS, n_samples=8000, rng=1)
    with pytest.raises(quadkit.MeasurementError, match="no qpsk signal found"):
        qm.analyze(noise, "qpsk", symbol_rate=RS)
    with pytest.raises(ValueError, match="scheme="):
        qm.analyze(cap, "qam", symbol_rate=RS)


@pytest.mark.parametrize("scheme", qm.SCHEMES)
def test_fast_slicers_equal_nearest_point(scheme):
    # the per-axis slicers against brute-force nearest-point search (numpy argmin)
    rng = np.random.default_rng(13)
    pts = qm._points(scheme)
    y = (rng.standard_normal(5000) + 1j * rng.standard_normal(5000)) * 0.8
    brute = pts[np.argmin(np.abs(y[:, None] - pts[None, :]), axis=1)]
    np.testing.assert_allclose(qm._decide(y, pts, scheme), brute, atol=1e-12)


def test_reference_aligned_to_a_capture_cut_inside_the_burst():
    # The capture starts 600 symbols into a 2000-symbol burst (and runs to its end): the
    # reference (all transmitted bits) is aligned by cross-correlation and only the overlap is
    # analysed; EVM = 1/sqrt(SNR) as in the AWGN test above.
    rng = np.random.default_rng(14)
    bits, cap = burst("qpsk", 2000, rng, offset_hz=8e3, phase_rad=0.9)
    cut = cap.isel(time=slice(int((16 + 600) * 4), None))
    noisy = awgn(quadkit.capture(cut.values, sample_rate=FS, symbol_rate=RS), 25.0, rng)
    res = qm.analyze(noisy, "qpsk", symbol_rate=RS, reference=bits)
    # 1400 symbols remain, less the 8 symbols kept clear of the capture's first edge
    assert 1400 - 10 <= int(res.symbol_count) <= 1400
    tol = 4 / (2 * math.sqrt(int(res.symbol_count)))
    expected = math.hypot(100 / math.sqrt(10 ** 2.5), _isi_floor_percent())
    assert float(res.evm_rms_percent) == pytest.approx(expected, rel=tol)
    # the ideal symbols are the transmitted ones (up to the carrier phase ambiguity, removed
    # by the alignment): compare with the 38.211 mapping of the last symbol_count symbols
    sent = qm._as_symbols("test", bits, "qpsk")
    np.testing.assert_allclose(res.ideal_symbol.values, sent[-int(res.symbol_count):], atol=1e-12)


def test_symbol_clock_error_is_tracked():
    # A transmitter whose symbol clock runs 100 ppm fast: over 3000 symbols the timing drifts
    # by 0.3 T, which fixed timing would turn into ~10 % EVM. The fitted drift recovers the
    # clock error; its std from 23 blocks of 128 symbols with ~0.01 T timing noise each is
    # ~0.01 * sqrt(12 / 23) / 3000 = 2.4 ppm, so 10 ppm is 4 sigma; the EVM is then that of
    # the noise (AWGN reference, tolerance as above plus 5 % for the residual timing jitter).
    rng = np.random.default_rng(15)
    k, n = 4, 3000
    bits = rng.integers(0, 2, k * n)
    cap = qm.modulate(bits, "16qam", symbol_rate=RS * (1 + 100e-6), sample_rate=FS,
                      power_dbfs=0, offset_hz=12e3)
    noisy = awgn(quadkit.capture(cap.values, sample_rate=FS, symbol_rate=RS), 25.0, rng)
    res = qm.analyze(noisy, "16qam", symbol_rate=RS, reference=bits)
    assert float(res.symbol_rate_error_ppm) == pytest.approx(100.0, abs=10.0)
    expected = math.hypot(100 / math.sqrt(10 ** 2.5), _isi_floor_percent())
    assert float(res.evm_rms_percent) == pytest.approx(expected, rel=4 / (2 * math.sqrt(n)) + 0.05)
    # and without a clock error no drift is reported (the 4-sigma significance test)
    _, plain = burst("16qam", n, rng)
    assert float(qm.analyze(plain, "16qam", symbol_rate=RS).symbol_rate_error_ppm) == 0.0


# ------------------------------------------------------------------ analyze: no modulation

def _cw(offset_hz, *, n_samples=8000, snr_db=40.0, rng=1):
    """A carrier sampled at four samples per symbol of RS_CW (the reviewer's set-up, shorter)."""
    tone = quadkit.synth.tone(offset_hz, sample_rate=4 * RS_CW, n_samples=n_samples, amplitude=0.5)
    return quadkit.synth.add_noise(tone, snr_db=snr_db, rng=rng)


RS_CW = 1e5


@pytest.mark.parametrize("scheme,offset", [
    (s, o) for s in ("qpsk", "16qam", "64qam", "bpsk", "pi/2-bpsk") for o in (0.0, 0.07, 0.25)
    # BPSK at Rs/4 and pi/2-BPSK at 0 and 0.07 Rs have no 2nd-power line: the carrier-line
    # detector refuses them before (test_measurement_errors covers that refusal)
    if (s, o) not in {("bpsk", 0.25), ("pi/2-bpsk", 0.0), ("pi/2-bpsk", 0.07)}])
def test_an_unmodulated_carrier_is_refused(scheme, offset):
    # A carrier at the centre decides to one point; at Rs/4 (where the 4th-power line
    # aliases to 0) to points stepping 90 deg per symbol; 0.07 Rs is an arbitrary offset.
    # Each was measured as EVM < 0.5 % before.
    with pytest.raises(quadkit.MeasurementError, match=f"no {scheme} modulation found: the signal is an unmodulated carrier"):
        qm.analyze(_cw(offset * RS_CW), scheme, symbol_rate=RS_CW)


def test_the_refusal_names_the_carrier_and_the_points_used():
    with pytest.raises(quadkit.MeasurementError, match=r"one tone at 7000 Hz.*use 1 of the 4 qpsk points"):
        qm.analyze(_cw(7e3), "qpsk", symbol_rate=RS_CW)
    with pytest.raises(quadkit.MeasurementError, match=r"one tone at 25000 Hz.*use 4 of the 16 16qam points"):
        qm.analyze(_cw(25e3), "16qam", symbol_rate=RS_CW)


def test_the_demo_cw_capture_is_refused_as_qpsk():
    # demo_data/bench_tone: a synthesiser tone at +125 kHz (outside the RRC band of 100 kBd)
    # plus the receiver's DC leakage, which is the carrier found in band.
    from pathlib import Path

    cap = quadkit.io.read(Path(__file__).resolve().parents[1] / "demo_data" / "bench_tone.sigmf-meta")
    with pytest.raises(quadkit.MeasurementError, match="no qpsk modulation found"):
        qm.analyze(cap.isel(time=slice(0, 100_000)), "qpsk", symbol_rate=1e5)


@pytest.mark.parametrize("scheme", qm.SCHEMES)
def test_short_random_bursts_are_not_refused(scheme):
    # Real traffic of 20 to 40 symbols (random bits) at 25 dB, silence around: the limit
    # leaves random data a refusal probability of ~1e-6 each (Gaussian approximation), so
    # none of these 24 bursts per scheme may be refused. A fixed limit below ~0.8 for BPSK
    # at 20 symbols (or ~0.6 for QPSK) would refuse some of them (empirical 99.9 % quantiles).
    rng = np.random.default_rng(21)
    k = qm.constellation(scheme).attrs["bits_per_symbol"]
    for n in (20, 24, 40) * 8:
        bits = rng.integers(0, 2, k * n)
        cap = qm.modulate(bits, scheme, symbol_rate=RS, sample_rate=FS, power_dbfs=0,
                          offset_hz=rng.uniform(-2e4, 2e4), phase_rad=rng.uniform(0, 6.3))
        x = np.concatenate([np.zeros(400, np.complex64), cap.values, np.zeros(400, np.complex64)])
        noisy = awgn(quadkit.capture(x, sample_rate=FS, symbol_rate=RS), 25.0, rng)
        try:
            qm.analyze(noisy, scheme, symbol_rate=RS)
        except quadkit.MeasurementError as err:  # other refusals (too short) are not at issue
            assert "modulation found" not in str(err) and "IQ origin" not in str(err), (n, str(err))


def test_line_limit_is_the_beta_tail():
    # One DFT bin of N white complex Gaussian samples holds a Beta(1, N-1) fraction of their
    # power, P(> x) = (1 - x)^(N-1) (chi-square(2) over chi-square(2N), textbook): the limit
    # solves 4N (1 - x)^(N-1) = 1e-6, floored at 1/2. Real-axis symbols: Beta(1/2, (N-1)/2),
    # checked with scipy.stats.beta against a numerical tail integral (scipy.integrate.quad).
    import scipy.integrate
    import scipy.special

    for n in (16, 20, 27, 28, 100):
        assert qm._line_limit(n, False) == pytest.approx(max(0.5, 1 - (1e-6 / (4 * n)) ** (1 / (n - 1))), rel=1e-9)
    for n in (16, 32):
        x = qm._line_limit(n, True)
        a, b = 0.5, (n - 1) / 2
        tail, _ = scipy.integrate.quad(lambda t: t ** (a - 1) * (1 - t) ** (b - 1), x, 1, epsabs=1e-16, epsrel=1e-10)
        assert tail / scipy.special.beta(a, b) == pytest.approx(1e-6 / (4 * n), rel=1e-5)


def test_line_fraction_against_a_padded_fft():
    # numpy reference: the largest bin of a 64x zero-padded periodogram, over the power.
    rng = np.random.default_rng(22)
    k = np.arange(300)
    tone = 0.7 * np.exp(1j * (2 * np.pi * 0.1234 * k + 0.4))
    rho, f = qm._line_fraction(tone)
    assert rho == pytest.approx(1.0, abs=1e-9) and f == pytest.approx(0.1234, abs=1e-9)
    y = qm._points("16qam")[rng.integers(0, 16, 300)]
    spec = np.abs(np.fft.fft(y, 64 * y.size)) ** 2 / y.size ** 2
    # the padded grid lies within 1/128 bin of the maximum: it under-reads by < 0.1 %
    assert qm._line_fraction(y)[0] == pytest.approx(spec.max() / np.mean(np.abs(y) ** 2), rel=1e-3)


def test_a_carrier_reference_measures_a_carrier():
    # A reference of all-zero bits is a constant symbol: the transmitter was meant to send a
    # carrier, so an off-centre carrier is measured data-aided, with the AWGN EVM
    # 1/sqrt(Es/N0) (REFERENCES.md); Es/N0 = SNR x 4 samples per symbol (matched filter keeps
    # 1/4 of the white noise, common practice). Tolerance: 4 sigma of the chi-square spread.
    cap = _cw(7e3)
    res = qm.analyze(cap, "qpsk", symbol_rate=RS_CW, reference=np.zeros(2 * 4000, int))
    expected = 100 / math.sqrt(10 ** 4.0 * 4)
    assert float(res.evm_rms_percent) == pytest.approx(expected, rel=4 / (2 * math.sqrt(int(res.symbol_count))))
    # ... but a carrier at the centre cannot be told from an IQ origin offset
    with pytest.raises(quadkit.MeasurementError, match="cannot be told from an IQ origin offset"):
        qm.analyze(_cw(0.0), "qpsk", symbol_rate=RS_CW, reference=np.zeros(2 * 4000, int))
    # and a modulated reference does not make a carrier pass
    bits = np.random.default_rng(23).integers(0, 2, 2 * 4000)
    with pytest.raises(quadkit.MeasurementError, match="no qpsk modulation found"):
        qm.analyze(cap, "qpsk", symbol_rate=RS_CW, reference=bits)
