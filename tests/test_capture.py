"""The capture container, validation, results helpers, accessor and testing helpers."""

from __future__ import annotations

import json
import pickle

import dask
import dask.array as da
import numpy as np
import pytest
import xarray as xr

import quadkit
from quadkit import CaptureError, MeasurementError, _capture
from quadkit.testing import assert_captures_close, raise_if_dask_computes


def test_capture_defaults_and_attrs():
    x = np.arange(10, dtype=np.complex64)
    cap = quadkit.capture(x, sample_rate=2e6, center_frequency=433.92e6, description="bench")
    assert cap.dims == ("time",)
    assert cap.dtype == np.complex64
    assert cap.attrs["sample_rate"] == 2e6
    assert cap.attrs["center_frequency"] == 433.92e6
    assert cap.attrs["full_scale"] == 1.0
    assert cap.attrs["description"] == "bench"
    # time in seconds from the first sample: t_n = n / fs (definition of uniform sampling)
    np.testing.assert_allclose(cap.time.values, np.arange(10) / 2e6, rtol=0, atol=1e-18)
    assert cap.time.attrs["units"] == "s"


def test_complex128_is_kept_and_lists_become_complex64():
    assert quadkit.capture(np.zeros(4, np.complex128), sample_rate=1).dtype == np.complex128
    assert quadkit.capture([1 + 1j, 2], sample_rate=1).dtype == np.complex64
    assert quadkit.capture([1.0, 2.0], sample_rate=1).dtype == np.float32


def test_two_channel_capture():
    x = np.zeros((3, 16), np.complex64)
    cap = quadkit.capture(x, sample_rate=1e3)
    assert cap.dims == ("channel", "time")
    assert list(cap.channel.values) == [0, 1, 2]


@pytest.mark.parametrize("rate", [0, -1.0, float("nan"), float("inf"), None, "fast"])
def test_bad_sample_rate(rate):
    with pytest.raises(CaptureError, match="sample_rate"):
        quadkit.capture(np.zeros(4, np.complex64), sample_rate=rate)


def test_bad_dims_and_dtype():
    with pytest.raises(CaptureError, match="dimensions"):
        quadkit.capture(np.zeros((2, 2, 2), np.complex64), sample_rate=1)
    with pytest.raises(CaptureError, match="dtype"):
        quadkit.capture(np.array(["a", "b"]), sample_rate=1)


def test_lazy_time_coordinate_costs_no_memory():
    # 2^34 samples would be 128 GiB of complex64 and 128 GiB of float64 times if stored.
    n = 2**34
    data = da.zeros(n, dtype=np.complex64, chunks=2**26)
    cap = quadkit.capture(data, sample_rate=1e9)
    assert _capture.is_lazy(cap)
    assert type(cap.xindexes["time"]).__name__ == "RangeIndex"
    assert float(cap.time[-1]) == pytest.approx((n - 1) / 1e9)
    # slicing keeps absolute times, and start_index follows
    sub = cap.isel(time=slice(1000, 1010))
    assert _capture.start_index(sub) == 1000


def test_validate_reports_count_and_first():
    x = np.zeros((2, 100), np.complex64)
    x[1, 42] = np.inf
    x[1, 50] = np.nan
    with pytest.raises(CaptureError, match=r"2 non-finite samples.*channel 1, sample 42"):
        quadkit.validate(quadkit.capture(x, sample_rate=1))


def test_validate_lazy_and_good():
    x = np.ones(1000, np.complex64)
    x[777] = np.nan
    lazy = quadkit.capture(da.from_array(x, chunks=100), sample_rate=1)
    with pytest.raises(CaptureError, match="sample 777"):
        quadkit.validate(lazy)
    good = quadkit.capture(np.ones(10, np.complex64), sample_rate=5)
    assert quadkit.validate(good) is good


def test_validate_rejects_wrong_things():
    with pytest.raises(CaptureError, match="expected a capture"):
        quadkit.validate(np.zeros(3))
    cap = quadkit.capture(np.zeros(3, np.complex64), sample_rate=1)
    bad = cap.copy()
    del bad.attrs["sample_rate"]
    with pytest.raises(CaptureError, match="missing"):
        quadkit.validate(bad)
    with pytest.raises(CaptureError, match="dims"):
        quadkit.validate(cap.rename(time="t"))


def test_errors_are_value_errors():
    assert issubclass(CaptureError, ValueError)
    assert issubclass(MeasurementError, ValueError)


def test_to_json_is_plain_and_valid():
    ds = xr.Dataset(
        {
            "power_dbfs": ((), np.float32(-3.5)),
            "bad": ((), np.nan),
            "tone_hz": ("tone", np.array([1.0, 2.0])),
            "z": ((), np.complex64(1 + 2j)),
        },
        coords={"tone": [0, 1]},
    )
    out = quadkit.to_json(ds)
    text = json.dumps(out, allow_nan=False)  # NaN must have become null
    back = json.loads(text)
    assert back["power_dbfs"] == -3.5
    assert back["bad"] is None
    assert back["tone_hz"] == [1.0, 2.0]
    assert back["z"] == {"real": 1.0, "imag": 2.0}
    lazy = xr.Dataset({"a": ("x", da.arange(3, chunks=2))})
    assert quadkit.to_json(lazy) == {"a": [0, 1, 2]}  # computed, no index coordinate


def test_accessor_forwards_to_the_function():
    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000)
    a = cap.qk.add_noise(snr_db=10, rng=3)
    b = quadkit.synth.add_noise(cap, snr_db=10, rng=3)
    assert_captures_close(a, b, atol=0)
    with pytest.raises(AttributeError, match="no function"):
        cap.qk.no_such_function


def test_accessor_names_are_unique_across_modules():
    import importlib

    from quadkit.accessor import _MODULES

    seen: dict[str, str] = {}
    for modname in _MODULES:
        try:
            mod = importlib.import_module(modname)
        except ModuleNotFoundError:
            continue
        for name in getattr(mod, "_ACCESSOR", ()):
            assert name not in seen, f"{name} forwarded by {seen.get(name)} and {modname}"
            assert callable(getattr(mod, name))
            seen[name] = modname


def test_raise_if_dask_computes_guard():
    x = da.ones(10, chunks=5)
    with raise_if_dask_computes():
        y = x + 1  # building a graph computes nothing
    with pytest.raises(RuntimeError, match="too many dask computations"):
        with raise_if_dask_computes():
            y.compute()


def test_captures_pickle():
    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=64)
    back = pickle.loads(pickle.dumps(cap))
    assert_captures_close(back, cap, atol=0)


def test_import_is_light():
    import subprocess
    import sys

    code = "import sys, quadkit; print('bokeh' in sys.modules, 'ipywidgets' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["False", "False"]


def test_random_chunks_and_as_lazy():
    from quadkit.testing import as_lazy, random_chunks

    sizes = random_chunks(1001, rng=3, n_chunks=5)
    assert sum(sizes) == 1001 and len(sizes) == 5 and sizes[-1] == min(sizes)
    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1001).isel(time=slice(1, None))
    lazy = as_lazy(cap, 300)
    assert _capture.is_lazy(lazy) and lazy.chunks[0] == (300, 300, 300, 100)
    assert_captures_close(lazy, cap, atol=0)  # same samples, same absolute times


def test_to_json_of_a_dataarray_keeps_its_axes():
    da_ = xr.DataArray([-3.0, -6.0], dims="frequency", name="psd",
                       coords={"frequency": [1e6, 2e6], "offset": ("frequency", [-5e5, 5e5])},
                       attrs={"units": "dBFS/Hz"})
    assert quadkit.to_json(da_) == {"psd": [-3.0, -6.0], "frequency": [1e6, 2e6],
                                    "offset": [-5e5, 5e5], "units": "dBFS/Hz"}


def test_accessor_shows_the_signature_without_the_capture():
    import inspect

    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=100)
    params = list(inspect.signature(cap.qk.add_noise).parameters)
    assert params[0] == "snr_db"


def test_integer_samples_take_their_code_range_as_full_scale():
    codes = np.array([16384, -16384, 16384, -16384], dtype=np.int16)
    cap = quadkit.capture(codes, sample_rate=1e3)
    assert cap.dtype == np.float32 and cap.attrs["full_scale"] == 32768.0
    # half-scale codes: 20 log10(1/2) = -6.02 dBFS (DESIGN power convention)
    p = 10 * np.log10(np.mean(cap.values.astype(float) ** 2) / cap.attrs["full_scale"] ** 2)
    assert p == pytest.approx(-6.0206, abs=1e-3)
    assert quadkit.capture(codes, sample_rate=1e3, full_scale=1.0).attrs["full_scale"] == 1.0


def test_xarray_chunked_capture_builds_lazily():
    from quadkit import mixing

    cap = quadkit.synth.tone(1e3, sample_rate=1e6, n_samples=1000)
    lazy = cap.chunk({"time": 300}).isel(time=slice(100, None))
    with raise_if_dask_computes():
        assert _capture.start_index(lazy) == 100
        out = mixing.shift(lazy, 1e3)
    assert _capture.is_lazy(out)
