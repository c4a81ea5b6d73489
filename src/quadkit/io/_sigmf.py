"""SigMF recordings: ``.sigmf-meta`` + ``.sigmf-data`` pairs and ``.sigmf`` archives.

Mapping between SigMF fields and capture attrs:

=================================  ==============================================
SigMF                               capture
=================================  ==============================================
global ``core:datatype``            sample format; kept as attr ``file_datatype``
global ``core:sample_rate``         ``sample_rate`` (Hz)
global ``core:num_channels``        ``channel`` dim (channels interleaved sample by sample)
global ``core:description``         ``description``
global ``core:hw``                  ``hardware``
global ``core:sha512``              checked on reading, written on writing
global ``quadkit:<name>``           attr ``<name>`` (quadkit's own attrs, e.g. ``full_scale``)
first capture ``core:frequency``    ``center_frequency`` (Hz; 0 when absent)
first capture ``core:datetime``     ``start_time`` (RFC 3339 with 'Z')
several captures                    ``segments``: dicts ``start_sample``,
                                    ``center_frequency``, ``start_time``
annotations                         ``annotations``: dicts ``start_sample``,
                                    ``sample_count``, ``lower_frequency_hz``,
                                    ``upper_frequency_hz``, ``label``, ``comment``
every other field                   kept unchanged: in segment and annotation dicts
                                    under its own key; global and top-level ones in
                                    attr ``sigmf_extra`` (``{"global": {...},
                                    "capture": {...}, "document": {...}}``)
=================================  ==============================================

So reading a recording and writing it back loses nothing (``core:version`` is written as
the version quadkit writes, ``core:sha512`` is recomputed).
"""

from __future__ import annotations

import copy
import datetime as _dt
import hashlib
import json
import numbers
import os
import tarfile
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from .._capture import capture, start_index
from .._errors import CaptureError
from ._atomic import atomic_path, check_writable
from ._common import (
    apply_overrides,
    check_extent,
    check_frequency,
    check_rate,
    encoded_blocks,
    existing_file,
    json_error,
    jsonable,
)
from ._datatypes import parse_datatype
from ._lazy import load_samples, whole_samples

__all__ = ["read_sigmf", "write_sigmf", "SIGMF_VERSION"]

#: The SigMF specification version written into ``core:version``.
SIGMF_VERSION = "1.2.0"

_ANNOTATION_KEYS = {
    "core:sample_start": "start_sample",
    "core:sample_count": "sample_count",
    "core:freq_lower_edge": "lower_frequency_hz",
    "core:freq_upper_edge": "upper_frequency_hz",
    "core:label": "label",
    "core:comment": "comment",
}
_SEGMENT_KEYS = {
    "core:sample_start": "start_sample",
    "core:frequency": "center_frequency",
    "core:datetime": "start_time",
}
_GLOBAL_MAPPED = {"core:datatype", "core:sample_rate", "core:num_channels", "core:sha512",
                  "core:description", "core:hw", "core:version"}
#: attrs that are written through SigMF's own fields, not as ``quadkit:`` fields
_ATTRS_MAPPED = {"sample_rate", "center_frequency", "start_time", "description", "hardware",
                 "annotations", "segments", "sigmf_extra", "file_datatype"}
_UNSUPPORTED = ("core:header_bytes", "core:trailing_bytes")


def _names(path: str | os.PathLike[str]) -> tuple[Path, Path, bool]:
    """(meta, data, is_archive) for a path naming either file, their stem, or an archive."""
    p = Path(path)
    name = p.name
    if name.endswith(".sigmf"):
        return p, p, True
    for ext in (".sigmf-meta", ".sigmf-data"):
        if name.endswith(ext):
            stem = name[: -len(ext)]
            return p.with_name(stem + ".sigmf-meta"), p.with_name(stem + ".sigmf-data"), False
    return p.with_name(name + ".sigmf-meta"), p.with_name(name + ".sigmf-data"), False


def _sample_start(item: Any) -> Any:
    start = item.get("core:sample_start", 0) if isinstance(item, dict) else 0
    return start if isinstance(start, numbers.Integral) else -1


def _parse_meta(text: bytes, source: Any) -> dict:
    if not text.strip():
        raise CaptureError(f"{source}: the metadata file is empty; expected a SigMF JSON "
                           "document with a 'global' object")
    try:
        doc = json.loads(text.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise CaptureError(f"{source}: metadata is not UTF-8 text (byte {exc.start})") from None
    except json.JSONDecodeError as exc:
        raise json_error(source, exc) from None
    if not isinstance(doc, dict) or not isinstance(doc.get("global"), dict):
        raise CaptureError(f"{source}: SigMF metadata must be a JSON object with a 'global' "
                           "object; none found")
    for key in ("captures", "annotations"):
        if not isinstance(doc.get(key, []), list):
            raise CaptureError(f"{source}: '{key}' must be a JSON list")
    return doc


def _locate_archive(path: Path) -> tuple[bytes, int, int, str]:
    """Metadata bytes and (offset, size, name) of the data member inside a ``.sigmf`` tar."""
    try:
        with tarfile.open(path, "r:") as tar:
            members = tar.getmembers()
            metas = [m for m in members if m.isfile() and m.name.endswith(".sigmf-meta")]
            if len(metas) != 1:
                raise CaptureError(f"{path}: a SigMF archive must hold one .sigmf-meta file; "
                                   f"found {len(metas)}")
            meta = metas[0]
            want = meta.name[: -len(".sigmf-meta")] + ".sigmf-data"
            datas = [m for m in members if m.isfile() and m.name == want]
            fh = tar.extractfile(meta)
            assert fh is not None
            text = fh.read()
    except tarfile.TarError as exc:
        raise CaptureError(f"{path}: not a readable SigMF archive (POSIX tar): {exc}") from None
    if not datas:
        raise CaptureError(f"{path}: the archive holds {meta.name} but its data file {want} "
                           "is missing")
    return text, datas[0].offset_data, datas[0].size, f"{path}[{want}]"


def _sha512(path: Path, offset: int, size: int) -> str:
    h = hashlib.sha512()
    with open(path, "rb") as fh:
        fh.seek(offset)
        left = size
        while left > 0:
            block = fh.read(min(left, 1 << 22))
            if not block:
                break
            h.update(block)
            left -= len(block)
    return h.hexdigest()


def read_sigmf(
    path: str | os.PathLike[str],
    *,
    chunks: Any = None,
    check_hash: bool | None = None,
    **overrides: Any,
) -> xr.DataArray:
    """Read a SigMF recording into a capture.

    Parameters
    ----------
    path : str or path-like
        The ``.sigmf-meta`` or ``.sigmf-data`` file, their common stem, or a ``.sigmf``
        archive (an uncompressed POSIX tar).
    chunks : int, sequence of int or "auto", optional
        Read lazily: a dask-backed capture whose tasks each read their own piece of the data
        file (path, byte offset, count, datatype), so it pickles to distributed workers.
    check_hash : bool, optional
        Check ``core:sha512`` when the file has one. Default: check for an eager read, skip
        for a lazy one (checking reads the whole file, which a lazy read avoids).
    **overrides
        Attrs to set instead of the file's (for example ``sample_rate=`` for a recording
        without ``core:sample_rate``, or ``center_frequency=``).

    Returns
    -------
    xarray.DataArray
        complex64 for integer and cf32 data (integers scaled to full scale 1.0: ci16 divided
        by 32768; unsigned types have the mid-code 2**(b-1) subtracted first, then divided by
        it), complex128 for cf64, real float32/float64 for ``r*`` data. Several channels
        give dims ``("channel", "time")``. See the module docstring for the attrs.

    Raises
    ------
    CaptureError
        Naming the file and the problem: empty or malformed metadata (line and column),
        missing or unknown ``core:datatype``, missing or bad sample rate, missing or empty
        data file, a data size that is not a whole number of samples, segments or
        annotations past the end of the data, a ``core:sha512`` mismatch.

    Examples
    --------
    >>> import tempfile, pathlib, quadkit
    >>> cap = quadkit.synth.tone(1e3, sample_rate=8e3, n_samples=8, amplitude=0.5,
    ...                          center_frequency=433.9e6)
    >>> stem = pathlib.Path(tempfile.mkdtemp()) / "bench_tone"
    >>> _ = quadkit.io.write_sigmf(cap, stem, dtype="ci16_le")
    >>> back = quadkit.io.read_sigmf(stem.with_suffix(".sigmf-meta"))
    >>> back.attrs["center_frequency"], back.attrs["file_datatype"], back.dtype
    (433900000.0, 'ci16_le', dtype('complex64'))
    >>> bool(abs(back.values - cap.values).max() * 32768 <= 0.71)  # half an LSB on I and Q
    True
    """
    meta_path, data_path, archive = _names(path)
    if archive:
        existing_file(meta_path, what="SigMF archive")
        text, data_offset, data_size, data_label = _locate_archive(meta_path)
        source = meta_path
    else:
        existing_file(meta_path, what="SigMF metadata file")
        text = meta_path.read_bytes()
        source = meta_path
    doc = _parse_meta(text, source)
    g = doc["global"]
    for cap_item in doc.get("captures", []):
        for key in _UNSUPPORTED:
            if isinstance(cap_item, dict) and key in cap_item:
                raise CaptureError(f"{source}: {key} (a non-conforming dataset) is not "
                                   "supported; strip the header/trailer bytes first")
    if "core:datatype" not in g:
        raise CaptureError(f"{source}: global 'core:datatype' is missing; it names the sample "
                           "format, e.g. 'ci16_le' or 'cf32_le'")
    fmt = parse_datatype(g["core:datatype"], source=f"{source}: core:datatype")
    rate = overrides.pop("sample_rate", g.get("core:sample_rate"))
    if rate is None:
        raise CaptureError(f"{source}: global 'core:sample_rate' is missing; give it in the "
                           "file or pass sample_rate= (Hz)")
    fs = check_rate(rate, source, "core:sample_rate")
    channels = g.get("core:num_channels", 1)
    if isinstance(channels, bool) or not isinstance(channels, numbers.Integral) or channels < 1:
        raise CaptureError(f"{source}: core:num_channels={channels!r} must be an integer >= 1")
    channels = int(channels)

    if not archive:
        if "core:dataset" in g:
            data_path = meta_path.with_name(str(g["core:dataset"]))
        if not data_path.exists():
            raise CaptureError(f"{source}: its data file {data_path} is missing; keep the "
                               ".sigmf-data file beside the .sigmf-meta file with the same stem")
        data_offset, data_size, data_label = 0, data_path.stat().st_size, str(data_path)
    else:
        data_path = meta_path
    frames = whole_samples(data_label, data_size, fmt.sample_bytes * channels,
                           what="data file")

    if check_hash is None:
        check_hash = chunks is None
    if check_hash and "core:sha512" in g:
        got = _sha512(data_path, data_offset, data_size)
        if str(g["core:sha512"]).lower() != got:
            raise CaptureError(
                f"{source}: core:sha512 does not match the data file {data_label}: the "
                f"metadata says {str(g['core:sha512'])[:16]}..., the data hash to "
                f"{got[:16]}...; the data were changed or damaged after recording"
            )

    captures = sorted(doc.get("captures", []), key=_sample_start)
    annotations = sorted(doc.get("annotations", []), key=_sample_start)
    segments = []
    for c in captures:
        if not isinstance(c, dict):
            raise CaptureError(f"{source}: each captures entry must be a JSON object")
        seg = {_SEGMENT_KEYS.get(k, k): v for k, v in c.items()}
        seg.setdefault("start_sample", 0)
        if "center_frequency" in seg:
            seg["center_frequency"] = check_frequency(seg["center_frequency"], source,
                                                      "core:frequency")
        segments.append(seg)
    check_extent(segments, frames, source, "captures segment")
    notes = []
    for a in annotations:
        if not isinstance(a, dict):
            raise CaptureError(f"{source}: each annotations entry must be a JSON object")
        notes.append({_ANNOTATION_KEYS.get(k, k): v for k, v in a.items()})
    check_extent(notes, frames, source, "annotation")

    attrs: dict[str, Any] = {}
    first = segments[0] if segments else {}
    center = first.get("center_frequency", 0.0)
    if "start_time" in first:
        attrs["start_time"] = first["start_time"]
    if "core:description" in g:
        attrs["description"] = g["core:description"]
    if "core:hw" in g:
        attrs["hardware"] = g["core:hw"]
    extra: dict[str, Any] = {}
    glob_extra = {k: v for k, v in g.items()
                  if k not in _GLOBAL_MAPPED and not k.startswith("quadkit:")}
    if glob_extra:
        extra["global"] = glob_extra
    for k, v in g.items():
        if k.startswith("quadkit:"):
            attrs[k[len("quadkit:"):]] = v
    if len(segments) > 1 or (segments and segments[0]["start_sample"] != 0):
        attrs["segments"] = segments
    elif segments:
        rest = {k: v for k, v in segments[0].items()
                if k not in ("start_sample", "center_frequency", "start_time")}
        if rest:
            extra["capture"] = rest
    doc_extra = {k: v for k, v in doc.items() if k not in ("global", "captures", "annotations")}
    if doc_extra:
        extra["document"] = doc_extra
    if extra:
        attrs["sigmf_extra"] = extra
    if notes:
        attrs["annotations"] = notes
    attrs["file_datatype"] = fmt.name

    data = load_samples(data_path, offset=data_offset, count=frames, datatype=fmt.name,
                        channels=channels, chunks=chunks)
    for key in ("sample_rate", "center_frequency"):  # SigMF's own fields win
        attrs.pop(key, None)
    cap = capture(data, sample_rate=fs, center_frequency=center, **attrs)
    return apply_overrides(cap, overrides, source)


def rfc3339(value: Any, *, source: Any = "start_time") -> str:
    """A time stamp as RFC 3339 in UTC with 'Z' (naive times are taken as UTC)."""
    if isinstance(value, np.datetime64):
        value = str(np.datetime_as_string(value, unit="auto"))
    if isinstance(value, _dt.datetime):
        stamp = value
    else:
        text = str(value)
        try:
            stamp = _dt.datetime.fromisoformat(text.replace("Z", "+00:00")
                                               if text.endswith(("Z", "z")) else text)
        except ValueError:
            raise CaptureError(f"{source}: start_time={value!r} is not an ISO 8601 / RFC 3339 "
                               "time stamp such as '2026-03-01T12:00:00Z'") from None
        if text.endswith("Z") and "T" in text:
            return text
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=_dt.timezone.utc)
    stamp = stamp.astimezone(_dt.timezone.utc)
    return stamp.isoformat().replace("+00:00", "Z")


def _default_datatype(cap: xr.DataArray) -> str:
    recorded = cap.attrs.get("file_datatype")
    if isinstance(recorded, str):
        try:
            fmt = parse_datatype(recorded)
        except CaptureError:
            fmt = None
        if fmt is not None and fmt.is_complex == (cap.dtype.kind == "c"):
            return fmt.name
    if cap.dtype.kind == "c":
        return "cf64_le" if cap.dtype == np.complex128 else "cf32_le"
    return "rf64_le" if cap.dtype == np.float64 else "rf32_le"


def _global_fields(cap: xr.DataArray, fmt_name: str, channels: int, source: Any) -> dict:
    attrs = cap.attrs
    extra = copy.deepcopy(attrs.get("sigmf_extra") or {})
    g: dict[str, Any] = {
        "core:datatype": fmt_name,
        "core:sample_rate": float(attrs["sample_rate"]),
        "core:version": SIGMF_VERSION,
    }
    if channels > 1:
        g["core:num_channels"] = channels
    if "description" in attrs:
        g["core:description"] = str(attrs["description"])
    if "hardware" in attrs:
        g["core:hw"] = str(attrs["hardware"])
    g.update(extra.get("global", {}))
    integer = parse_datatype(fmt_name).kind != "f"
    for key, value in attrs.items():
        # integer files hold samples divided by full_scale: their full scale is 1.0
        if key in _ATTRS_MAPPED or (key == "full_scale" and (integer or float(value) == 1.0)):
            continue
        value = jsonable(value)
        try:
            json.dumps(value, allow_nan=False)
        except (TypeError, ValueError):
            raise CaptureError(
                f"{source}: attr {key!r}={value!r} cannot be stored in SigMF metadata (JSON); "
                "drop it or turn it into numbers, strings, lists or dicts"
            ) from None
        g[f"quadkit:{key}"] = value
    if any(k.startswith("quadkit:") for k in g):
        exts = list(g.get("core:extensions", []))
        if not any(isinstance(e, dict) and e.get("name") == "quadkit" for e in exts):
            exts.append({"name": "quadkit", "version": "0.1.0", "optional": True})
        g["core:extensions"] = exts
    return g


def _advance(stamp: Any, seconds: float, source: Any) -> str:
    """RFC 3339 time stamp ``seconds`` after ``stamp`` (nanosecond resolution)."""
    text = rfc3339(stamp, source=source)
    if seconds == 0:
        return text
    t = np.datetime64(text[:-1], "ns") + np.timedelta64(int(round(seconds * 1e9)), "ns")
    return str(np.datetime_as_string(t, unit="auto")) + "Z"


def _rebase(segments: list[dict], notes: list[dict], start: int, fs: float,
            source: Any) -> tuple[list[dict], list[dict]]:
    """Segments and annotations of a capture whose first sample is absolute index ``start``.

    Sample indices become relative to the first sample. Annotations ending before it are
    dropped, those straddling it start at 0 with their count shortened (one without a
    count runs to the end and is only moved). Of the segments starting at or before it, the
    last becomes sample 0 (its time stamp advanced to that sample) and earlier ones are
    dropped.
    """
    if start == 0:
        return segments, notes
    out_notes = []
    for a in notes:
        a = dict(a)
        begin = a.get("start_sample", 0) - start
        count = a.get("sample_count")
        if isinstance(count, numbers.Integral):
            if begin + count <= 0:
                continue
            if begin < 0:
                a["sample_count"] = int(begin + count)
        a["start_sample"] = int(max(begin, 0))
        out_notes.append(a)
    ordered = sorted(segments, key=lambda s: s.get("start_sample", 0))
    before = [k for k, s in enumerate(ordered) if s.get("start_sample", 0) <= start]
    keep = ordered[before[-1]:] if before else ordered
    out_segs = []
    for seg in keep:
        seg = dict(seg)
        begin = seg.get("start_sample", 0) - start
        if begin < 0 and seg.get("start_time") is not None:
            seg["start_time"] = _advance(seg["start_time"], -begin / fs, source)
        seg["start_sample"] = int(max(begin, 0))
        out_segs.append(seg)
    return out_segs, out_notes


def _documents(cap: xr.DataArray, fmt_name: str, source: Any) -> dict:
    attrs = cap.attrs
    n = cap.sizes["time"]
    channels = cap.sizes.get("channel", 1)
    fs = float(attrs["sample_rate"])
    start = start_index(cap)
    extra = copy.deepcopy(attrs.get("sigmf_extra") or {})
    inverse_seg = {v: k for k, v in _SEGMENT_KEYS.items()}
    inverse_ann = {v: k for k, v in _ANNOTATION_KEYS.items()}
    segments, notes = _rebase(jsonable(attrs.get("segments") or []),
                              jsonable(attrs.get("annotations") or []), start, fs, source)
    if segments:
        check_extent(segments, n, source, "segment")
        captures = []
        for seg in sorted(segments, key=lambda s: s.get("start_sample", 0)):
            item = {inverse_seg.get(k, k): v for k, v in seg.items()}
            if "core:datetime" in item:
                item["core:datetime"] = rfc3339(item["core:datetime"], source=source)
            captures.append(item)
    else:
        item = {"core:sample_start": 0}
        item.update(extra.get("capture", {}))
        item["core:frequency"] = float(attrs.get("center_frequency", 0.0))
        if attrs.get("start_time") is not None:
            item["core:datetime"] = _advance(attrs["start_time"], start / fs, source)
        captures = [item]
    check_extent(notes, n, source, "annotation")
    annotations = [{inverse_ann.get(k, k): v for k, v in a.items()}
                   for a in sorted(notes, key=lambda a: a.get("start_sample", 0))]
    doc = {"global": _global_fields(cap, fmt_name, channels, source),
           "captures": captures, "annotations": annotations}
    for key, value in extra.get("document", {}).items():
        doc.setdefault(key, value)
    return doc


def write_sigmf(
    cap: xr.DataArray,
    path: str | os.PathLike[str],
    *,
    overwrite: bool = False,
    dtype: str | None = None,
) -> Path:
    """Write a capture as a SigMF recording (``.sigmf-meta`` + ``.sigmf-data``, or archive).

    Parameters
    ----------
    cap : xarray.DataArray
        The capture; a lazy one is written chunk by chunk.
    path : str or path-like
        Either file name of the pair or their stem; a name ending in ``.sigmf`` writes an
        uncompressed archive (POSIX tar) instead.
    overwrite : bool, default False
        Replace existing files. Without it an existing file raises before anything is
        written. Each file is built under a temporary name and renamed when complete.
    dtype : str, optional
        SigMF datatype of the data file. Default: the capture's ``file_datatype`` (the
        format it was read in) when that matches its complex/real kind, else ``cf32_le``
        (complex64), ``cf64_le`` (complex128), ``rf32_le`` or ``rf64_le`` (real). Integer
        formats divide the samples by the capture's ``full_scale``, map the result's 1.0 to
        the integer full scale (ci16: times 32768), round half to even and clip (+1.0
        becomes 32767); ``quadkit:full_scale`` is then not written (the file reads back with
        full scale 1.0, the same dBFS). Samples beyond full scale warn
        (``RuntimeWarning``, with the count); NaN/Inf raise ``CaptureError``. Float
        formats keep the samples and write ``quadkit:full_scale`` when it is not 1.0.

    Returns
    -------
    pathlib.Path
        The ``.sigmf-meta`` file written (or the archive).

    Notes
    -----
    Several channels are written with ``core:num_channels``, interleaved sample by sample
    (sample 0 of every channel, then sample 1, ...). ``captures`` and ``annotations`` are
    sorted by ``core:sample_start``, ``core:datetime`` is RFC 3339 in UTC with 'Z', and
    ``core:sha512`` holds the hash of the data written. Attrs without a SigMF field are
    written as ``quadkit:<name>`` global fields (declared in ``core:extensions``).

    A time slice (``cap[250:]``, first sample at absolute index k =
    ``quadkit._capture.start_index(cap)``) is written as a recording of its own: annotation
    and segment sample indices are shifted by -k (annotations ending before the slice are
    dropped, those straddling its start shortened; of the segments starting at or before
    it, the last one becomes sample 0 and earlier ones are dropped), and ``core:datetime``
    is moved to the time of the slice's first sample (``start_time`` plus k / sample_rate).

    Examples
    --------
    >>> import json, tempfile, pathlib, quadkit
    >>> cap = quadkit.capture([1 + 2j, -3 - 4j], sample_rate=1e6, center_frequency=868e6)
    >>> stem = pathlib.Path(tempfile.mkdtemp()) / "pair"
    >>> quadkit.io.write_sigmf(cap, stem).name
    'pair.sigmf-meta'
    >>> meta = json.loads(stem.with_suffix(".sigmf-meta").read_text())
    >>> meta["global"]["core:datatype"], meta["captures"][0]["core:frequency"]
    ('cf32_le', 868000000.0)
    >>> stem.with_suffix(".sigmf-data").read_bytes().hex()
    '0000803f00000040000040c0000080c0'

    Integer files hold the samples divided by ``full_scale``:

    >>> codes = quadkit.capture([1 + 2j, -3 - 4j], sample_rate=1e6, full_scale=32768)
    >>> _ = quadkit.io.write_sigmf(codes, stem.with_name("codes"), dtype="ci16_le")
    >>> stem.with_name("codes.sigmf-data").read_bytes().hex()
    '01000200fdfffcff'
    >>> quadkit.io.read_sigmf(stem.with_name("codes")).attrs["full_scale"]
    1.0
    """
    fmt = parse_datatype(dtype if dtype is not None else _default_datatype(cap),
                         source=f"write_sigmf: dtype for {path}")
    if not fmt.is_complex and cap.dtype.kind == "c":
        raise CaptureError(f"{path}: datatype {fmt.name!r} is real but the capture is complex; "
                           f"use 'c{fmt.name[1:]}'")
    check_rate(cap.attrs.get("sample_rate"), path)
    meta_path, data_path, archive = _names(path)
    doc = _documents(cap, fmt.name, meta_path)
    if archive:
        _write_archive(cap, meta_path, fmt, doc, overwrite=overwrite)
        return meta_path
    # Both targets are checked before either is written.
    check_writable(meta_path, overwrite=overwrite)
    check_writable(data_path, overwrite=overwrite)
    with atomic_path(meta_path, overwrite=overwrite) as tmp_meta, \
            atomic_path(data_path, overwrite=overwrite) as tmp_data:
        h = hashlib.sha512()
        with open(tmp_data, "wb") as fh:
            for raw in encoded_blocks(cap, fmt, meta_path):
                h.update(raw)
                fh.write(raw)
        doc["global"]["core:sha512"] = h.hexdigest()
        tmp_meta.write_text(json.dumps(doc, indent=2, allow_nan=False) + "\n")
    # leaving the block renames the data file first, then the metadata
    return meta_path


def _write_archive(cap: xr.DataArray, path: Path, fmt: Any, doc: dict, *,
                   overwrite: bool) -> None:
    stem = path.name[: -len(".sigmf")] or "recording"
    with atomic_path(path, overwrite=overwrite) as tmp:
        data_tmp = tmp.with_name(tmp.name + ".data")
        try:
            h = hashlib.sha512()
            with open(data_tmp, "wb") as fh:
                for raw in encoded_blocks(cap, fmt, path):
                    h.update(raw)
                    fh.write(raw)
            doc["global"]["core:sha512"] = h.hexdigest()
            meta_bytes = (json.dumps(doc, indent=2, allow_nan=False) + "\n").encode()
            import io as _io

            with tarfile.open(tmp, "w", format=tarfile.PAX_FORMAT) as tar:
                info = tarfile.TarInfo(f"{stem}/{stem}.sigmf-meta")
                info.size = len(meta_bytes)
                info.mode = 0o644
                tar.addfile(info, _io.BytesIO(meta_bytes))
                tar.add(data_tmp, arcname=f"{stem}/{stem}.sigmf-data", recursive=False)
        finally:
            if data_tmp.exists():
                data_tmp.unlink()
