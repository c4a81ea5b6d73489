"""quadkit.io, SigMF part: datatypes, conformance against the ``sigmf`` package, metadata.

The ``sigmf`` package (the reference implementation of the open SigMF standard) is the
outside oracle for conformance: files we write must read back through it with the same
samples and fields, and files it writes must read back through us.
"""

from __future__ import annotations

import hashlib
import json
import warnings

import numpy as np
import pytest
import sigmf
from hypothesis import given, settings
from hypothesis import strategies as st
from sigmf import SigMFFile

import quadkit
from quadkit import io as qio
from quadkit.io._datatypes import KNOWN_DATATYPES, parse_datatype

RNG = np.random.default_rng(20261201)


def _np_component(name: str) -> np.dtype:
    """numpy dtype of one stored component, derived independently of quadkit's parser."""
    base = name[1:].split("_")[0]
    order = {"le": "<", "be": ">"}.get(name.split("_")[-1], "|") if "_" in name else "|"
    return np.dtype(f"{order}{base[0]}{int(base[1:]) // 8}")


def _reference_decode(raw: bytes, name: str, channels: int = 1) -> np.ndarray:
    """SigMF "autoscale" in float64: signed x / 2**(b-1), unsigned (x - 2**(b-1)) / 2**(b-1).

    Common practice for fixed-point IQ, and what the sigmf package does (sigmffile.py,
    ``_read_datafile``).
    """
    comp = _np_component(name)
    x = np.frombuffer(raw, comp).astype(np.float64)
    if name[1] in "iu":
        bits = comp.itemsize * 8
        if name[1] == "u":
            x = x - 2.0 ** (bits - 1)
        x = x / 2.0 ** (bits - 1)
    if name[0] == "c":
        x = x[0::2] + 1j * x[1::2]
    if channels > 1:
        x = x.reshape(-1, channels).T
    return x


def _write_pair(folder, stem, raw: bytes, meta: dict):
    (folder / f"{stem}.sigmf-data").write_bytes(raw)
    (folder / f"{stem}.sigmf-meta").write_text(json.dumps(meta))
    return folder / f"{stem}.sigmf-meta"


# --- datatype grammar and bytes from REFERENCES.md --------------------------------------

def test_grammar_lists_all_28_datatypes():
    # SigMF core:datatype grammar: 2 x 6 wide bases x 2 byte orders + 2 x 2 byte-wide bases
    assert len(KNOWN_DATATYPES) == 2 * 6 * 2 + 2 * 2
    for bad in ("ci8_le", "cf16_le", "ci24_le", "cf64", "ci16", "CI16_LE", "cu8_be", "ri64_le"):
        with pytest.raises(quadkit.CaptureError, match="unknown datatype"):
            parse_datatype(bad)


def test_bytes_per_sample_from_references():
    # REFERENCES.md, SigMF: ci16_le 4, cf32_le 8, cu8 2, ri16_be 2 bytes per sample
    for name, size in (("ci16_le", 4), ("cf32_le", 8), ("cu8", 2), ("ri16_be", 2)):
        assert parse_datatype(name).sample_bytes == size


@pytest.mark.parametrize("name, hexbytes, scale", [
    # REFERENCES.md: [1+2j, -3-4j] as ci16_le and as cf32_le
    ("ci16_le", "01000200fdfffcff", 32768.0),
    ("cf32_le", "0000803f00000040000040c0000080c0", 1.0),
])
def test_reference_bytes_both_ways(tmp_path, name, hexbytes, scale):
    values = np.array([1 + 2j, -3 - 4j])
    cap = quadkit.capture((values / scale).astype(np.complex64), sample_rate=1e3)
    qio.write_sigmf(cap, tmp_path / "ref", dtype=name)
    assert (tmp_path / "ref.sigmf-data").read_bytes().hex() == hexbytes
    qio.write_raw(cap, tmp_path / "ref.bin", dtype=name)
    assert (tmp_path / "ref.bin").read_bytes().hex() == hexbytes
    back = qio.read_raw(tmp_path / "ref.bin", dtype=name, sample_rate=1e3)
    assert back.dtype == np.complex64
    np.testing.assert_array_equal(back.values * scale, values)  # exact: powers of two


# --- every datatype round-trips (hypothesis) ---------------------------------------------

@st.composite
def _recordings(draw):
    name = draw(st.sampled_from(KNOWN_DATATYPES))
    channels = draw(st.integers(1, 3))
    n = draw(st.integers(1, 40))
    comp = _np_component(name)
    count = n * channels * (2 if name[0] == "c" else 1)
    if name[1] == "f":
        width = comp.itemsize * 8
        values = draw(st.lists(st.floats(width=width, allow_nan=False, allow_infinity=False),
                               min_size=count, max_size=count))
    else:
        info = np.iinfo(comp)
        values = draw(st.lists(st.integers(int(info.min), int(info.max)),
                               min_size=count, max_size=count))
        if comp.itemsize == 4:
            # 32-bit codes decode to float32 (24-bit mantissa): keep codes float32 holds
            # exactly, so the byte round trip can be exact; rounding is tested separately.
            values = [v - v % 256 for v in values]
    raw = np.array(values, dtype=comp.newbyteorder("=")).astype(comp).tobytes()
    return name, channels, raw


@settings(max_examples=60, deadline=None)
@given(rec=_recordings())
def test_every_datatype_round_trips(tmp_path_factory, rec):
    name, channels, raw = rec
    folder = tmp_path_factory.mktemp("dt")
    meta = {"global": {"core:datatype": name, "core:sample_rate": 1e6, "core:version": "1.2.0",
                       "core:num_channels": channels},
            "captures": [{"core:sample_start": 0}], "annotations": []}
    cap = qio.read_sigmf(_write_pair(folder, "rec", raw, meta))
    expected = _reference_decode(raw, name, channels)
    assert cap.dims == (("time",) if channels == 1 else ("channel", "time"))
    wide = name[1:4] == "f64"
    assert cap.dtype == {("c", False): np.complex64, ("c", True): np.complex128,
                         ("r", False): np.float32, ("r", True): np.float64}[(name[0], wide)]
    # exact: 8/16-bit codes and the 32-bit codes drawn are exactly representable
    np.testing.assert_array_equal(cap.values, expected.astype(cap.dtype))
    qio.write_sigmf(cap, folder / "again")
    assert (folder / "again.sigmf-data").read_bytes() == raw
    # the sigmf package reads what we wrote to the same samples (its autoscale convention);
    # it always returns float32, so compare with ours narrowed the same way (exact)
    with np.errstate(over="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        theirs = sigmf.fromfile(str(folder / "again.sigmf-meta")).read_samples()
        ours = (cap.values.T if channels > 1 else cap.values).astype(theirs.dtype)
    np.testing.assert_array_equal(theirs, ours)


def test_32bit_integers_round_once_to_float32(tmp_path):
    codes = RNG.integers(-2**31, 2**31, size=2000, dtype=np.int64).astype("<i4")
    codes.tofile(tmp_path / "x.ci32")
    cap = qio.read_raw(tmp_path / "x.ci32", dtype="ci32_le", sample_rate=1.0)
    exact = _reference_decode(codes.tobytes(), "ci32_le")
    # one rounding to float32: relative error <= 2**-24 (IEEE 754 round to nearest)
    err = np.abs(cap.values.view(np.float32) - exact.view(np.float64))
    assert np.all(err <= 2.0**-24 * np.abs(exact.view(np.float64)))


def test_unsigned_mid_code_and_clipping(tmp_path):
    raw = np.array([0, 128, 255, 129], np.uint8)
    raw.tofile(tmp_path / "u.cu8")
    cap = qio.read_raw(tmp_path / "u.cu8", dtype="cu8", sample_rate=1.0)
    # (x - 128) / 128 (SigMF reference library autoscale)
    np.testing.assert_array_equal(cap.values, [-1 + 0j, 127 / 128 + 1j / 128])
    loud = quadkit.capture([1.5 + 1.0j, -2.0 - 1.0j], sample_rate=1.0)
    with pytest.warns(RuntimeWarning, match="2 of 2 samples clipped"):
        qio.write_raw(loud, tmp_path / "clip.ci16", dtype="ci16_le")
    # +1.0 and beyond clip to the largest code 32767, -1.0 and below to -32768
    np.testing.assert_array_equal(np.fromfile(tmp_path / "clip.ci16", "<i2"),
                                  [32767, 32767, -32768, -32768])


# --- conformance against the sigmf package ----------------------------------------------

def _bench_capture(n=1000, channels=1):
    shape = (channels, n) if channels > 1 else (n,)
    x = (RNG.standard_normal(shape) + 1j * RNG.standard_normal(shape)) * 0.2
    return quadkit.capture(
        x.astype(np.complex64), sample_rate=2.5e6, center_frequency=433.92e6,
        description="board B3 receive chain, bench 2", hardware="board B3 rev 2",
        start_time="2026-03-04T05:06:07.250Z",
        annotations=[
            {"start_sample": 600, "sample_count": 100, "lower_frequency_hz": 433.9e6,
             "upper_frequency_hz": 433.95e6, "label": "burst", "comment": "second"},
            {"start_sample": 10, "sample_count": 50, "label": "first"},
        ],
    )


def test_we_write_sigmf_reads(tmp_path):
    cap = _bench_capture()
    qio.write_sigmf(cap, tmp_path / "bench.sigmf-meta", dtype="ci16_le")
    theirs = sigmf.fromfile(str(tmp_path / "bench.sigmf-meta"))  # checks core:sha512
    theirs.validate()  # against the schema shipped with the sigmf package
    g = theirs.get_global_info()
    assert g["core:datatype"] == "ci16_le"
    assert g["core:sample_rate"] == 2.5e6
    assert g["core:hw"] == "board B3 rev 2"
    assert g["core:description"] == "board B3 receive chain, bench 2"
    data = (tmp_path / "bench.sigmf-data").read_bytes()
    assert g["core:sha512"] == hashlib.sha512(data).hexdigest()
    (c0,) = theirs.get_captures()
    assert c0["core:frequency"] == 433.92e6 and c0["core:datetime"] == "2026-03-04T05:06:07.250Z"
    notes = theirs.get_annotations()
    assert [a["core:sample_start"] for a in notes] == [10, 600]  # sorted by sample_start
    assert notes[1]["core:freq_upper_edge"] == 433.95e6 and notes[1]["core:comment"] == "second"
    # ci16 rounding: at most half an LSB (1/65536) on I and on Q, so |error| <= sqrt(2)/65536
    # (plus float32 representation of the reference, ~1e-8)
    np.testing.assert_allclose(theirs.read_samples(), cap.values, rtol=0,
                               atol=np.sqrt(2) * 0.5 / 32768 + 1e-7)


def test_sigmf_writes_we_read(tmp_path):
    codes = RNG.integers(-32768, 32768, size=2 * 300, dtype=np.int64).astype("<i2")
    codes.tofile(tmp_path / "theirs.sigmf-data")
    meta = SigMFFile(
        data_file=str(tmp_path / "theirs.sigmf-data"),
        global_info={sigmf.DATATYPE_KEY: "ci16_le", sigmf.SAMPLE_RATE_KEY: 1.0e6,
                     sigmf.VERSION_KEY: sigmf.__specification__,
                     sigmf.AUTHOR_KEY: "bench 2", sigmf.HW_KEY: "board C1",
                     sigmf.EXTENSIONS_KEY: [{"name": "lab", "version": "1.0.0",
                                             "optional": True}],
                     "lab:operator": {"shift": "night", "desk": 4}},
    )
    meta.add_capture(0, metadata={sigmf.FREQUENCY_KEY: 915e6,
                                  sigmf.DATETIME_KEY: "2026-01-02T03:04:05Z"})
    meta.add_capture(200, metadata={sigmf.FREQUENCY_KEY: 916e6, "lab:step": 2})
    meta.add_annotation(50, 20, metadata={sigmf.LABEL_KEY: "spur", "lab:id": 7,
                                          sigmf.FREQ_LOWER_EDGE_KEY: 914.9e6,
                                          sigmf.FREQ_UPPER_EDGE_KEY: 915.1e6})
    meta.tofile(str(tmp_path / "theirs.sigmf-meta"))
    cap = qio.read_sigmf(tmp_path / "theirs")
    theirs = sigmf.fromfile(str(tmp_path / "theirs")).read_samples()
    np.testing.assert_array_equal(cap.values, theirs)
    assert cap.attrs["sample_rate"] == 1.0e6
    assert cap.attrs["center_frequency"] == 915e6
    assert cap.attrs["start_time"] == "2026-01-02T03:04:05Z"
    assert cap.attrs["hardware"] == "board C1"
    assert [s["start_sample"] for s in cap.attrs["segments"]] == [0, 200]
    assert cap.attrs["segments"][1]["center_frequency"] == 916e6
    assert cap.attrs["segments"][1]["lab:step"] == 2
    (note,) = cap.attrs["annotations"]
    assert note["start_sample"] == 50 and note["sample_count"] == 20 and note["lab:id"] == 7
    assert note["lower_frequency_hz"] == 914.9e6 and note["label"] == "spur"
    assert cap.attrs["sigmf_extra"]["global"]["lab:operator"] == {"shift": "night", "desk": 4}


def test_read_then_write_loses_nothing(tmp_path):
    codes = np.arange(2 * 64, dtype="<i2")
    doc = {
        "global": {"core:datatype": "ci16_le", "core:sample_rate": 48000.0,
                   "core:version": "1.2.0", "core:author": "bench 5",
                   "core:license": "https://creativecommons.org/licenses/by/4.0/",
                   "core:geolocation": {"type": "Point", "coordinates": [8.5, 47.4]},
                   "core:extensions": [{"name": "rig", "version": "0.2.0", "optional": True},
                                       {"name": "quadkit", "version": "0.1.0",
                                        "optional": True}],
                   "rig:antenna": {"model": "our loop 3", "gain_dbi": 1.5},
                   "quadkit:calibration_db": -30.5},
        "captures": [{"core:sample_start": 32, "core:frequency": 145.2e6, "rig:note": "b"},
                     {"core:sample_start": 0, "core:frequency": 145.1e6,
                      "core:datetime": "2026-05-06T07:08:09.5Z", "core:global_index": 0}],
        "annotations": [{"core:sample_start": 40, "core:sample_count": 8, "core:label": "b",
                         "core:uuid": "6f0c1a8e-2b7d-4a15-9f43-0d2a8c3e5b71"},
                        {"core:sample_start": 2, "core:comment": "a", "rig:flag": True}],
    }
    cap = qio.read_sigmf(_write_pair(tmp_path, "orig", codes.tobytes(), doc))
    assert cap.attrs["calibration_db"] == -30.5  # quadkit's own namespace becomes attrs
    qio.write_sigmf(cap, tmp_path / "copy")
    assert (tmp_path / "copy.sigmf-data").read_bytes() == codes.tobytes()
    out = json.loads((tmp_path / "copy.sigmf-meta").read_text())
    for key, value in doc["global"].items():
        if key != "core:version":
            assert out["global"][key] == value, key
    by_start = sorted(doc["captures"], key=lambda c: c["core:sample_start"])
    assert out["captures"] == by_start  # sorted by core:sample_start, all fields kept
    assert out["annotations"] == sorted(doc["annotations"], key=lambda a: a["core:sample_start"])
    sigmf.fromfile(str(tmp_path / "copy.sigmf-meta")).validate()
    # and a second pass is a fixed point
    qio.write_sigmf(qio.read_sigmf(tmp_path / "copy"), tmp_path / "copy2")
    assert json.loads((tmp_path / "copy2.sigmf-meta").read_text()) == out
    # top-level fields outside the standard's three objects are kept too
    doc["rig:toplevel"] = [1, 2, 3]
    cap = qio.read_sigmf(_write_pair(tmp_path, "odd", codes.tobytes(), doc))
    qio.write_sigmf(cap, tmp_path / "odd2")
    assert json.loads((tmp_path / "odd2.sigmf-meta").read_text())["rig:toplevel"] == [1, 2, 3]


def test_multichannel_interleaving_matches_sigmf(tmp_path):
    cap = _bench_capture(n=1000, channels=3)
    qio.write_sigmf(cap, tmp_path / "three", dtype="cf32_le")
    theirs = sigmf.fromfile(str(tmp_path / "three"))
    assert theirs.get_global_info()["core:num_channels"] == 3
    # sigmf returns (sample, channel); we hold (channel, time): same values, exact (cf32)
    np.testing.assert_array_equal(theirs.read_samples(), cap.values.T)
    back = qio.read_sigmf(tmp_path / "three")
    assert back.dims == ("channel", "time")
    np.testing.assert_array_equal(back.values, cap.values)
    # multi-channel equals per-channel
    for k in range(3):
        qio.write_sigmf(cap.isel(channel=k), tmp_path / f"ch{k}", dtype="cf32_le")
        np.testing.assert_array_equal(qio.read_sigmf(tmp_path / f"ch{k}").values, cap.values[k])


def test_datetime_is_rfc3339_utc_with_z(tmp_path):
    cap = quadkit.capture(np.zeros(4, np.complex64), sample_rate=1.0,
                          start_time="2026-03-04T07:06:07.250+02:00")
    qio.write_sigmf(cap, tmp_path / "t")
    c0 = json.loads((tmp_path / "t.sigmf-meta").read_text())["captures"][0]
    # RFC 3339 §5.6: the same instant in UTC is 05:06:07.250Z
    assert c0["core:datetime"] == "2026-03-04T05:06:07.250000Z"


def test_archive_round_trip_read_by_sigmf(tmp_path):
    cap = _bench_capture(n=800)
    qio.write_sigmf(cap, tmp_path / "bench.sigmf", dtype="ci16_le")
    theirs = sigmf.fromfile(str(tmp_path / "bench.sigmf"))
    ours = qio.read_sigmf(tmp_path / "bench.sigmf")
    np.testing.assert_array_equal(ours.values, theirs.read_samples())
    lazy = qio.read_sigmf(tmp_path / "bench.sigmf", chunks=77)
    np.testing.assert_array_equal(lazy.values, ours.values)
    assert ours.attrs["annotations"][0]["label"] == "first"


def test_extra_attrs_go_to_own_namespace_and_back(tmp_path):
    cap = quadkit.capture(np.ones(8, np.complex64) * 0.5, sample_rate=1e3, full_scale=0.5,
                          calibration_db=-42.0, bench={"table": 3, "probes": [1, 2]})
    qio.write_sigmf(cap, tmp_path / "own")
    sigmf.fromfile(str(tmp_path / "own")).validate()
    back = qio.read_sigmf(tmp_path / "own")
    assert back.attrs["full_scale"] == 0.5 and back.attrs["calibration_db"] == -42.0
    assert back.attrs["bench"] == {"table": 3, "probes": [1, 2]}
    np.testing.assert_array_equal(back.values, cap.values)


def test_overrides_replace_file_values(tmp_path):
    qio.write_sigmf(_bench_capture(n=1000), tmp_path / "o")
    cap = qio.read(tmp_path / "o.sigmf-meta", sample_rate=5e6, center_frequency=1e9)
    assert cap.attrs["sample_rate"] == 5e6 and cap.attrs["center_frequency"] == 1e9
    assert float(cap.time[1]) == pytest.approx(1 / 5e6, rel=1e-12)
