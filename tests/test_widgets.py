"""Tests of quadkit.widgets.explore: controls driven from Python, plotted data checked.

References: tone frequencies and amplitudes set by construction, the image-rejection formula
of DESIGN.md, numpy for peak positions."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

import quadkit
from quadkit import impairments, widgets

pytest.importorskip("ipywidgets")
pytest.importorskip("jupyter_bokeh")

FS, FC = 1e6, 433.92e6


def _src(fig, name):
    r = fig.select_one({"name": name})
    assert r is not None, f"no renderer {name!r}"
    return r.data_source.data


def _axis_factor(fig):
    unit = fig.xaxis[0].axis_label.split("(")[-1].rstrip(")")
    return {"Hz": 1.0, "kHz": 1e3, "MHz": 1e6, "GHz": 1e9}[unit]


def _peak_hz(fig, name="psd"):
    d = _src(fig, name)
    return float(np.asarray(d["x"])[int(np.argmax(d["y"]))]) * _axis_factor(fig)


@pytest.fixture(scope="module")
def two_tones():
    cap = quadkit.synth.multitone([-150e3, 200e3], sample_rate=FS, n_samples=2**15,
                                  amplitudes=[0.5, 0.25], center_frequency=FC)
    return quadkit.synth.add_noise(cap, snr_db=60, rng=0)


def test_tuning_moves_the_band_and_recomputes_the_channel(two_tones):
    ex = widgets.explore(two_tones, debounce_s=0)
    before = dict(_src(ex.figures["spectrum"], "psd"))
    figures = dict(ex.figures)
    ex.offset.value = 200e3
    ex.bandwidth.value = 50e3
    ch = ex.channel_capture
    # The channel is centred on the tone: absolute centre FC + 200 kHz; rate fs / floor(0.8
    # fs / bw) = 1e6 / 16 (the largest alias-free factor, as quadkit.decimation chooses).
    assert ch.attrs["center_frequency"] == FC + 200e3
    assert ch.attrs["sample_rate"] == FS / math.floor(0.8 * FS / 50e3)
    # The band marker spans FC + 200 kHz +- 25 kHz on the wide spectrum's axis.
    f = _axis_factor(ex.wide_figure)
    assert ex.band.left * f == pytest.approx(FC + 175e3) and ex.band.right * f == \
        pytest.approx(FC + 225e3)
    # The channel spectrum changed and peaks at the tone (one bin of fs/16/nperseg).
    after = _src(ex.figures["spectrum"], "psd")
    assert not np.array_equal(np.asarray(before["x"]), np.asarray(after["x"]))
    spec = ex.figures["spectrum"]
    assert abs(_peak_hz(spec) - (FC + 200e3)) <= ch.attrs["sample_rate"] / 64
    # Time trace: after the filter has settled, |z| is the tone amplitude 0.25 (the -150 kHz
    # tone is far outside the channel; 60 dB SNR noise in 50 kHz adds < 1e-3).
    env = np.asarray(_src(ex.figures["time"], "envelope")["y"])
    mid = env[len(env) // 4: 3 * len(env) // 4]
    assert np.all(np.abs(mid - 0.25) < 5e-3)
    assert ex.status.value == ""
    # Refreshed in place: the same bokeh figures, so only new data travels to the page.
    assert all(ex.figures[k] is figures[k] for k in figures)


def test_debounced_changes_wait_then_run_once_with_the_last_values(two_tones):
    ex = widgets.explore(two_tones, debounce_s=600)  # never fires during the test by itself
    n0 = ex.recomputes
    first = np.asarray(_src(ex.figures["spectrum"], "psd")["x"]).copy()
    ex.offset.value = 100e3
    ex.offset.value = -150e3
    ex.bandwidth.value = 40e3
    # The band marker follows at once; the expensive recompute is still pending.
    assert ex.pending and ex.recomputes == n0
    assert ex.band.left * _axis_factor(ex.wide_figure) == pytest.approx(FC - 170e3)
    np.testing.assert_array_equal(np.asarray(_src(ex.figures["spectrum"], "psd")["x"]), first)
    ex.flush()
    assert not ex.pending and ex.recomputes == n0 + 1
    assert ex.channel_capture.attrs["center_frequency"] == FC - 150e3
    assert abs(_peak_hz(ex.figures["spectrum"]) - (FC - 150e3)) <= 1e6 / 20 / 64


def test_debounce_timer_fires_by_itself(two_tones):
    ex = widgets.explore(two_tones, debounce_s=0.05)
    n0 = ex.recomputes
    ex.offset.value = 200e3
    deadline = time.monotonic() + 30  # generous: the machine may be busy
    while ex.pending and time.monotonic() < deadline:
        time.sleep(0.05)
    while ex.recomputes == n0 and time.monotonic() < deadline:
        time.sleep(0.05)
    assert ex.recomputes == n0 + 1
    assert ex.channel_capture.attrs["center_frequency"] == FC + 200e3


def test_decimation_control_follows_the_bandwidth(two_tones):
    ex = widgets.explore(two_tones, debounce_s=0, bandwidth_hz=100e3)
    assert ex.decimation.value == 8 and ex.decimation.disabled  # floor(0.8 * 1e6 / 1e5)
    ex.auto_decimation.value = False
    ex.decimation.value = 2
    assert ex.channel_capture.attrs["sample_rate"] == FS / 2
    ex.bandwidth.value = 300e3  # now at most floor(0.8e6 / 3e5) = 2
    assert ex.decimation.max == 2
    ex.bandwidth.value = 500e3  # factor 2 would alias: clamped to 1
    assert ex.decimation.value == 1
    assert ex.channel_capture.attrs["sample_rate"] == FS


def test_imbalance_panel_estimate_and_correction_make_the_image_fall():
    g_db, phi_deg = 0.8, 4.0
    cap = quadkit.synth.tone(125e3, sample_rate=FS, n_samples=2**16, amplitude=0.5,
                             center_frequency=FC)
    bad = impairments.apply(cap, gain_imbalance_db=g_db, phase_skew_deg=phi_deg, dc_q=0.005)
    bad = quadkit.synth.add_noise(bad, snr_db=70, rng=3)
    ex = widgets.explore(bad, debounce_s=0)
    # Image rejection from DESIGN.md's formula: (1 + 2g cos phi + g^2)/(1 - 2g cos phi + g^2).
    g, phi = 10 ** (g_db / 20), math.radians(phi_deg)
    irr_db = 10 * math.log10((1 + 2 * g * math.cos(phi) + g**2) / (1 - 2 * g * math.cos(phi)
                                                                   + g**2))
    # 70 dB SNR over 65536 samples: the estimate is good to far better than 0.05 dB.
    assert float(ex.estimate.image_rejection_db) == pytest.approx(irr_db, abs=0.05)
    assert f"{float(ex.estimate.gain_imbalance_db):.4g}" in ex.balance.value
    assert "image rejection after" not in ex.balance.value
    f = _axis_factor(ex.wide_figure)
    raw = _src(ex.wide_figure, "psd")
    x = np.asarray(raw["x"]) * f
    image = int(np.argmin(np.abs(x - (FC - 125e3))))
    assert len(_src(ex.wide_figure, "corrected")["y"]) == 0
    ex.apply_button.value = True  # the button
    corr = _src(ex.wide_figure, "corrected")
    assert len(corr["y"]) == len(raw["y"])
    drop = float(raw["y"][image]) - float(corr["y"][image])
    # The image stood irr_db below the tone and now sits in the noise (70 dB SNR spread over
    # the band): it must fall by well over 20 dB.
    assert drop > 20
    assert "image rejection after" in ex.balance.value
    assert ex.apply_button.description == "undo correction"
    # The channel is now cut from the corrected capture.
    assert ex.channel_capture is not None and ex.corrected is not None
    ex.apply_button.value = False
    assert len(_src(ex.wide_figure, "corrected")["y"]) == 0


def test_errors_in_callbacks_show_in_the_widget_and_keep_the_plots(two_tones):
    ex = widgets.explore(two_tones, debounce_s=0)
    kept = np.asarray(_src(ex.figures["spectrum"], "psd")["y"]).copy()
    ex.bandwidth.value = 300e3
    kept = np.asarray(_src(ex.figures["spectrum"], "psd")["y"]).copy()
    ex.offset.value = 450e3  # 300 kHz wide around 450 kHz reaches past fs/2 = 500 kHz
    assert "outside the capture" in ex.status.value
    assert "traceback" in ex.status.value
    np.testing.assert_array_equal(np.asarray(_src(ex.figures["spectrum"], "psd")["y"]), kept)
    ex.offset.value = 200e3
    assert ex.status.value == ""


def test_scheme_gives_a_demodulated_constellation():
    rs = 50e3
    rng = np.random.default_rng(5)
    sig = quadkit.modulation.modulate(rng.integers(0, 2, 2 * 2000), "qpsk", symbol_rate=rs,
                                      sample_rate=FS, offset_hz=-200e3, power_dbfs=-6)
    sig.attrs["center_frequency"] = FC
    ex = widgets.explore(sig, debounce_s=0, offset_hz=-200e3, bandwidth_hz=1.35 * rs * 1.2)
    fig = ex.figures["constellation"]
    assert fig.select_one({"name": "ideal"}) is None  # no scheme yet: samples only
    ex.scheme.value = "qpsk"
    ex.symbol_rate.value = rs
    assert ex.status.value == "", ex.status.value
    fig = ex.figures["constellation"]
    ideal = _src(fig, "ideal")
    assert len(ideal["x"]) == 4
    # Clean signal through a flat channel filter: EVM well under 2 % (memory: a 0.01 dB
    # ripple filter and 80 dB stopband leave ~0.1 %).
    assert float(ex.analysis.evm_rms_percent) < 2
    assert "EVM" in fig.title.text
    rx = np.asarray(_src(fig, "received")["x"]) + 1j * np.asarray(_src(fig, "received")["y"])
    err = _src(fig, "error")
    ends = np.asarray(err["x1"]) + 1j * np.asarray(err["y1"])
    assert np.max(np.abs(rx - ends)) < 0.1


def test_multichannel_capture_switches_channel():
    a = quadkit.synth.tone(100e3, sample_rate=FS, n_samples=2**15).values
    b = quadkit.synth.tone(-300e3, sample_rate=FS, n_samples=2**15).values
    cap = quadkit.capture(np.stack([a, b]), sample_rate=FS, center_frequency=FC)
    ex = widgets.explore(cap, debounce_s=0)
    assert abs(_peak_hz(ex.wide_figure) - (FC + 100e3)) < 1e3
    ex.channel_select.value = 1
    assert abs(_peak_hz(ex.wide_figure) - (FC - 300e3)) < 1e3


def test_the_widget_holds_bokeh_models_and_rejects_real_captures():
    from jupyter_bokeh.widgets import BokehModel
    import ipywidgets

    cap = quadkit.synth.tone(1e3, sample_rate=1e5, n_samples=8192)
    ex = widgets.explore(cap, debounce_s=0)
    assert isinstance(ex, ipywidgets.VBox)

    def walk(w):
        yield w
        for c in getattr(w, "children", ()):
            yield from walk(c)

    assert sum(isinstance(w, BokehModel) for w in walk(ex)) == 5
    with pytest.raises(ValueError, match="downconvert"):
        widgets.explore(quadkit.synth.tone(1e3, sample_rate=1e5, n_samples=1000, real=True))


def test_in_a_kernel_the_debounced_recompute_runs_on_its_event_loop():
    # A real ipykernel (the venv's python3): the recompute is scheduled on the kernel's
    # asyncio loop (no thread touches the widgets) and runs once the kernel is idle.
    nbformat = pytest.importorskip("nbformat")
    nbclient = pytest.importorskip("nbclient")
    from nbformat.v4 import new_code_cell, new_notebook

    cells = [
        "import quadkit\nfrom quadkit import widgets\n"
        "cap = quadkit.synth.tone(1e5, sample_rate=1e6, n_samples=2**14)\n"
        "ex = widgets.explore(cap, debounce_s=0.2)\nn0 = ex.recomputes\n"
        "ex.offset.value = 1e5\nex.offset.value = 2e5\n"
        "print(type(ex.explorer._debounced._handle).__name__, ex.recomputes - n0)",
        "import asyncio\nawait asyncio.sleep(1.0)",
        "print(ex.recomputes - n0, ex.pending, ex.channel_capture.attrs['center_frequency'])",
    ]
    book = new_notebook(cells=[new_code_cell(c) for c in cells])
    nbclient.NotebookClient(book, timeout=300, kernel_name="python3").execute()
    first = book.cells[0].outputs[0]["text"].split()
    assert first == ["TimerHandle", "0"]  # pending on the loop, nothing run yet
    last = book.cells[2].outputs[0]["text"].split()
    assert last == ["1", "False", "200000.0"]  # one recompute, with the last value
