"""The demo captures: four SigMF recordings from our own (invented) receiver bench.

``quadkit demo DIR`` and ``python scripts/make_demo_data.py`` write them with a fixed seed.
Each records the true values it was made with under the ``truth`` namespace of its SigMF
global object (``truth:gain_imbalance_db`` and so on; :func:`truth` reads them back), so
what quadkit measures can be set beside what was put in. The scenarios are made up for the demo: the "RX-7" zero-IF receiver board under bring-up on
bench 3, a test transmitter, an IF strip and a band survey.

Caution: these are synthetic recordings for analysis. If you replay a generated waveform through
a transmitter, respect your local radio regulations and licensed practice, work on a cabled
set-up with attenuators, and stay within the receiver's input power limits.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from . import _capture, synth

__all__ = ["DEMO_FILES", "make_demo", "write_demo", "truth"]

SEED = 20261201

#: file stem -> one-line description, in the order they are written.
DEMO_FILES = {
    "bench_tone": "zero-IF receiver tone: DC offset, IQ imbalance, phase noise, a spur",
    "qpsk_burst": "QPSK burst, root-raised-cosine, with a carrier frequency offset",
    "real_if": "real-valued IF capture to bring down to baseband",
    "band_survey": "a band with several carriers of different widths, annotated",
}


_TRUTH_EXTENSION = {"name": "truth", "version": "1.0.0", "optional": True}


def _truth(values: dict[str, Any]) -> dict[str, Any]:
    """Attrs that put ``values`` in the SigMF global object under the ``truth`` namespace."""
    fields: dict[str, Any] = {f"truth:{k}": v for k, v in values.items()}
    fields["core:extensions"] = [dict(_TRUTH_EXTENSION)]
    return {"sigmf_extra": {"global": fields}}


def truth(cap: xr.DataArray) -> dict[str, Any]:
    """The true values a demo capture was made with (its ``truth:`` metadata), namespace dropped.

    Examples
    --------
    >>> import quadkit
    >>> from quadkit.demo import make_demo, truth
    >>> truth(make_demo("real_if"))["carrier_hz"]
    2000000.0
    """
    fields = (cap.attrs.get("sigmf_extra") or {}).get("global", {})
    return {k[len("truth:"):]: v for k, v in fields.items() if k.startswith("truth:")}


def bench_tone(rng: np.random.Generator) -> xr.DataArray:
    """(a) The RX-7 board's first light: a synthesiser tone through the zero-IF front end."""
    from . import impairments

    fs, n, fc = 1e6, 2**19, 2.4415e9
    tone_offset, tone_amp, tone_phase = 125e3, 0.5, 0.4
    spur_offset, spur_amp = -287.5e3, 10 ** (-60 / 20)
    noise_dbfs_hz = -120.0
    true = {
        "tone_offset_hz": tone_offset,
        "tone_frequency_hz": fc + tone_offset,
        "tone_power_dbfs": 20 * np.log10(tone_amp),
        "spur_offset_hz": spur_offset,
        "spur_power_dbfs": 20 * np.log10(spur_amp),
        "noise_density_dbfs_hz": noise_dbfs_hz,
        "dc_i": 0.012,
        "dc_q": -0.007,
        "gain_imbalance_db": 0.9,
        "phase_skew_deg": 2.5,
        "phase_noise_offsets_hz": [1e3, 10e3, 100e3, 400e3],
        "phase_noise_dbc_hz": [-80.0, -90.0, -105.0, -135.0],
    }
    true["image_rejection_db"] = float(
        impairments.image_rejection(true["gain_imbalance_db"], true["phase_skew_deg"]))
    clean = synth.multitone([tone_offset, spur_offset], sample_rate=fs, n_samples=n,
                            amplitudes=[tone_amp, spur_amp], phases_rad=[tone_phase, 0.0],
                            center_frequency=fc, dtype=np.complex128)
    noisy = clean.copy(data=clean.values + synth.noise(
        sample_rate=fs, n_samples=n, power_dbfs=noise_dbfs_hz + 10 * np.log10(fs),
        rng=rng, exact_power=False, dtype=np.complex128).values)
    impaired = impairments.apply(
        noisy,
        gain_imbalance_db=true["gain_imbalance_db"],
        phase_skew_deg=true["phase_skew_deg"],
        dc_i=true["dc_i"],
        dc_q=true["dc_q"],
        phase_noise={"offsets_hz": true["phase_noise_offsets_hz"],
                     "dbc_hz": true["phase_noise_dbc_hz"]},
        rng=rng,
    )
    return _capture.like(
        impaired, impaired.data.astype(np.complex64),
        description="RX-7 zero-IF receiver rev C, bench 3: synthesiser tone at +125 kHz, "
                    "first light before calibration",
        hardware="RX-7 rev C zero-IF receiver board (quadkit bench, invented for the demo)",
        start_time="2026-11-02T09:14:05Z",
        **_truth(true),
    )


def qpsk_burst(rng: np.random.Generator) -> xr.DataArray:
    """(b) A QPSK burst from the bench test transmitter, received with a frequency offset."""
    from . import impairments, modulation

    fs, rs, rolloff, fc = 2e6, 250e3, 0.35, 915e6
    n_sym, guard = 1200, 2000
    cfo, es_n0_db, amp = 3.2e3, 26.0, 0.35
    bits = rng.integers(0, 2, size=2 * n_sym)
    burst = modulation.modulate(bits, "qpsk", symbol_rate=rs, sample_rate=fs, rolloff=rolloff)
    x = np.concatenate([np.zeros(guard), np.asarray(burst.values, np.complex128) * amp,
                        np.zeros(guard)])
    cap = _capture.capture(x.astype(np.complex128), sample_rate=fs, center_frequency=fc)
    cap = impairments.apply(cap, frequency_offset_hz=cfo)
    # Es/N0 in per-sample units: Es = (mean sample power in the burst) x (samples per symbol),
    # and N0 is the variance of white noise per complex sample.
    sps = fs / rs
    burst_power = float(np.mean(np.abs(x[guard:guard + burst.sizes["time"]]) ** 2))
    n0 = burst_power * sps / 10 ** (es_n0_db / 10)
    noise = synth.noise(sample_rate=fs, n_samples=x.size, power_dbfs=10 * np.log10(n0),
                        rng=rng, exact_power=False, dtype=np.complex128).values
    y = cap.values + noise
    true = {
        "scheme": "qpsk",
        "symbol_rate_hz": rs,
        "rolloff": rolloff,
        "symbols": n_sym,
        "burst_start_sample": guard,
        "burst_sample_count": int(burst.sizes["time"]),
        "frequency_offset_hz": cfo,
        "es_n0_db": es_n0_db,
        # data-aided EVM under AWGN is 1/sqrt(Es/N0) (REFERENCES: TS 38.104 EVM definition)
        "expected_evm_rms_percent": 100 / np.sqrt(10 ** (es_n0_db / 10)),
        "bits": "".join(str(int(b)) for b in bits[:64]) + "...",
    }
    return _capture.capture(
        y.astype(np.complex64), sample_rate=fs, center_frequency=fc,
        description="bench test transmitter TX-2: QPSK burst at 250 kBd, RRC 0.35, received "
                    "by RX-7 with its synthesiser 3.2 kHz off",
        hardware="TX-2 test transmitter into RX-7 rev C over a 60 dB attenuator pad (invented)",
        start_time="2026-11-02T10:02:41Z",
        **_truth(true),
    )


def real_if(rng: np.random.Generator) -> xr.DataArray:
    """(c) The IF strip's ADC output: a real capture with a carrier near 2 MHz."""
    fs, n, f_if = 8e6, 2**20, 2.0e6
    main_f, main_amp, main_phase = f_if + 15e3, 0.35, -2.2
    side_f, side_amp = f_if - 30e3, 0.05
    x = synth.multitone([main_f, side_f], sample_rate=fs, n_samples=n, real=True,
                        amplitudes=[main_amp, side_amp], phases_rad=[main_phase, 0.9],
                        dtype=np.float64).values
    x = x + rng.standard_normal(n) * 10 ** (-62 / 20)
    true = {
        "carrier_hz": f_if,
        "tone_frequency_hz": main_f,
        "tone_amplitude": main_amp,
        "tone_phase_rad": main_phase,
        "tone_i": main_amp * np.cos(main_phase),
        "tone_q": main_amp * np.sin(main_phase),
        "second_tone_frequency_hz": side_f,
        "second_tone_amplitude": side_amp,
        "noise_rms": 10 ** (-62 / 20),
    }
    return _capture.capture(
        x.astype(np.float32), sample_rate=fs, center_frequency=0.0,
        description="IF strip of the RX-3 superhet, 2 MHz IF sampled at 8 MS/s: a tone 15 kHz "
                    "above the IF carrier and a weaker one 30 kHz below",
        hardware="RX-3 superhet IF strip with a 14-bit ADC (invented)",
        start_time="2026-11-03T14:30:00Z",
        **_truth(true),
    )


def band_survey(rng: np.random.Generator) -> xr.DataArray:
    """(d) A 4 MHz survey of our test band with four carriers of different widths."""
    from . import mixing, modulation

    fs, n, fc = 4e6, 2**20, 868.0e6
    carriers = [
        # label, offset, kind, width or symbol rate, power dBFS
        ("telemetry", -1.2e6, "noise", 12.5e3, -20.0),
        ("beacon", -0.6e6, "tone", 0.0, -30.0),
        ("data link", 0.4e6, "qpsk", 200e3, -15.0),
        ("wideband", 1.3e6, "noise", 600e3, -18.0),
    ]
    total = np.zeros(n, np.complex128)
    annotations = []
    true: dict[str, Any] = {"carriers": []}
    for label, offset, kind, width, power in carriers:
        amp = 10 ** (power / 20)
        if kind == "tone":
            sig = synth.tone(offset, sample_rate=fs, n_samples=n, amplitude=amp,
                             dtype=np.complex128).values
            occupied = 0.0
        elif kind == "noise":
            base = synth.noise(sample_rate=fs, n_samples=n, bandwidth_hz=width, rng=rng,
                               power_dbfs=power, dtype=np.complex128)
            sig = mixing.shift(base, offset).values
            occupied = 0.99 * width  # flat band: 99 % bandwidth is 0.99 B (ITU-R SM.328)
        else:
            n_sym = int(np.ceil(n * width / fs)) + 16
            bits = rng.integers(0, 2, size=2 * n_sym)
            base = modulation.modulate(bits, "qpsk", symbol_rate=width, sample_rate=fs,
                                       rolloff=0.35)
            b = np.asarray(base.values[:n], np.complex128)
            b = b * amp / np.sqrt(np.mean(np.abs(b) ** 2))
            sig = mixing.shift(_capture.capture(b, sample_rate=fs), offset).values
            occupied = 1.16666 * width  # RRC 0.35 (REFERENCES: ITU-R SM.328 values)
        total += sig
        half = max(width * (1.35 if kind == "qpsk" else 1.0), 2e3) / 2
        annotations.append({
            "start_sample": 0,
            "sample_count": n,
            "lower_frequency_hz": fc + offset - half,
            "upper_frequency_hz": fc + offset + half,
            "label": label,
            "comment": f"{kind} carrier, {power:.0f} dBFS",
        })
        true["carriers"].append({
            "label": label, "offset_hz": offset, "frequency_hz": fc + offset, "kind": kind,
            "width_hz": width, "power_dbfs": power, "occupied_bandwidth_hz": occupied,
        })
    noise_density = -110.0
    total += synth.noise(sample_rate=fs, n_samples=n, power_dbfs=noise_density + 10 * np.log10(fs),
                         rng=rng, exact_power=False, dtype=np.complex128).values
    true["noise_density_dbfs_hz"] = noise_density
    return _capture.capture(
        total.astype(np.complex64), sample_rate=fs, center_frequency=fc,
        description="band survey of our 868 MHz test band from the roof antenna of lab 2: "
                    "four carriers of different widths",
        hardware="RX-7 rev C on the roof mast, 4 MS/s (invented)",
        start_time="2026-11-04T07:45:12Z",
        annotations=annotations,
        **_truth(true),
    )


_MAKERS = {"bench_tone": bench_tone, "qpsk_burst": qpsk_burst, "real_if": real_if,
           "band_survey": band_survey}
_DTYPES = {"bench_tone": "ci16_le", "qpsk_burst": "ci16_le", "real_if": "ri16_le",
           "band_survey": "ci16_le"}


def make_demo(name: str) -> xr.DataArray:
    """Make one demo capture in memory (same seed, same samples, every time)."""
    if name not in _MAKERS:
        raise ValueError(f"make_demo: name={name!r} is not one of {', '.join(_MAKERS)}")
    seed = SEED + list(_MAKERS).index(name)
    return _MAKERS[name](np.random.default_rng(seed))


def write_demo(directory: str | Path, *, overwrite: bool = False) -> list[tuple[Path, str]]:
    """Write the four demo captures as SigMF into ``directory``; return (meta path, text)."""
    from . import io

    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    if not overwrite:
        existing = [directory / f"{s}.sigmf-meta" for s in _MAKERS
                    if (directory / f"{s}.sigmf-meta").exists()]
        if existing:
            raise FileExistsError(
                f"demo: {existing[0]} exists already; pass --overwrite to replace the demo files")
    written = []
    for name in _MAKERS:
        cap = make_demo(name)
        path = directory / f"{name}.sigmf-meta"
        io.write_sigmf(cap, path, dtype=_DTYPES[name], overwrite=overwrite)
        written.append((path, DEMO_FILES[name]))
    return written
