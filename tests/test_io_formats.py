"""quadkit.io: WAV (against scipy.io.wavfile), netCDF, Zarr, npy, raw, dispatch, atomic writes."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.io.wavfile as wavfile
from hypothesis import given, settings
from hypothesis import strategies as st

import quadkit
from quadkit import io as qio
from quadkit.io._atomic import FileExistsCaptureError, atomic_path

RNG = np.random.default_rng(7)


def _iq(n, channels=1, scale=0.3, dtype=np.complex64):
    shape = (channels, n) if channels > 1 else (n,)
    return ((RNG.standard_normal(shape) + 1j * RNG.standard_normal(shape)) * scale).astype(dtype)


# --- WAV against scipy.io.wavfile ---------------------------------------------------------

@pytest.mark.parametrize("dtype, scale", [("int16", 2.0**15), ("int32", 2.0**31),
                                          ("float32", 1.0)])
def test_scipy_writes_wav_we_read(tmp_path, dtype, scale):
    if dtype == "float32":
        stereo = RNG.uniform(-1, 1, (500, 2)).astype(np.float32)
        mono = RNG.uniform(-1, 1, 500).astype(np.float32)
    else:
        info = np.iinfo(dtype)
        stereo = RNG.integers(info.min, info.max, (500, 2), dtype=np.int64).astype(dtype)
        mono = RNG.integers(info.min, info.max, 500, dtype=np.int64).astype(dtype)
    wavfile.write(tmp_path / "s.wav", 96000, stereo)
    wavfile.write(tmp_path / "m.wav", 44100, mono)
    iq = qio.read_wav(tmp_path / "s.wav", center_frequency=7.1e6)
    real = qio.read("%s" % (tmp_path / "m.wav"))
    assert iq.dtype == np.complex64 and real.dtype == np.float32
    assert iq.attrs["sample_rate"] == 96000.0 and real.attrs["sample_rate"] == 44100.0
    assert iq.attrs["center_frequency"] == 7.1e6
    # channel 0 is I, channel 1 is Q; integers divided by 2**(b-1). int16 is exact in
    # float32; int32 rounds once to float32 (relative 2**-24).
    ref = stereo[:, 0].astype(np.float64) / scale + 1j * stereo[:, 1].astype(np.float64) / scale
    rtol = 2.0**-24 if dtype == "int32" else 0
    np.testing.assert_allclose(iq.values, ref, rtol=rtol, atol=0)
    np.testing.assert_allclose(real.values, mono.astype(np.float64) / scale, rtol=rtol, atol=0)
    lazy = qio.read_wav(tmp_path / "s.wav", chunks=123)
    np.testing.assert_array_equal(lazy.values, iq.values)


@pytest.mark.parametrize("dtype", ["int16", "int32", "float32"])
def test_we_write_wav_scipy_reads(tmp_path, dtype):
    cap = quadkit.capture(_iq(300), sample_rate=48000)
    qio.write_wav(cap, tmp_path / "iq.wav", dtype=dtype)
    rate, data = wavfile.read(tmp_path / "iq.wav")
    assert rate == 48000 and data.dtype == np.dtype(dtype) and data.shape == (300, 2)
    scale = {"int16": 2.0**15, "int32": 2.0**31, "float32": 1.0}[dtype]
    # integer encoding rounds to the nearest code: half a code per component
    atol = 0.5 / scale if dtype != "float32" else 0
    np.testing.assert_allclose(data[:, 0] / scale, cap.values.real, rtol=0, atol=atol + 1e-9)
    np.testing.assert_allclose(data[:, 1] / scale, cap.values.imag, rtol=0, atol=atol + 1e-9)
    real = quadkit.capture(cap.values.real, sample_rate=48000)
    qio.write_wav(real, tmp_path / "r.wav", dtype=dtype)
    assert wavfile.read(tmp_path / "r.wav")[1].shape == (300,)
    # and back through us: int16 to within half a code, float32 exactly
    back = qio.read_wav(tmp_path / "iq.wav")
    np.testing.assert_allclose(back.values, cap.values, rtol=0,
                               atol=np.sqrt(2) * atol + 1e-9)


def test_wav_needs_integer_rate(tmp_path):
    cap = quadkit.capture(_iq(10), sample_rate=48000.5)
    with pytest.raises(quadkit.CaptureError, match="whole number of hertz"):
        qio.write_wav(cap, tmp_path / "x.wav")
    assert not list(tmp_path.iterdir())


def test_wav_multichannel_iq_pairs(tmp_path):
    cap = quadkit.capture(_iq(64, channels=2), sample_rate=8000)
    qio.write_wav(cap, tmp_path / "four.wav", dtype="float32")
    _, data = wavfile.read(tmp_path / "four.wav")
    # channel k's I and Q are WAV channels 2k and 2k+1
    np.testing.assert_array_equal(data[:, 2], cap.values[1].real)
    np.testing.assert_array_equal(data[:, 3], cap.values[1].imag)
    back = qio.read_wav(tmp_path / "four.wav", iq=True)
    np.testing.assert_array_equal(back.values, cap.values)
    assert qio.read_wav(tmp_path / "four.wav").sizes["channel"] == 4  # default: 4 real


# --- netCDF and Zarr: bit-exact -----------------------------------------------------------

def _awkward_complex64(n=257):
    bits = RNG.integers(0, 2**32, 2 * n, dtype=np.uint64).astype(np.uint32)
    x = bits.view(np.float32).copy()
    x[~np.isfinite(x)] = 0.0
    # signed zeros, the smallest subnormal, the largest float32
    x[:6] = [-0.0, 0.0, np.float32(1e-45), -np.finfo(np.float32).max, 1.0, -1.0]
    return x.view(np.complex64)


@pytest.mark.parametrize("kind", ["netcdf", "zarr"])
@pytest.mark.parametrize("channels", [1, 2])
def test_store_round_trip_bit_exact(tmp_path, kind, channels):
    x = np.stack([_awkward_complex64() for _ in range(channels)]) if channels > 1 \
        else _awkward_complex64()
    notes = [{"start_sample": 3, "sample_count": 4, "label": "spur", "comment": "bench"}]
    cap = quadkit.capture(x, sample_rate=3.84e6, center_frequency=1.8e9,
                          annotations=notes, calibration_db=-20.25,
                          start_time="2026-01-01T00:00:00Z",
                          flag=True, note=None)
    cap = cap.isel(time=slice(5, None))  # a slice: the time of the first sample is kept
    ext = ".nc" if kind == "netcdf" else ".zarr"
    qio.write(cap, tmp_path / f"c{ext}")
    back = qio.read(tmp_path / f"c{ext}")
    assert back.dtype == np.complex64 and back.dims == cap.dims
    # bit-exact: compare the stored bit patterns, which also tells -0.0 from 0.0
    assert np.array_equal(back.values.view(np.uint32), cap.values.view(np.uint32))
    assert back.attrs == cap.attrs
    np.testing.assert_allclose(back.time.values, cap.time.values, rtol=1e-12)
    lazy = qio.read(tmp_path / f"c{ext}", chunks=50)
    assert quadkit._capture.is_lazy(lazy)
    assert np.array_equal(lazy.values.view(np.uint32), cap.values.view(np.uint32))


@pytest.mark.parametrize("engine", ["scipy", None])
def test_netcdf_engines_bit_exact(tmp_path, engine):
    # netCDF-3 through scipy (the fallback when no netCDF-4 library is installed) too
    cap = quadkit.capture(np.stack([_awkward_complex64(), _awkward_complex64()]),
                          sample_rate=1e6, annotations=[{"start_sample": 1, "label": "x"}])
    qio.write_netcdf(cap, tmp_path / "e.nc", engine=engine)
    back = qio.read_netcdf(tmp_path / "e.nc")
    assert np.array_equal(back.values.view(np.uint32), cap.values.view(np.uint32))
    assert back.attrs == cap.attrs
    np.testing.assert_array_equal(back["channel"].values, [0, 1])


def test_store_keeps_complex128(tmp_path):
    cap = quadkit.capture(_iq(40, dtype=np.complex128), sample_rate=1.0)
    qio.write_netcdf(cap, tmp_path / "w.nc")
    back = qio.read_netcdf(tmp_path / "w.nc")
    assert back.dtype == np.complex128
    np.testing.assert_array_equal(back.values, cap.values)


# --- npy and raw ----------------------------------------------------------------------------

def test_npy_round_trip_and_no_pickles(tmp_path):
    cap = quadkit.capture(_iq(100, channels=2), sample_rate=1e6)
    qio.write_npy(cap, tmp_path / "x.npy")
    np.testing.assert_array_equal(np.load(tmp_path / "x.npy"), cap.values)  # numpy reads it
    back = qio.read(tmp_path / "x.npy", sample_rate=1e6)
    np.testing.assert_array_equal(back.values, cap.values)
    lazy = qio.read_npy(tmp_path / "x.npy", sample_rate=1e6, chunks=33)
    np.testing.assert_array_equal(lazy.values, cap.values)
    np.save(tmp_path / "obj.npy", np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with pytest.raises(quadkit.CaptureError, match="Python objects"):
        qio.read_npy(tmp_path / "obj.npy", sample_rate=1.0)


def test_raw_offset_count_and_channels(tmp_path):
    header = b"HDR-bench7" * 3
    codes = RNG.integers(-128, 128, 2 * 2 * 50, dtype=np.int64).astype(np.int8)
    (tmp_path / "r.bin").write_bytes(header + codes.tobytes())
    cap = qio.read(tmp_path / "r.bin", dtype="ci8", sample_rate=2e6, center_frequency=1e8,
                   offset=len(header), count=40, num_channels=2)
    frames = codes.astype(np.float64).reshape(50, 2, 2) / 128  # (sample, channel, I/Q)
    ref = (frames[..., 0] + 1j * frames[..., 1]).T[:, :40]
    np.testing.assert_array_equal(cap.values, ref)
    assert cap.attrs["center_frequency"] == 1e8


@settings(max_examples=25, deadline=None)
@given(dtype=st.sampled_from(["ci16_le", "cf32_be", "cu8", "ri16_be", "rf64_le"]),
       n=st.integers(1, 200))
def test_raw_write_read_inverse(tmp_path_factory, dtype, n):
    folder = tmp_path_factory.mktemp("raw")
    real = dtype[0] == "r"
    # inside full scale, so no clipping
    x = RNG.uniform(-0.99, 0.99, (n, 2)).astype(np.float32)
    x = x[:, 0].copy() if real else x.view(np.complex64)[:, 0]
    cap = quadkit.capture(x, sample_rate=1.0)
    qio.write_raw(cap, folder / "x.raw", dtype=dtype)
    back = qio.read_raw(folder / "x.raw", dtype=dtype, sample_rate=1.0)
    bits = {"ci16_le": 16, "cu8": 8, "ri16_be": 16}.get(dtype)
    # integer: half a code per component (round to nearest); float: exact (float32 fits)
    atol = 0.0 if bits is None else 0.5 / 2 ** (bits - 1) * (1 if real else np.sqrt(2))
    np.testing.assert_allclose(back.values, x, rtol=0, atol=atol + 1e-9)
    # writing what was read gives the same bytes (the decode/encode pair is an inverse)
    qio.write_raw(back, folder / "y.raw", dtype=dtype)
    assert (folder / "y.raw").read_bytes() == (folder / "x.raw").read_bytes()


# --- atomic writing -----------------------------------------------------------------------

@pytest.mark.parametrize("name", ["a.sigmf-meta", "a.sigmf", "a.wav", "a.nc", "a.zarr",
                                  "a.npy", "a.cs16"])
def test_existing_file_is_not_replaced(tmp_path, name):
    cap = quadkit.capture(_iq(16), sample_rate=1000)
    opts = {"dtype": "ci16_le"} if name.endswith(".cs16") else {}
    qio.write(cap, tmp_path / name, **opts)
    before = sorted(p.name for p in tmp_path.iterdir())
    with pytest.raises(FileExistsCaptureError, match="exists; pass overwrite=True"):
        qio.write(cap * 0, tmp_path / name, **opts)
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # no temporary left
    # the error is also a ValueError (command-line user error) and a FileExistsError
    assert issubclass(FileExistsCaptureError, ValueError)
    assert issubclass(FileExistsCaptureError, FileExistsError)
    qio.write(quadkit.capture(_iq(8), sample_rate=1000), tmp_path / name, overwrite=True, **opts)
    extra = {"dtype": "ci16_le", "sample_rate": 1000} if name.endswith(".cs16") else {}
    if name.endswith(".npy"):
        extra = {"sample_rate": 1000}
    assert qio.read(tmp_path / name, **extra).sizes["time"] == 8
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_failure_while_writing_leaves_nothing(tmp_path):
    import dask.array as da

    def boom(block):
        if block.size and block[0] == 0.5:
            raise RuntimeError("sensor unplugged")
        return block

    good = np.full(100, 0.25, np.complex64)
    good[60:] = 0.5
    lazy = quadkit.capture(da.from_array(good, chunks=30).map_blocks(boom), sample_rate=10.0)
    for name in ("f.sigmf-meta", "f.sigmf", "f.wav", "f.raw"):
        opts = {"dtype": "cf32_le"} if name.endswith(".raw") else {}
        with pytest.raises(RuntimeError, match="sensor unplugged"):
            qio.write(lazy, tmp_path / name, **opts)
    assert list(tmp_path.iterdir()) == []


def test_atomic_path_for_other_writers(tmp_path):
    target = tmp_path / "report.html"
    with atomic_path(target) as tmp:
        assert tmp.parent == target.parent and not target.exists()
        tmp.write_text("<p>bench</p>")
    assert target.read_text() == "<p>bench</p>"
    with pytest.raises(KeyError), atomic_path(target, overwrite=True) as tmp:
        tmp.write_text("half")
        raise KeyError("stop")
    assert target.read_text() == "<p>bench</p>"
    assert [p.name for p in tmp_path.iterdir()] == ["report.html"]
