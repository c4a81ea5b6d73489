"""quadkit.io bad-input table: each case raises CaptureError naming the file and the problem."""

from __future__ import annotations

import json
import re

import numpy as np
import pytest

import quadkit
from quadkit import CaptureError
from quadkit import io as qio
from quadkit.io._datatypes import KNOWN_DATATYPES

GOOD_GLOBAL = {"core:datatype": "ci16_le", "core:sample_rate": 1e6, "core:version": "1.2.0"}


def _pair(folder, *, data=b"\x00" * 40, meta=None, text=None, stem="rec"):
    if data is not None:
        (folder / f"{stem}.sigmf-data").write_bytes(data)
    if text is None:
        doc = {"global": dict(GOOD_GLOBAL), "captures": [{"core:sample_start": 0}],
               "annotations": []}
        if meta:
            for key, value in meta.items():
                if value is None:
                    doc["global"].pop(key, None)
                elif key in ("captures", "annotations"):
                    doc[key] = value
                else:
                    doc["global"][key] = value
        text = json.dumps(doc, indent=1)
    (folder / f"{stem}.sigmf-meta").write_text(text)
    return folder / f"{stem}.sigmf-meta"


def _raises(path, pattern, *, names=None, **kwargs):
    with pytest.raises(CaptureError) as info:
        qio.read(path, **kwargs)
    message = str(info.value)
    assert str(names or path.name) in message, message  # names the file
    assert re.search(pattern, message), message
    return message


def test_empty_data_file(tmp_path):
    _raises(_pair(tmp_path, data=b""), r"data file is empty", names="rec.sigmf-data")
    (tmp_path / "e.cs16").write_bytes(b"")
    _raises(tmp_path / "e.cs16", r"empty", dtype="ci16_le", sample_rate=1.0)
    (tmp_path / "e.wav").write_bytes(b"")
    _raises(tmp_path / "e.wav", r"empty")


def test_empty_metadata_file(tmp_path):
    _raises(_pair(tmp_path, text=""), r"metadata file is empty")


@pytest.mark.parametrize("n_bytes, left", [(41, 1), (43, 3), (42, 2)])
def test_ragged_data_says_bytes_left_over(tmp_path, n_bytes, left):
    # ci16_le: 4 bytes per sample (REFERENCES.md), so n_bytes % 4 are left over
    msg = _raises(_pair(tmp_path, data=b"\x00" * n_bytes), rf"{left} bytes? left over",
                  names="rec.sigmf-data")
    assert f"{n_bytes // 4} samples" in msg
    (tmp_path / "r.cs16").write_bytes(b"\x00" * n_bytes)
    _raises(tmp_path / "r.cs16", rf"{left} bytes? left over", dtype="ci16_le", sample_rate=1.0)


def test_ragged_multichannel(tmp_path):
    # two channels of ci16: 8-byte frames; 44 bytes leave 4 over
    _raises(_pair(tmp_path, data=b"\x00" * 44, meta={"core:num_channels": 2}),
            r"4 bytes left over", names="rec.sigmf-data")


def test_malformed_json_gives_line_and_column(tmp_path):
    text = '{\n  "global": {\n    "core:datatype": "ci16_le",,\n  }\n}\n'
    # the stray comma is on line 3; json reports its position
    try:
        json.loads(text)
    except json.JSONDecodeError as exc:
        where = f"line {exc.lineno}, column {exc.colno}"
    _raises(_pair(tmp_path, text=text), re.escape(where))


@pytest.mark.parametrize("field, pattern", [("core:datatype", r"core:datatype' is missing"),
                                            ("core:sample_rate", r"core:sample_rate' is missing")])
def test_missing_datatype_or_rate(tmp_path, field, pattern):
    _raises(_pair(tmp_path, meta={field: None}), pattern)


def test_missing_rate_can_be_given(tmp_path):
    cap = qio.read(_pair(tmp_path, meta={"core:sample_rate": None}), sample_rate=2e6)
    assert cap.attrs["sample_rate"] == 2e6


def test_raw_needs_dtype_and_rate(tmp_path):
    (tmp_path / "x.dat").write_bytes(b"\x00" * 8)
    _raises(tmp_path / "x.dat", r"dtype= and sample_rate=")
    _raises(tmp_path / "x.dat", r"sample_rate=", dtype="ci16_le")


def test_unknown_datatype_lists_known_ones(tmp_path):
    msg = _raises(_pair(tmp_path, meta={"core:datatype": "ci12_le"}), r"unknown datatype 'ci12_le'")
    assert all(name in msg for name in KNOWN_DATATYPES)
    (tmp_path / "x.dat").write_bytes(b"\x00" * 8)
    _raises(tmp_path / "x.dat", r"unknown datatype", dtype="int16", sample_rate=1.0)


@pytest.mark.parametrize("rate", [0, -48000.0, "nan"])
def test_bad_sample_rate(tmp_path, rate):
    text = json.dumps({"global": dict(GOOD_GLOBAL), "captures": [], "annotations": []})
    # JSON has no NaN literal, but Python's json writes and reads one: test that path too
    text = text.replace("1000000.0", "NaN" if rate == "nan" else str(rate))
    msg = _raises(_pair(tmp_path, text=text), r"core:sample_rate")
    assert "positive" in msg
    (tmp_path / "x.dat").write_bytes(b"\x00" * 8)
    _raises(tmp_path / "x.dat", r"sample_rate", dtype="ci16_le",
            sample_rate=float(rate))


def test_annotation_past_the_end(tmp_path):
    notes = [{"core:sample_start": 5, "core:sample_count": 6}]  # 10 samples: ends at 11
    msg = _raises(_pair(tmp_path, meta={"annotations": notes}), r"annotation 0 covers")
    assert "10 samples" in msg
    notes = [{"core:sample_start": 10}]
    _raises(_pair(tmp_path, meta={"annotations": notes}), r"annotation 0")


def test_segment_past_the_end(tmp_path):
    caps = [{"core:sample_start": 0}, {"core:sample_start": 12, "core:frequency": 1e9}]
    _raises(_pair(tmp_path, meta={"captures": caps}), r"captures segment 1 covers samples 12")


def test_data_file_missing(tmp_path):
    msg = _raises(_pair(tmp_path, data=None), r"data file .*rec\.sigmf-data is missing")
    assert "rec.sigmf-meta" in msg


def test_sha512_mismatch(tmp_path):
    cap = quadkit.capture(np.full(10, 0.5, np.complex64), sample_rate=1e3)
    qio.write_sigmf(cap, tmp_path / "h", dtype="ci16_le")
    raw = bytearray((tmp_path / "h.sigmf-data").read_bytes())
    raw[3] ^= 1
    (tmp_path / "h.sigmf-data").write_bytes(bytes(raw))
    _raises(tmp_path / "h.sigmf-meta", r"core:sha512 does not match")
    # lazily the hash is not checked unless asked for (it would read the whole file)
    assert qio.read_sigmf(tmp_path / "h", chunks=4).sizes["time"] == 10
    with pytest.raises(CaptureError, match="sha512"):
        qio.read_sigmf(tmp_path / "h", chunks=4, check_hash=True)


def test_non_finite_samples_come_from_validate(tmp_path):
    x = np.zeros(6, np.complex64)
    x[4] = np.inf
    qio.write_sigmf(quadkit.capture(x, sample_rate=1.0), tmp_path / "nf")
    cap = qio.read(tmp_path / "nf.sigmf-meta")  # reading keeps what the file holds
    with pytest.raises(CaptureError, match=r"1 non-finite sample .*sample 4"):
        quadkit.validate(cap)


def test_missing_file(tmp_path):
    _raises(tmp_path / "nowhere.sigmf-meta", r"no such")
    _raises(tmp_path / "nowhere.wav", r"no such")


def test_bad_writes_leave_nothing(tmp_path):
    cap = quadkit.capture(np.zeros(10, np.complex64), sample_rate=1e3,
                          annotations=[{"start_sample": 8, "sample_count": 5}])
    with pytest.raises(CaptureError, match="annotation 0 covers samples 8 to 13"):
        qio.write_sigmf(cap, tmp_path / "bad")
    with pytest.raises(CaptureError, match="real but the capture is complex"):
        qio.write_sigmf(quadkit.capture(np.zeros(4, np.complex64), sample_rate=1.0),
                        tmp_path / "bad2", dtype="rf32_le")
    with pytest.raises(CaptureError, match="unknown datatype"):
        qio.write_raw(quadkit.capture(np.zeros(4, np.complex64), sample_rate=1.0),
                      tmp_path / "bad.raw", dtype="sc16")
    assert list(tmp_path.iterdir()) == []
