"""Tests of quadkit.views: display reduction, size budget, and each view on one and several
channels. References are plain numpy (min/max over slices, nearest points) and scipy."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr
from scipy import signal as sps

import quadkit
from quadkit import views

bokeh = pytest.importorskip("bokeh")
from bokeh.embed import json_item  # noqa: E402

BUDGET_BYTES = 5 * 1024 * 1024  # the limit on what reaches the browser


def _payload(model) -> int:
    """Bytes of the JSON document bokeh sends to the browser for ``model``."""
    return len(json.dumps(json_item(model)))


def _data(fig, name):
    r = fig.select_one({"name": name})
    assert r is not None, f"no renderer named {name!r}"
    return r.data_source.data


def _contract_psd(cap, nperseg=1024):
    """A spectrum shaped like quadkit.spectral.psd's contract, computed with scipy.welch."""
    fs = cap.attrs["sample_rate"]
    f, p = sps.welch(np.asarray(cap.values), fs=fs, nperseg=nperseg, return_onesided=False,
                     window="hann", axis=-1)
    f, p = np.fft.fftshift(f), np.fft.fftshift(p, axes=-1)
    win = sps.get_window("hann", nperseg)
    enbw = nperseg * np.sum(win**2) / np.sum(win) ** 2  # ENBW in bins (Harris 1978)
    dims = ("channel", "frequency") if p.ndim == 2 else ("frequency",)
    return xr.DataArray(
        (10 * np.log10(p)).astype(np.float32), dims=dims, name="psd",
        coords={"frequency": cap.attrs["center_frequency"] + f, "offset": ("frequency", f)},
        attrs={"units": "dBFS/Hz", "rbw_hz": enbw * fs / nperseg, "window": "hann",
               "nperseg": nperseg, "n_averages": 7})


def _contract_spectrogram(n_time, n_freq, fs=1e6, fc=100e6, dt=1e-3, channels=None):
    t = np.arange(n_time) * dt
    f = fc + (np.arange(n_freq) - n_freq // 2) * fs / n_freq
    shape = (n_time, n_freq) if channels is None else (channels, n_time, n_freq)
    dims = ("time", "frequency") if channels is None else ("channel", "time", "frequency")
    vals = np.full(shape, -120.0, np.float32)
    return xr.DataArray(vals, dims=dims, coords={"time": t, "frequency": f},
                        attrs={"units": "dBFS/Hz", "rbw_hz": 1.5 * fs / n_freq})


# ------------------------------------------------------------------------------------------
# display reduction
# ------------------------------------------------------------------------------------------

@pytest.mark.parametrize("n, bins", [(1000, 10), (1003, 7), (50, 50), (17, 100), (99991, 313)])
def test_envelope_bins_match_min_max_of_each_slice(n, bins):
    rng = np.random.default_rng(n)
    x = (rng.standard_normal(n) + 1j * rng.standard_normal(n)).astype(np.complex64)
    edges, lo, hi = views.envelope_bins(x, bins)
    assert edges[0] == 0 and edges[-1] == n and np.all(np.diff(edges) >= 1)
    assert len(edges) - 1 == min(n, bins)
    for k in range(len(edges) - 1):
        seg = x[edges[k]:edges[k + 1]]
        # Reference: numpy's own min/max over the slice; exact (same float32 values).
        for j, comp in enumerate((seg.real, seg.imag, np.abs(seg))):
            assert lo[j, 0, k] == comp.min() and hi[j, 0, k] == comp.max()


def test_envelope_bins_dask_equals_numpy_with_random_chunks():
    import dask.array as da

    rng = np.random.default_rng(7)
    n = 200_003
    x = (rng.standard_normal((3, n)) + 1j * rng.standard_normal((3, n))).astype(np.complex64)
    cuts = np.sort(rng.choice(np.arange(1, n), size=12, replace=False))
    chunks = tuple(np.diff(np.concatenate([[0], cuts, [n]])).tolist())  # short last chunk
    lazy = da.from_array(x, chunks=((1, 2), chunks))
    e1, lo1, hi1 = views.envelope_bins(x, 777)
    e2, lo2, hi2 = views.envelope_bins(lazy, 777)
    # Same samples in the same bins: exact equality whatever the chunking.
    np.testing.assert_array_equal(e1, e2)
    np.testing.assert_array_equal(lo1, lo2)
    np.testing.assert_array_equal(hi1, hi2)


def test_single_sample_spike_in_2_to_25_samples_stays_visible_and_payload_is_small():
    n = 2**25
    rng = np.random.default_rng(3)
    x = np.zeros(n, np.complex64)
    x[:4096] = 0.01 * rng.standard_normal(4096)
    where = 23_456_789
    x[where] = 0.8 - 0.6j  # one sample: I spike up, Q spike down
    cap = quadkit.capture(x, sample_rate=20e6, center_frequency=2.4e9)
    fig = views.time_plot(cap)
    i, q, env = _data(fig, "i"), _data(fig, "q"), _data(fig, "envelope")
    assert np.max(i["y"]) == np.float32(0.8)
    assert np.min(q["y"]) == np.float32(-0.6)
    # |0.8 - 0.6j| = 1 (3-4-5 triangle); float32 rounding of the parts, hence 1e-6.
    assert abs(np.max(env["y"]) - 1.0) < 1e-6
    # The stroke sits at the spike's time, within one display bin (n / 2000 samples).
    t_peak = i["x"][int(np.argmax(i["y"]))]
    assert abs(t_peak - where / 20e6) <= (n / 2000) / 20e6
    assert _payload(fig) < BUDGET_BYTES


def test_lazy_time_plot_equals_numpy_time_plot():
    import dask.array as da

    rng = np.random.default_rng(11)
    x = (rng.standard_normal(300_001) * 0.1).astype(np.complex64)
    cap = quadkit.capture(x, sample_rate=1e6)
    lazy = quadkit.capture(da.from_array(x, chunks=65_537), sample_rate=1e6)
    a, b = views.time_plot(cap), views.time_plot(lazy)
    for name in ("i", "q", "envelope"):
        np.testing.assert_array_equal(_data(a, name)["y"], _data(b, name)["y"])
        np.testing.assert_array_equal(_data(a, name)["x"], _data(b, name)["x"])


def test_short_capture_is_drawn_sample_by_sample():
    rng = np.random.default_rng(1)
    x = (rng.standard_normal(500) + 1j * rng.standard_normal(500)).astype(np.complex64)
    cap = quadkit.capture(x, sample_rate=1e3)
    fig = views.time_plot(cap)
    np.testing.assert_array_equal(_data(fig, "i")["y"], x.real)
    np.testing.assert_array_equal(_data(fig, "q")["y"], x.imag)
    np.testing.assert_array_equal(_data(fig, "envelope")["y"], np.abs(x))
    # 500 samples at 1 kS/s span 0.5 s: the axis is in ms, x[k] = k ms.
    assert fig.xaxis.axis_label == "time (ms)"
    np.testing.assert_allclose(_data(fig, "i")["x"], np.arange(500), rtol=0, atol=1e-9)


def test_time_axis_is_absolute_after_slicing():
    cap = quadkit.synth.tone(1e3, sample_rate=1e4, n_samples=10_000)
    part = cap.isel(time=slice(2_500, 3_000))
    fig = views.time_plot(part)
    # Sample 2500 at 10 kS/s is at 0.25 s = 250 ms (axis in ms for a 50 ms slice).
    assert _data(fig, "i")["x"][0] == pytest.approx(250.0, abs=1e-9)


def test_real_capture_shows_its_samples():
    cap = quadkit.synth.tone(1e3, sample_rate=1e5, n_samples=1000, real=True)
    fig = views.time_plot(cap)
    np.testing.assert_array_equal(_data(fig, "x")["y"], cap.values)
    assert fig.select_one({"name": "i"}) is None


def test_time_plot_multichannel_equals_each_channel():
    rng = np.random.default_rng(5)
    x = (rng.standard_normal((3, 40_000)) + 1j * rng.standard_normal((3, 40_000)))
    cap = quadkit.capture(x.astype(np.complex64), sample_rate=1e6)
    fig = views.time_plot(cap, max_points=300)
    for ch in range(3):
        alone = views.time_plot(cap.isel(channel=ch), max_points=300)
        for name in ("i", "q", "envelope"):
            np.testing.assert_array_equal(_data(fig, f"{name}:{ch}")["y"],
                                          _data(alone, name)["y"])


def test_many_channels_are_capped_and_the_title_says_so():
    x = np.zeros((40, 10_000), np.complex64)
    cap = quadkit.capture(x, sample_rate=1e6)
    fig = views.time_plot(cap)
    assert "of 40 shown" in fig.title.text
    assert fig.select_one({"name": "i:7"}) is not None and fig.select_one({"name": "i:8"}) is None
    assert _payload(fig) < BUDGET_BYTES
    one = views.time_plot(cap, channel=33)
    assert one.select_one({"name": "i:33"}) is not None


def test_views_never_call_show(monkeypatch):
    import bokeh.io
    import bokeh.plotting

    def boom(*a, **k):
        raise AssertionError("a view called show")

    monkeypatch.setattr(bokeh.io, "show", boom)
    monkeypatch.setattr(bokeh.plotting, "show", boom)
    cap = quadkit.synth.tone(1e3, sample_rate=1e5, n_samples=4096)
    views.time_plot(cap)
    views.spectrum_plot(_contract_psd(cap))
    views.spectrogram_plot(_contract_spectrogram(20, 64))
    views.constellation_plot(cap, ideal=[1, -1])
    views.eye_plot(cap, symbol_rate=1e4)


def test_import_quadkit_and_accessor_do_not_import_bokeh():
    code = (
        "import sys, quadkit\n"
        "cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=64)\n"
        "dir(cap.qk); cap.qk.add_noise(snr_db=10, rng=0)\n"
        "assert 'time_plot' in dir(cap.qk)\n"
        "assert not any(m.startswith('bokeh') for m in sys.modules), 'bokeh imported'\n"
        "assert not any(m.startswith('ipywidgets') for m in sys.modules)\n"
    )
    subprocess.run([sys.executable, "-c", code], check=True)


def test_accessor_forwards_to_time_plot():
    cap = quadkit.synth.tone(1e3, sample_rate=1e5, n_samples=1000)
    fig = cap.qk.time_plot(parts=("i",))
    np.testing.assert_array_equal(_data(fig, "i")["y"], cap.values.real)


def test_existing_figure_is_drawn_into_and_returned():
    cap = quadkit.synth.tone(1e3, sample_rate=1e5, n_samples=1000)
    fig = views.time_plot(cap, parts=("i",))
    again = views.time_plot(cap.isel(time=slice(0, 500)), fig=fig, parts=("q",))
    assert again is fig
    assert {r.name for r in fig.renderers} == {"i", "q"}


def test_bad_arguments_are_plain_value_errors():
    cap = quadkit.synth.tone(1e3, sample_rate=1e5, n_samples=1000)
    with pytest.raises(ValueError, match="parts"):
        views.time_plot(cap, parts=("x-axis",))
    with pytest.raises(ValueError, match="max_points"):
        views.time_plot(cap, max_points=0)
    with pytest.raises(ValueError, match="channel"):
        views.time_plot(cap, channel=2)
    with pytest.raises(ValueError, match="symbol_rate"):
        views.eye_plot(cap, symbol_rate=2e5)


# ------------------------------------------------------------------------------------------
# spectrum
# ------------------------------------------------------------------------------------------

def test_spectrum_plot_shows_rbw_and_marks_the_tones():
    fs, fc = 1e6, 915e6
    cap = quadkit.synth.multitone([-200e3, 125e3], sample_rate=fs, n_samples=65536,
                                  amplitudes=[0.5, 0.1], center_frequency=fc)
    cap = quadkit.synth.add_noise(cap, snr_db=60, rng=0)
    spec = _contract_psd(cap)
    fig = views.spectrum_plot(spec, n_peaks=2)
    rbw = spec.attrs["rbw_hz"]  # 1.5 bins of 976.6 Hz for a Hann window = 1.465 kHz
    assert f"RBW {rbw / 1e3:.6g} kHz" in fig.title.text
    assert any("RBW" in item.label.value for item in fig.legend[0].items)
    peaks = _data(fig, "peaks")
    # The two strongest peaks are the tones. They sit on bin centres (multiples of
    # fs/1024), so each marker is the tone's own bin: half a bin of tolerance.
    got = sorted(np.asarray(peaks["x"]) * 1e6)  # axis in MHz
    np.testing.assert_allclose(got, [fc - 200e3, fc + 125e3], atol=fs / 1024 / 2)
    np.testing.assert_array_equal(_data(fig, "psd")["y"], spec.values)
    assert fig.yaxis.axis_label == "dBFS/Hz"


def test_spectrum_plot_reduces_long_spectra_and_keeps_the_peak():
    n = 2**20
    f = np.linspace(-5e6, 5e6, n, endpoint=False)
    vals = np.full(n, -140.0, np.float32)
    vals[777_777] = -20.0  # one bin
    spec = xr.DataArray(vals, dims="frequency", coords={"frequency": 1e9 + f,
                        "offset": ("frequency", f)}, attrs={"units": "dBFS", "rbw_hz": 14.3})
    fig = views.spectrum_plot(spec, peaks=None)
    y = _data(fig, "psd")["y"]
    assert len(y) == 2 * 2000 and np.max(y) == np.float32(-20.0)
    assert _payload(fig) < BUDGET_BYTES


def test_spectrum_plot_multichannel_and_given_peaks():
    rng = np.random.default_rng(2)
    x = np.stack([quadkit.synth.tone(f, sample_rate=1e6, n_samples=16384).values
                  for f in (100e3, -50e3)])
    x = x + 1e-3 * (rng.standard_normal(x.shape) + 1j * rng.standard_normal(x.shape))
    cap = quadkit.capture(x.astype(np.complex64), sample_rate=1e6)
    spec = _contract_psd(cap)
    fig = views.spectrum_plot(spec, peaks=[{"frequency_hz": 100e3, "power_dbfs": -3.0}])
    for ch in (0, 1):
        np.testing.assert_array_equal(_data(fig, f"psd:{ch}")["y"], spec.values[ch])
    peaks = _data(fig, "peaks")
    # Two channels, the same listed peak marked on each; axis in kHz for a 1 MHz span.
    assert fig.xaxis.axis_label == "frequency (MHz)"
    np.testing.assert_allclose(peaks["x"], [0.1, 0.1])


# ------------------------------------------------------------------------------------------
# spectrogram
# ------------------------------------------------------------------------------------------

def test_spectrogram_image_is_float32_at_display_resolution_with_extremes_kept():
    sg = _contract_spectrogram(5000, 4096)
    sg.values[3333, 1234] = -5.0  # one cell: a short burst in one bin
    fig = views.spectrogram_plot(sg)
    img = _data(fig, "spectrogram")["image"][0]
    assert img.dtype == np.float32 and img.shape == (360, 1024)
    assert img.max() == np.float32(-5.0)
    # The burst lands in the row and column holding time bin 3333 and frequency bin 1234.
    r, c = np.unravel_index(np.argmax(img), img.shape)
    t_edges = (np.arange(361) * 5000) // 360
    f_edges = (np.arange(1025) * 4096) // 1024
    assert t_edges[r] <= 3333 < t_edges[r + 1] and f_edges[c] <= 1234 < f_edges[c + 1]
    assert _payload(fig) < BUDGET_BYTES
    # A 20000 x 2048 spectrogram (156 MiB as float32) still sends under the budget.
    big = _contract_spectrogram(20000, 2048)
    assert _payload(views.spectrogram_plot(big)) < BUDGET_BYTES


def test_spectrogram_axes_are_absolute_and_it_has_a_colour_bar():
    sg = _contract_spectrogram(100, 256, fs=1e6, fc=100e6, dt=1e-3)
    fig = views.spectrogram_plot(sg)
    glyph = fig.select_one({"name": "spectrogram"}).glyph
    df = 1e6 / 256
    # Left edge = lowest bin centre minus half a bin, in MHz (span 1 MHz).
    assert glyph.x == pytest.approx((100e6 - 0.5e6 - df / 2) / 1e6)
    assert glyph.dw == pytest.approx(1.0)
    assert glyph.y == pytest.approx(-0.5)  # ms: first row centred at 0 with 1 ms rows
    assert glyph.dh == pytest.approx(100.0)
    bars = [r for r in fig.right if type(r).__name__ == "ColorBar"]
    assert len(bars) == 1 and bars[0].title == "dBFS/Hz"


def test_spectrogram_multichannel_gives_linked_figures():
    sg = _contract_spectrogram(50, 128, channels=2)
    sg.values[1, 10, 20] = 0.0
    col = views.spectrogram_plot(sg)
    figs = col.children
    assert len(figs) == 2 and figs[0].x_range is figs[1].x_range
    img1 = figs[1].select_one({"name": "spectrogram:1"}).data_source.data["image"][0]
    np.testing.assert_array_equal(img1, sg.values[1])


# ------------------------------------------------------------------------------------------
# constellation and eye
# ------------------------------------------------------------------------------------------

QPSK = np.array([1 + 1j, -1 + 1j, -1 - 1j, 1 - 1j]) / np.sqrt(2)


def test_constellation_error_vectors_end_on_the_nearest_ideal_point():
    rng = np.random.default_rng(4)
    sym = QPSK[rng.integers(0, 4, 1000)]
    rx = (sym + 0.05 * (rng.standard_normal(1000) + 1j * rng.standard_normal(1000)))
    cap = quadkit.capture(rx.astype(np.complex64), sample_rate=1e3)
    fig = views.constellation_plot(cap, ideal=QPSK, error_vectors=True)
    err = _data(fig, "error")
    ends = np.asarray(err["x1"]) + 1j * np.asarray(err["y1"])
    # Reference: brute-force nearest point; at 0.05 noise every decision is right, so the
    # nearest point is the transmitted one (float32 storage, hence 1e-6).
    np.testing.assert_allclose(ends, sym, atol=1e-6)
    np.testing.assert_array_equal(_data(fig, "received")["x"], rx.real.astype(np.float32))
    assert len(_data(fig, "ideal")["x"]) == 4


def test_constellation_subsamples_and_says_so():
    cap = quadkit.capture(np.tile(QPSK, 25_000).astype(np.complex64), sample_rate=1e3)
    fig = views.constellation_plot(cap, max_points=10_000)
    assert len(_data(fig, "received")["x"]) == 10_000
    assert "10,000 of 100,000" in fig.title.text
    assert _payload(fig) < BUDGET_BYTES


def test_constellation_from_a_per_symbol_result_and_multichannel():
    rng = np.random.default_rng(9)
    ideal = QPSK[rng.integers(0, 4, (2, 200))]
    rx = ideal * 0.9
    res = xr.Dataset({"symbols": (("channel", "symbol"), rx),
                      "ideal": (("channel", "symbol"), ideal)}, attrs={"scheme": "qpsk"})
    col = views.constellation_plot(res, error_vectors=True)
    f1 = col.children[1]
    err = f1.select_one({"name": "error"}).data_source.data
    np.testing.assert_allclose(err["x1"], ideal[1].real, atol=1e-6)
    assert "qpsk" in col.children[0].title.text


def test_eye_plot_folds_two_symbols_per_trace():
    fs, rs, sps_ = 16e3, 1e3, 16
    rng = np.random.default_rng(6)
    bits = rng.choice([-1.0, 1.0], size=(2, 120))
    x = np.repeat(bits[0] + 1j * bits[1], sps_).astype(np.complex64)
    cap = quadkit.capture(x, sample_rate=fs)
    col = views.eye_plot(cap, symbol_rate=rs)
    fi, fq = col.children
    di = fi.select_one({"name": "eye_i"}).data_source.data
    assert len(di["xs"]) == 60  # 120 symbols, two per trace
    assert all(len(t) == 2 * sps_ for t in di["ys"])
    # Trace k holds symbols 2k and 2k+1: compare with the bits directly.
    np.testing.assert_array_equal(di["ys"][5][:sps_], np.full(sps_, bits[0, 10], np.float32))
    dq = fq.select_one({"name": "eye_q"}).data_source.data
    np.testing.assert_array_equal(dq["ys"][5][sps_:], np.full(sps_, bits[1, 11], np.float32))
    # x within the trace: 0 .. 2 symbol periods (2 ms), axis in ms.
    assert di["xs"][0][0] == 0 and di["xs"][0][-1] == pytest.approx(2.0 - 1 / 16)
    two = quadkit.capture(np.stack([x, -x]), sample_rate=fs)
    fig = views.eye_plot(two, symbol_rate=rs, component="i")
    d1 = fig.select_one({"name": "eye_i:1"}).data_source.data
    np.testing.assert_array_equal(d1["ys"][5][:sps_], -di["ys"][5][:sps_])


# ------------------------------------------------------------------------------------------
# phase noise and image rejection
# ------------------------------------------------------------------------------------------

def test_phase_noise_plot_has_a_log_offset_axis_and_the_curve():
    off = np.logspace(1, 6, 60)
    curve = -70 - 20 * np.log10(off / 10)
    res = xr.Dataset({"phase_noise_dbc_hz": ("offset", curve, {"units": "dBc/Hz"}),
                      "rms_jitter_s": ((), 1.2e-12, {"units": "s"})},
                     coords={"offset": off})
    fig = views.phase_noise_plot(res)
    assert type(fig.x_scale).__name__ == "LogScale"
    d = _data(fig, "phase_noise")
    np.testing.assert_allclose(d["x"], off)
    np.testing.assert_allclose(d["y"], curve.astype(np.float32))
    assert "jitter 1.2 ps" in fig.title.text and fig.yaxis.axis_label == "dBc/Hz"
    two = xr.concat([res.phase_noise_dbc_hz, res.phase_noise_dbc_hz + 3], dim="channel")
    fig2 = views.phase_noise_plot(two)
    np.testing.assert_allclose(_data(fig2, "phase_noise:1")["y"], (curve + 3).astype(np.float32))


def test_phase_noise_plot_of_a_capture_shows_the_curve_and_the_points():
    # White phase noise of variance s2 on a carrier: L(f) = s2 / fs flat (IEEE Std 1139:
    # L = S_phi / 2 with S_phi one-sided = 2 s2 / fs).
    fs, n, s2 = 1e6, 2**18, 1e-6
    phi = np.sqrt(s2) * np.random.default_rng(0).standard_normal(n)
    cap = quadkit.capture(np.exp(1j * phi).astype(np.complex64), sample_rate=fs,
                          center_frequency=1e9)
    fig = views.phase_noise_plot(cap, carrier_hz=1e9, max_points=300)
    d = _data(fig, "phase_noise")
    assert len(d["x"]) <= 2 * 301  # reduced on log-spaced bins
    pts = _data(fig, "phase_noise_points")
    # Reported points within 1 dB of -120 dBc/Hz (16+ averaged segments: ~1 dB scatter
    # per point is the chi-square spread of the averaged periodogram, memory).
    np.testing.assert_allclose(pts["y"], 10 * np.log10(s2 / fs), atol=1.0)
    # The min/max envelope brackets the flat level (it spans the periodogram's scatter).
    assert np.min(d["y"]) < -120 < np.max(d["y"])
    assert "rms phase" in fig.title.text


def test_image_rejection_plot_against_frequency():
    f = np.linspace(-4e5, 4e5, 17)
    irr = 30 + 5 * np.cos(f / 4e5)
    res = xr.Dataset({"image_rejection_db": ("frequency", irr, {"units": "dB"})},
                     coords={"frequency": 2.4e9 + f})
    fig = views.image_rejection_plot(res)
    d = _data(fig, "image_rejection")
    assert fig.xaxis.axis_label == "frequency (MHz)"  # 800 kHz span: MHz ticks
    np.testing.assert_allclose(np.asarray(d["x"]) * 1e6, 2.4e9 + f)
    np.testing.assert_allclose(d["y"], irr.astype(np.float32))
    two = res.image_rejection_db.expand_dims(channel=[0, 1]).copy()
    two[1] += 10
    fig2 = views.image_rejection_plot(two)
    np.testing.assert_allclose(_data(fig2, "image_rejection:1")["y"],
                               (irr + 10).astype(np.float32))


# ------------------------------------------------------------------------------------------
# captures straight in (the views call quadkit.spectral)
# ------------------------------------------------------------------------------------------

def test_spectrum_plot_of_a_capture_marks_tones_with_their_power():
    cap = quadkit.synth.multitone([-123.4e3, 250.7e3], sample_rate=1e6, n_samples=2**16,
                                  amplitudes=[0.5, 0.05], center_frequency=2.4e9)
    cap = quadkit.synth.add_noise(cap, snr_db=60, rng=0)
    fig = views.spectrum_plot(cap, nperseg=2048)
    peaks = _data(fig, "peaks")
    np.testing.assert_allclose(sorted(np.asarray(peaks["x"]) * 1e6),
                               [2.4e9 - 123.4e3, 2.4e9 + 250.7e3], atol=50)
    # Labels give each tone's power: 20 log10(A) dBFS for a complex tone of amplitude A.
    for a in (0.5, 0.05):
        assert any(f"{20 * np.log10(a):.1f} dBFS" in t for t in peaks["text"])
    assert "RBW" in fig.title.text and "Hz" in fig.title.text


def test_spectrogram_plot_of_a_capture_follows_a_chirp():
    fs = 1e6
    cap = quadkit.synth.chirp(-400e3, 400e3, sample_rate=fs, n_samples=2**18,
                              center_frequency=100e6)
    fig = views.spectrogram_plot(cap, nperseg=256)
    img = _data(fig, "spectrogram")["image"][0]
    assert img.dtype == np.float32 and img.shape[0] <= 360 and img.shape[1] == 256
    # The brightest column follows the sweep: -400 kHz in the first row, +400 kHz in the
    # last; column k holds offset (k - 128) * fs / 256 (fftshifted bins). Two bins of slack:
    # a pooled row spans ~5.7 segments of a sweep moving 0.4 kHz per segment, plus leakage.
    first, last = int(np.argmax(img[0])), int(np.argmax(img[-1]))
    assert abs(first - (128 + (-400e3) * 256 / fs)) <= 2
    assert abs(last - (128 + 400e3 * 256 / fs)) <= 2


def test_replace_refreshes_the_same_figure_in_place():
    a = quadkit.synth.tone(1e3, sample_rate=1e5, n_samples=1000)
    b = quadkit.synth.tone(2e3, sample_rate=1e5, n_samples=3000, amplitude=0.5)
    fig = views.time_plot(a)
    src = fig.select_one({"name": "i"}).data_source
    again = views.time_plot(b, fig=fig, replace=True)
    assert again is fig and len(fig.renderers) == 3
    assert fig.select_one({"name": "i"}).data_source is src  # same model, new data
    np.testing.assert_array_equal(src.data["y"], b.values.real)
    assert "3,000 samples" in fig.title.text
    # A figure lacking a renderer the view draws (or holding one it would not) is refused.
    with pytest.raises(views.RendererMismatch):
        views.time_plot(b, fig=views.time_plot(a, parts=("i",)), replace=True)
    with pytest.raises(views.RendererMismatch):
        views.time_plot(b, fig=fig, parts=("i",), replace=True)
    sg1, sg2 = _contract_spectrogram(40, 64), _contract_spectrogram(80, 128, fs=2e6)
    sg2.values[3, 4] = 0.0
    f = views.spectrogram_plot(sg1)
    views.spectrogram_plot(sg2, fig=f, replace=True)
    r = f.select_one({"name": "spectrogram"})
    np.testing.assert_array_equal(r.data_source.data["image"][0], sg2.values)
    assert r.glyph.dw == pytest.approx(2.0) and r.glyph.color_mapper.high == 0.0


def test_image_rejection_plot_of_a_multitone_capture_before_and_after():
    from quadkit import impairments

    offsets = [-300e3, -190e3, -110e3, 70e3, 150e3, 230e3]
    cap = quadkit.synth.multitone(offsets, sample_rate=1e6, n_samples=2**16, amplitudes=0.15)
    g_db, phi_deg = 0.5, 3.0
    bad = impairments.apply(cap, gain_imbalance_db=g_db, phase_skew_deg=phi_deg)
    fig = views.image_rejection_plot(bad, label="as captured")
    d = _data(fig, "image_rejection")
    # A flat imbalance gives the same IRR at every frequency (DESIGN.md's formula).
    g, phi = 10 ** (g_db / 20), np.radians(phi_deg)
    irr = 10 * np.log10((1 + 2 * g * np.cos(phi) + g**2) / (1 - 2 * g * np.cos(phi) + g**2))
    # Noiseless tones: the per-tone fit is exact to float32 rounding (complex64 samples).
    np.testing.assert_allclose(d["y"], irr, atol=0.01)
    np.testing.assert_allclose(np.sort(np.asarray(d["x"]) * _axis_factor(fig)), offsets,
                               atol=1.0)
    assert cap.qk.image_rejection_plot is not None  # reachable from the accessor


def _axis_factor(fig):
    unit = fig.xaxis[0].axis_label.split("(")[-1].rstrip(")")
    return {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6, "GHz": 1e9}[unit]
