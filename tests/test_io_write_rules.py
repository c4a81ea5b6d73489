"""quadkit.io writing rules: integer files hold samples / full_scale, clipping warns, NaN/Inf
raise, time slices are rebased, truncated WAV and missing folders raise CaptureError."""

from __future__ import annotations

import datetime as dt
import json
import warnings

import dask.array as da
import numpy as np
import pytest
import scipy.io.wavfile as wavfile

import quadkit
from quadkit import CaptureError
from quadkit import cli
from quadkit import io as qio

# REFERENCES.md: [1+2j, -3-4j] as ci16_le = bytes 01000200fdfffcff
CI16_HEX = "01000200fdfffcff"
VALUES = np.array([1 + 2j, -3 - 4j], np.complex64)


def _dbfs(x, full_scale):
    # DESIGN.md: a complex sample of magnitude full_scale is 0 dBFS
    return 20 * np.log10(np.abs(x) / full_scale)


def _no_warnings():
    ctx = warnings.catch_warnings()
    ctx.__enter__()
    warnings.simplefilter("error")
    return ctx


# --- 1. integer writes divide by full_scale ------------------------------------------------

def test_ci16_sigmf_writes_reference_bytes_for_full_scale_32768(tmp_path):
    cap = quadkit.capture(VALUES, sample_rate=1e3, full_scale=32768)
    qio.write_sigmf(cap, tmp_path / "x", dtype="ci16_le")
    assert (tmp_path / "x.sigmf-data").read_bytes().hex() == CI16_HEX  # REFERENCES.md
    meta = json.loads((tmp_path / "x.sigmf-meta").read_text())
    # the file's full scale is the integer range: no quadkit:full_scale in integer files
    assert "quadkit:full_scale" not in meta["global"]
    back = qio.read(tmp_path / "x.sigmf-meta")
    assert back.attrs["full_scale"] == 1.0
    assert back.dtype == np.complex64
    # ci16 scaling x / 32768 (SigMF reference library autoscale); exact for 16-bit codes
    np.testing.assert_array_equal(back.values, VALUES / np.float32(32768))
    # same dBFS in the capture and in the file (exact: division by a power of two)
    np.testing.assert_array_equal(_dbfs(back.values, 1.0), _dbfs(VALUES, 32768.0))


def test_raw_and_wav_integer_writes_divide_by_full_scale(tmp_path):
    cap = quadkit.capture(VALUES, sample_rate=48000, full_scale=32768)
    qio.write_raw(cap, tmp_path / "x.ci16", dtype="ci16_le")
    assert (tmp_path / "x.ci16").read_bytes().hex() == CI16_HEX  # REFERENCES.md
    qio.write_wav(cap, tmp_path / "x.wav", dtype="int16")
    rate, codes = wavfile.read(tmp_path / "x.wav")  # scipy as the reference reader
    np.testing.assert_array_equal(codes, [[1, 2], [-3, -4]])
    # int32: full scale 2**31 (the 16-bit values times 2**16); reference: scipy reader
    qio.write_wav(cap, tmp_path / "x32.wav", dtype="int32")
    np.testing.assert_array_equal(wavfile.read(tmp_path / "x32.wav")[1],
                                  np.array([[1, 2], [-3, -4]]) * 2**16)


def test_float_datatypes_keep_samples_and_full_scale(tmp_path):
    cap = quadkit.capture(VALUES, sample_rate=1e3, full_scale=32768)
    qio.write_sigmf(cap, tmp_path / "f", dtype="cf32_le")
    # REFERENCES.md: [1+2j, -3-4j] as cf32_le
    assert (tmp_path / "f.sigmf-data").read_bytes().hex() == "0000803f00000040000040c0000080c0"
    meta = json.loads((tmp_path / "f.sigmf-meta").read_text())
    assert meta["global"]["quadkit:full_scale"] == 32768
    assert qio.read(tmp_path / "f.sigmf-meta").attrs["full_scale"] == 32768


def test_cli_convert_to_ci16_divides_by_full_scale(tmp_path, capsys):
    cap = quadkit.capture(VALUES, sample_rate=1e3, full_scale=32768)
    qio.write_sigmf(cap, tmp_path / "f", dtype="cf32_le")
    rc = cli.main(["convert", str(tmp_path / "f.sigmf-meta"), str(tmp_path / "i.sigmf-meta"),
                   "--out-dtype", "ci16_le"])
    assert rc == 0
    assert (tmp_path / "i.sigmf-data").read_bytes().hex() == CI16_HEX  # REFERENCES.md


# --- 2. clipping warns --------------------------------------------------------------------

def test_clipping_warns_once_with_the_count(tmp_path):
    # 3 of 5 samples beyond full_scale=2 (I or Q past it); common practice: an integer file
    # can only hold the codes -2**15 .. 2**15 - 1
    x = np.array([2.5, 1 + 3j, 0.5, -2.1j, 1.9], np.complex64)
    cap = quadkit.capture(x, sample_rate=1e3, full_scale=2.0)
    with pytest.warns(RuntimeWarning, match=r"3 of 5 samples clipped.*exceeded full scale") \
            as record:
        qio.write_sigmf(cap, tmp_path / "c", dtype="ci16_le")
    assert len([w for w in record if w.category is RuntimeWarning]) == 1
    assert "c.sigmf-meta" in str(record[0].message)
    codes = np.fromfile(tmp_path / "c.sigmf-data", "<i2").reshape(-1, 2)
    # reference: numpy round-half-even then clip to the int16 range
    want = np.clip(np.rint(np.stack([x.real, x.imag], 1) / 2.0 * 32768), -32768, 32767)
    np.testing.assert_array_equal(codes, want)
    with pytest.warns(RuntimeWarning, match=r"x\.wav: 3 of 5 samples clipped"):
        qio.write_wav(cap, tmp_path / "x.wav", dtype="int16")
    with pytest.warns(RuntimeWarning, match=r"x\.cu8: 3 of 5 samples clipped"):
        qio.write_raw(cap, tmp_path / "x.cu8", dtype="cu8")


def test_lazy_clipping_counts_over_all_chunks(tmp_path):
    x = np.zeros(37, np.complex64)
    x[[2, 20, 36]] = 1.5  # one in each of three chunks
    cap = quadkit.capture(da.from_array(x, chunks=(13, 13, 11)), sample_rate=1e3)
    with pytest.warns(RuntimeWarning, match=r"3 of 37 samples clipped"):
        qio.write_raw(cap, tmp_path / "x.ci16", dtype="ci16_le")


def test_exactly_full_scale_does_not_warn(tmp_path):
    # +1.0 becomes 32767 by design (documented), not counted as beyond full scale
    cap = quadkit.capture(np.array([1, -1, 1j, -1j], np.complex64), sample_rate=1e3)
    ctx = _no_warnings()
    try:
        qio.write_raw(cap, tmp_path / "x.ci16", dtype="ci16_le")
        qio.write_wav(cap, tmp_path / "x.wav")
    finally:
        ctx.__exit__(None, None, None)


# --- 3. NaN/Inf in integer writes ---------------------------------------------------------

def test_non_finite_raise_for_integer_datatypes(tmp_path):
    x = np.zeros(10, np.complex64)
    x[3] = np.nan
    x[7] = complex(1, np.inf)
    cap = quadkit.capture(x, sample_rate=1e3)
    ctx = _no_warnings()  # no numpy "invalid value encountered in cast" either
    try:
        for name, call in [("n.sigmf-meta", lambda p: qio.write_sigmf(cap, p, dtype="ci16_le")),
                           ("n.sigmf", lambda p: qio.write_sigmf(cap, p, dtype="cu8")),
                           ("n.wav", lambda p: qio.write_wav(cap, p, dtype="int32")),
                           ("n.ci8", lambda p: qio.write_raw(cap, p, dtype="ci8"))]:
            with pytest.raises(CaptureError,
                               match=rf"{name.replace('.', '[.]')}: 2 non-finite samples .*"
                                     r"the first is sample 3"):
                call(tmp_path / name)
    finally:
        ctx.__exit__(None, None, None)
    assert list(tmp_path.iterdir()) == []  # nothing half-written left behind


def test_non_finite_lazy_multichannel_names_channel_and_index(tmp_path):
    x = np.zeros((2, 30), np.complex64)
    x[1, 17] = np.inf  # in the second of three chunks
    x[0, 25] = np.nan
    cap = quadkit.capture(da.from_array(x, chunks=(2, 11)), sample_rate=1e3)
    with pytest.raises(CaptureError, match=r"2 non-finite samples .*channel 1, sample 17"):
        qio.write_raw(cap, tmp_path / "x.ci16", dtype="ci16_le")


def test_non_finite_kept_for_float_datatypes(tmp_path):
    x = np.array([np.nan, np.inf, 1j], np.complex64)
    cap = quadkit.capture(x, sample_rate=1e3)
    qio.write_raw(cap, tmp_path / "x.cf32", dtype="cf32_le")
    # reference: numpy's own cf32 little-endian bytes
    assert (tmp_path / "x.cf32").read_bytes() == x.astype("<c8").tobytes()


# --- 4. time slices rebased ---------------------------------------------------------------

T0 = dt.datetime(2026, 3, 1, 12, 0, 0, tzinfo=dt.timezone.utc)


def _stamp(seconds):
    # Python datetime arithmetic as the reference, printed RFC 3339 with 'Z'
    t = T0 + dt.timedelta(seconds=seconds)
    return t.strftime("%Y-%m-%dT%H:%M:%S.%f").rstrip("0").rstrip(".") + "Z"


def _when(text):
    # RFC 3339 in UTC with 'Z' (SigMF core:datetime), compared as instants to the nanosecond
    assert text.endswith("Z") and "T" in text
    return np.datetime64(text[:-1], "ns")


def _segmented():
    x = (np.arange(1000) * (1 + 1j) / 1000).astype(np.complex64)
    notes = [{"start_sample": 0, "sample_count": 100, "label": "a"},
             {"start_sample": 200, "sample_count": 100, "label": "b"},
             {"start_sample": 300, "sample_count": 50, "label": "c"},
             {"start_sample": 900, "sample_count": 50, "label": "d"}]
    segs = [{"start_sample": 0, "center_frequency": 1.0e9, "start_time": _stamp(0)},
            {"start_sample": 500, "center_frequency": 1.1e9, "start_time": _stamp(0.5)}]
    return quadkit.capture(x, sample_rate=1e3, center_frequency=1.0e9, start_time=_stamp(0),
                           annotations=notes, segments=segs)


def test_slice_rebases_annotations_segments_and_datetime(tmp_path):
    cap = _segmented()
    k = 250
    qio.write_sigmf(cap[k:], tmp_path / "s")
    meta = json.loads((tmp_path / "s.sigmf-meta").read_text())
    # indices relative to the slice start: start - k; "a" ends before the slice (dropped),
    # "b" straddles it (starts at 0, count 200 + 100 - k)
    notes = [(a["core:label"], a["core:sample_start"], a["core:sample_count"])
             for a in meta["annotations"]]
    assert notes == [("b", 0, 200 + 100 - k), ("c", 300 - k, 50), ("d", 900 - k, 50)]
    caps = [(c["core:sample_start"], c["core:frequency"], _when(c["core:datetime"]))
            for c in meta["captures"]]
    # the segment covering the slice start moves to 0 with its time + k / fs; the later one
    # keeps its own time stamp
    assert caps == [(0, 1.0e9, _when(_stamp(k / 1e3))), (500 - k, 1.1e9, _when(_stamp(0.5)))]
    back = qio.read(tmp_path / "s.sigmf-meta")
    np.testing.assert_array_equal(back.values, cap.values[k:])


def test_slice_past_a_segment_border_writes(tmp_path):
    cap = _segmented()
    qio.write_sigmf(cap[700:], tmp_path / "p", dtype="ci16_le")  # raised before
    meta = json.loads((tmp_path / "p.sigmf-meta").read_text())
    assert [(c["core:sample_start"], c["core:frequency"], _when(c["core:datetime"]))
            for c in meta["captures"]] == [(0, 1.1e9, _when(_stamp(0.7)))]
    assert [(a["core:label"], a["core:sample_start"]) for a in meta["annotations"]] \
        == [("d", 200)]
    back = qio.read(tmp_path / "p.sigmf-meta")
    assert back.attrs["center_frequency"] == 1.1e9
    assert _when(back.attrs["start_time"]) == _when(_stamp(0.7))


def test_slice_without_segments_advances_start_time(tmp_path):
    x = np.zeros(2000, np.complex64)
    cap = quadkit.capture(x, sample_rate=4e3, start_time="2026-03-01T12:00:00Z")
    qio.write_sigmf(cap[1001:], tmp_path / "t")
    meta = json.loads((tmp_path / "t.sigmf-meta").read_text())
    assert _when(meta["captures"][0]["core:datetime"]) == _when(_stamp(1001 / 4e3))


# --- 5. truncated WAV ---------------------------------------------------------------------

def test_truncated_wav_raises_with_missing_bytes(tmp_path):
    path = tmp_path / "cut.wav"
    wavfile.write(path, 8000, np.zeros((100, 2), np.int16))  # scipy writes the reference
    raw = path.read_bytes()
    path.write_bytes(raw[:-40])
    with pytest.raises(CaptureError, match=r"cut\.wav: truncated.*400 bytes.*40 bytes are "
                                           r"missing"):
        qio.read_wav(path)


# --- 6. missing folder --------------------------------------------------------------------

@pytest.mark.parametrize("name", ["a.sigmf-meta", "a.wav", "a.nc", "a.npy"])
def test_missing_folder_raises_capture_error(tmp_path, name):
    cap = quadkit.capture(VALUES, sample_rate=1e3)
    with pytest.raises(CaptureError, match=r"folder .*nope does not exist; create it") as info:
        qio.write(cap, tmp_path / "nope" / name)
    assert isinstance(info.value, FileNotFoundError)  # old handlers keep working


def test_formats_without_metadata_say_what_they_leave_out(tmp_path):
    import quadkit
    from quadkit import io

    cap = quadkit.capture(np.array([0.5, 0.25j, -0.5, 0], np.complex64), sample_rate=48000,
                          center_frequency=145.8e6, description="bench")
    for name, write in (("a.wav", io.write_wav), ("a.npy", io.write_npy)):
        with pytest.warns(io.MetadataLossWarning, match="center_frequency.*description"):
            write(cap, tmp_path / name)
    with pytest.warns(io.MetadataLossWarning, match="center_frequency"):
        io.write_raw(cap, tmp_path / "a.iq", dtype="ci16_le")
    two = quadkit.capture(np.zeros((2, 4), np.complex64), sample_rate=48000)
    with pytest.warns(io.MetadataLossWarning, match=r"iq=True"):
        io.write_wav(two, tmp_path / "two.wav")
    back = io.read_wav(tmp_path / "two.wav", iq=True)
    assert back.sizes["channel"] == 2 and back.dtype == np.complex64
    # SigMF keeps everything: no warning
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        io.write_sigmf(cap, tmp_path / "a.sigmf-meta")
