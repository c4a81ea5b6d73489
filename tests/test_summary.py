"""quadkit.summarize: the figures behind `quadkit inspect`."""

from __future__ import annotations

import json

import dask.array as da
import numpy as np
import pytest

import quadkit
from quadkit import synth
from quadkit.testing import assert_units

# The keys of `inspect --json`, fixed by DESIGN.md.
INSPECT_KEYS = {
    "samples", "sample_rate_hz", "center_frequency_hz", "duration_s", "mean_power_dbfs",
    "peak_power_dbfs", "crest_factor_db", "clipped_fraction", "dc_i", "dc_q",
    "gain_imbalance_db", "phase_skew_deg", "image_rejection_db", "noise_floor_dbfs_hz",
    "occupied_bandwidth_hz", "tones", "warnings",
}


def _tone_capture(n=2**16, amp=0.5, snr_db=50, **kw):
    cap = synth.tone(100e3, sample_rate=1e6, n_samples=n, amplitude=amp,
                     center_frequency=433.92e6, **kw)
    return synth.add_noise(cap, snr_db=snr_db, rng=1)


def test_json_keys_and_basic_figures():
    cap = _tone_capture()
    s = quadkit.summarize(cap)
    assert_units(s)
    out = quadkit.to_json(s)
    json.dumps(out, allow_nan=False)
    assert set(out) == INSPECT_KEYS
    assert out["samples"] == 2**16
    assert out["duration_s"] == pytest.approx(2**16 / 1e6)
    # tone of amplitude A: 20 log10 A dBFS (DESIGN power convention); noise 50 dB down
    assert out["mean_power_dbfs"] == pytest.approx(20 * np.log10(0.5), abs=0.01)
    # a constant-envelope tone has crest factor 0 dB; noise at -50 dBc raises the peak by
    # at most 20 log10(1 + sqrt(2)*10^(-50/20)*~4.5) ~ 0.1 dB (Gaussian tail over 65k samples)
    assert 0 <= out["crest_factor_db"] < 0.15
    assert out["clipped_fraction"] == 0
    assert out["tones"][0]["offset_hz"] == pytest.approx(100e3, abs=20)
    assert out["tones"][0]["frequency_hz"] == pytest.approx(433.92e6 + 100e3, abs=20)
    assert out["tones"][0]["power_dbfs"] == pytest.approx(20 * np.log10(0.5), abs=0.2)
    assert out["warnings"] == []


def test_noise_crest_factor_and_floor():
    # complex Gaussian noise: |x|^2 is exponential, so the peak over N samples is about
    # ln(N) times the mean (order statistics of the exponential law; common practice)
    n = 2**16
    cap = synth.noise(sample_rate=2e6, n_samples=n, power_dbfs=-30, rng=2)
    s = quadkit.summarize(cap)
    assert float(s.crest_factor_db) == pytest.approx(10 * np.log10(np.log(n)), abs=1.5)
    # white noise of power P over fs: density P/fs (definition of a flat PSD)
    assert float(s.noise_floor_dbfs_hz) == pytest.approx(-30 - 10 * np.log10(2e6), abs=0.5)


def test_clipping_is_counted_and_warned():
    cap = synth.tone(10e3, sample_rate=1e6, n_samples=10000, amplitude=1.3)
    x = cap.values.copy()
    x = np.clip(x.real, -1, 1) + 1j * np.clip(x.imag, -1, 1)
    cap = cap.copy(data=x.astype(np.complex64))
    s = quadkit.summarize(cap)
    frac = np.mean((np.abs(x.real) >= 0.999) | (np.abs(x.imag) >= 0.999))
    assert float(s.clipped_fraction) == pytest.approx(frac)
    assert any("clipping" in w for w in s.attrs["warnings"])
    assert "overdriven" in s.attrs["warnings"][0]  # the most serious warning comes first


def test_real_capture_has_no_iq_figures():
    # 160 whole periods, so the mean of cos^2 is exactly 1/2
    cap = synth.tone(1e6 * 160 / 2**14, sample_rate=1e6, n_samples=2**14, real=True)
    out = quadkit.to_json(quadkit.summarize(cap))
    assert out["dc_i"] is None and out["image_rejection_db"] is None
    assert any("real-valued" in w for w in out["warnings"])
    # a real full-scale sine is -3.01 dBFS (DESIGN power convention)
    assert out["mean_power_dbfs"] == pytest.approx(10 * np.log10(0.5), abs=1e-3)


def test_multichannel_equals_per_channel():
    a = _tone_capture(n=2**14)
    b = _tone_capture(n=2**14, amp=0.1)
    both = quadkit.capture(np.stack([a.values, b.values]), sample_rate=1e6,
                           center_frequency=433.92e6)
    s = quadkit.summarize(both)
    for ch, one in enumerate((a, b)):
        s1 = quadkit.summarize(one)
        for name in ("mean_power_dbfs", "peak_power_dbfs", "noise_floor_dbfs_hz"):
            assert float(s[name][ch]) == pytest.approx(float(s1[name]), abs=1e-6)
        tones = [t for t in quadkit.to_json(s)["tones"] if t["channel"] == ch]
        alone = quadkit.to_json(s1)["tones"]
        assert [t["offset_hz"] for t in tones] == pytest.approx([t["offset_hz"] for t in alone])


def test_lazy_equals_eager():
    cap = _tone_capture(n=2**15)
    lazy = cap.copy(data=da.from_array(cap.values, chunks=7000))
    e = quadkit.to_json(quadkit.summarize(cap))
    z = quadkit.to_json(quadkit.summarize(lazy))
    for key in ("mean_power_dbfs", "peak_power_dbfs", "clipped_fraction", "dc_i",
                "gain_imbalance_db", "noise_floor_dbfs_hz"):
        assert z[key] == pytest.approx(e[key], rel=1e-5, abs=1e-9)


def test_scheme_needs_symbol_rate():
    cap = _tone_capture(n=4096)
    with pytest.raises(ValueError, match="symbol_rate"):
        quadkit.summarize(cap, scheme="qpsk")


def test_too_few_samples_warns():
    cap = _tone_capture(n=512)
    s = quadkit.summarize(cap)
    assert any("only 512 samples" in w for w in s.attrs["warnings"])


def test_imbalance_and_dc_are_reported_and_warned():
    from quadkit import impairments

    cap = synth.noise(sample_rate=1e6, n_samples=2**18, power_dbfs=-10, bandwidth_hz=800e3, rng=4)
    bad = impairments.apply(cap, gain_imbalance_db=1.0, phase_skew_deg=5.0, dc_i=0.05, dc_q=-0.03)
    s = quadkit.to_json(quadkit.summarize(bad))
    assert s["gain_imbalance_db"] == pytest.approx(1.0, abs=0.05)
    assert s["phase_skew_deg"] == pytest.approx(5.0, abs=0.2)
    assert s["dc_i"] == pytest.approx(0.05, abs=2e-3)
    assert s["dc_q"] == pytest.approx(-0.03, abs=2e-3)
    # Razavi's image rejection formula (DESIGN.md), recomputed here
    g, ph = 10 ** (1.0 / 20), np.radians(5.0)
    irr = 10 * np.log10((1 + 2 * g * np.cos(ph) + g**2) / (1 - 2 * g * np.cos(ph) + g**2))
    assert s["image_rejection_db"] == pytest.approx(irr, abs=0.5)
    assert any(w.startswith("IQ imbalance") for w in s["warnings"])
    # DC power 0.05^2 + 0.03^2 against 0.1 total: -15.3 dBc, above the -30 dBc level
    assert any(w.startswith("DC spike") for w in s["warnings"])


def test_non_finite_samples_are_named_first():
    x = np.ones(8192, np.complex64) * 0.1
    x[1000] = np.nan
    x[2000] = np.inf
    s = quadkit.summarize(quadkit.capture(x, sample_rate=1e6))
    assert s.attrs["warnings"][0].startswith("2 non-finite samples (NaN or Inf)")
    assert "sample 1000" in s.attrs["warnings"][0]


def test_summary_prints_nothing_on_an_all_zero_capture(recwarn):
    s = quadkit.summarize(quadkit.capture(np.zeros(8192, np.complex64), sample_rate=1e6))
    assert "all zeros" in s.attrs["warnings"][0]
    assert not [w for w in recwarn if issubclass(w.category, RuntimeWarning)]
    json.dumps(quadkit.to_json(s), allow_nan=False)


def test_failed_modulation_keeps_the_keys_and_bad_rates_are_refused():
    cap = _tone_capture(n=8192)
    # pure noise has no symbols to find: the keys of DESIGN.md are there, as null
    noise = synth.noise(sample_rate=1e6, n_samples=8192, rng=3)
    out = quadkit.to_json(quadkit.summarize(noise, scheme="qpsk", symbol_rate=100e3))
    assert set(out["modulation"]) >= {"evm_rms_percent", "evm_peak_percent", "mer_db",
                                      "frequency_error_hz", "iq_offset_db",
                                      "phase_error_rms_deg", "magnitude_error_rms_percent"}
    assert out["modulation"]["evm_rms_percent"] is None
    assert any(w.startswith("modulation: not measured") for w in out["warnings"])
    with pytest.raises(ValueError, match="below the sample rate"):
        quadkit.summarize(cap, scheme="qpsk", symbol_rate=2e6)


def test_summarize_is_the_documented_function():
    import inspect

    assert "scheme" in inspect.signature(quadkit.summarize).parameters


def test_bursts_are_called_bursty_and_steady_signals_are_not():
    steady = _tone_capture(n=2**16)
    assert not any(w.startswith("bursty") for w in quadkit.summarize(steady).attrs["warnings"])
    noise = synth.noise(sample_rate=1e6, n_samples=2**16, power_dbfs=-20, rng=5).values
    x = noise.copy()
    x[2**14: 2**15] *= 10  # a burst 20 dB up in a quarter of the capture
    s = quadkit.summarize(quadkit.capture(x, sample_rate=1e6))
    (w,) = [w for w in s.attrs["warnings"] if w.startswith("bursty")]
    # 64 blocks of 1024 samples: each block's power is within ~1/sqrt(1024) (about 0.14 dB)
    # of its true value, so the swing reads 20 dB within a few tenths
    assert float(w.split("by ")[1].split(" dB")[0]) == pytest.approx(20.0, abs=0.8)
