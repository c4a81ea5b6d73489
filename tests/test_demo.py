"""The bundled demo captures: `inspect --json` must find what was put in (the truth metadata)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from quadkit import io
from quadkit.demo import DEMO_FILES, make_demo, truth

DEMO = Path(__file__).resolve().parents[1] / "demo_data"


def inspect_json(name: str, *extra: str) -> dict:
    r = subprocess.run([sys.executable, "-m", "quadkit.cli", "inspect",
                        str(DEMO / f"{name}.sigmf-meta"), "--json", *extra],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


def mu2_db(gain_db: float, skew_deg: float) -> float:
    """Power gain of the direct (non-image) term of the imbalance model, 10 log10 |mu|^2.

    Widely-linear form y = mu x + nu x*, mu = (1 + g e^{-j phi}) / 2 (Tarighat et al. 2005;
    Anttila et al. 2008, memory), for the model of DESIGN.md.
    """
    g, phi = 10 ** (gain_db / 20), np.radians(skew_deg)
    return 10 * np.log10(abs((1 + g * np.exp(-1j * phi)) / 2) ** 2)


def test_demo_data_is_small_and_complete():
    files = list(DEMO.iterdir())
    assert sum(f.stat().st_size for f in files) < 20 * 2**20  # the brief's budget
    for name in DEMO_FILES:
        assert (DEMO / f"{name}.sigmf-meta").exists() and (DEMO / f"{name}.sigmf-data").exists()


def test_bench_tone_figures_match_truth():
    t = truth(io.read(DEMO / "bench_tone.sigmf-meta"))
    s = inspect_json("bench_tone")
    # DC within 1e-3 of full scale, gain 0.03 dB, phase 0.1 deg: the accuracy the impairment
    # issue asks of the estimator
    assert s["dc_i"] == pytest.approx(t["dc_i"], abs=1e-3)
    assert s["dc_q"] == pytest.approx(t["dc_q"], abs=1e-3)
    assert s["gain_imbalance_db"] == pytest.approx(t["gain_imbalance_db"], abs=0.03)
    assert s["phase_skew_deg"] == pytest.approx(t["phase_skew_deg"], abs=0.1)
    assert s["image_rejection_db"] == pytest.approx(t["image_rejection_db"], abs=0.3)
    tones = {round(x["offset_hz"]): x for x in s["tones"]}
    main = min(s["tones"], key=lambda x: abs(x["offset_hz"] - t["tone_offset_hz"]))
    assert main["frequency_hz"] == pytest.approx(t["tone_frequency_hz"], abs=1.0)
    # the front end scales the wanted term by |mu|^2; 0.1 dB covers ci16 quantisation and
    # the peak interpolation of the spectrum
    gain = mu2_db(t["gain_imbalance_db"], t["phase_skew_deg"])
    assert main["power_dbfs"] == pytest.approx(t["tone_power_dbfs"] + gain, abs=0.1)
    # the image sits IRR below the tone, mirrored about 0 Hz
    image = min(s["tones"], key=lambda x: abs(x["offset_hz"] + t["tone_offset_hz"]))
    assert main["power_dbfs"] - image["power_dbfs"] == pytest.approx(t["image_rejection_db"], abs=0.3)
    spur = min(s["tones"], key=lambda x: abs(x["offset_hz"] - t["spur_offset_hz"]))
    assert spur["offset_hz"] == pytest.approx(t["spur_offset_hz"], abs=5)
    assert spur["power_dbfs"] == pytest.approx(t["spur_power_dbfs"] + gain, abs=0.5)
    # white noise through the imbalance: each branch's power adds, (1 + g^2)/2 overall
    g2 = 10 ** (t["gain_imbalance_db"] / 10)
    assert s["noise_floor_dbfs_hz"] == pytest.approx(
        t["noise_density_dbfs_hz"] + 10 * np.log10((1 + g2) / 2), abs=1.0)
    assert any("IQ imbalance" in w for w in s["warnings"])


def test_bench_tone_phase_noise_matches_profile():
    from quadkit import impairments

    cap = io.read(DEMO / "bench_tone.sigmf-meta")
    t = truth(cap)
    # offsets that fit on both sides of the +125 kHz tone inside the +-500 kHz band
    offsets = [f for f in t["phase_noise_offsets_hz"] if f <= 100e3]
    profile = np.asarray(t["phase_noise_dbc_hz"][: len(offsets)])
    pn = impairments.phase_noise(cap, offsets_hz=offsets)
    got = np.asarray(pn["phase_noise_dbc_hz"].values, dtype=float)
    # Additive white noise puts half its power in phase: -120 dBFS/Hz against a -6 dBFS
    # carrier is -114 dBc/Hz, -117 dBc/Hz of it as phase, 12 dB under the 100 kHz point,
    # so it lifts that point by 10 log10(1 + 10^-1.2) = 0.27 dB; the issue asks for 1 dB.
    floor = t["noise_density_dbfs_hz"] - t["tone_power_dbfs"] - 10 * np.log10(2)
    expected = 10 * np.log10(10 ** (profile / 10) + 10 ** (floor / 10))
    np.testing.assert_allclose(got, expected, atol=1.0)


def test_qpsk_burst_modulation_matches_truth():
    t = truth(io.read(DEMO / "qpsk_burst.sigmf-meta"))
    s = inspect_json("qpsk_burst", "--scheme", "qpsk", "--symbol-rate", str(t["symbol_rate_hz"]))
    m = s["modulation"]
    # frequency error: the estimator's spread on 1200 symbols at 26 dB is a few Hz
    assert m["frequency_error_hz"] == pytest.approx(t["frequency_offset_hz"], abs=20)
    # EVM under AWGN = 1/sqrt(Es/N0) (TS 38.104 EVM definition; REFERENCES.md); 1200 symbols
    # give a relative spread of about 1/sqrt(2*1200) = 2 %, so 10 % is generous and still tight
    assert m["evm_rms_percent"] == pytest.approx(t["expected_evm_rms_percent"], rel=0.1)
    assert m["mer_db"] == pytest.approx(t["es_n0_db"], abs=0.8)


def test_real_if_tones_match_truth():
    t = truth(io.read(DEMO / "real_if.sigmf-meta"))
    s = inspect_json("real_if")
    main = min(s["tones"], key=lambda x: abs(x["frequency_hz"] - t["tone_frequency_hz"]))
    assert main["frequency_hz"] == pytest.approx(t["tone_frequency_hz"], abs=1.0)
    # a real sine of amplitude A has power A^2/2 (DESIGN: full-scale real sine is -3.01 dBFS)
    assert main["power_dbfs"] == pytest.approx(10 * np.log10(t["tone_amplitude"] ** 2 / 2), abs=0.1)
    side = min(s["tones"], key=lambda x: abs(x["frequency_hz"] - t["second_tone_frequency_hz"]))
    assert side["power_dbfs"] == pytest.approx(
        10 * np.log10(t["second_tone_amplitude"] ** 2 / 2), abs=0.2)


def test_band_survey_carriers_match_truth():
    from quadkit import spectral

    cap = io.read(DEMO / "band_survey.sigmf-meta")
    t = truth(cap)
    assert [a["label"] for a in cap.attrs["annotations"]] == [c["label"] for c in t["carriers"]]
    spec = spectral.psd(cap, rbw_hz=1e3)
    for c in t["carriers"]:
        if c["kind"] == "tone":
            s = inspect_json("band_survey")
            beacon = min(s["tones"], key=lambda x: abs(x["frequency_hz"] - c["frequency_hz"]))
            assert beacon["frequency_hz"] == pytest.approx(c["frequency_hz"], abs=1.0)
            assert beacon["power_dbfs"] == pytest.approx(c["power_dbfs"], abs=0.1)
            continue
        width = c["width_hz"] * (1.35 if c["kind"] == "qpsk" else 1.0)
        p = spectral.channel_power(spec, frequency_hz=c["frequency_hz"], bandwidth_hz=width * 1.1)
        # band power of a carrier of known power; 0.3 dB covers the Welch variance at this RBW
        assert float(p["channel_power_dbfs"]) == pytest.approx(c["power_dbfs"], abs=0.3)


def test_demo_files_are_reproducible_from_the_script(tmp_path):
    # The committed files are what the generator writes with its fixed seed.
    # Another numpy build may round an FFT differently in the last bit, which can move a
    # sample by one 16-bit code: allow one code, on a tiny share of the samples.
    lsb = 1 / 32768
    for name in DEMO_FILES:
        cap = make_demo(name)
        kind = "ri16_le" if cap.dtype.kind == "f" else "ci16_le"
        io.write_sigmf(cap, tmp_path / f"{name}.sigmf-meta", dtype=kind)
        fresh = io.read(tmp_path / f"{name}.sigmf-meta").values
        committed = io.read(DEMO / f"{name}.sigmf-meta").values
        diff = np.abs(np.asarray(fresh, np.complex128) - committed)
        assert diff.max() <= lsb * 1.5, name
        assert np.mean(diff > 0) < 1e-3, name
