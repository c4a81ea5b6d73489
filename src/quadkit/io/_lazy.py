"""Reading sample blocks from binary files, eagerly or as a lazy dask array.

A lazy read builds one dask task per chunk. Each task is a call of :func:`read_block` with
plain arguments -- (path, byte offset, sample count, datatype name, channels, row stride) -- so
the graph pickles to a ``dask.distributed`` worker, holds no open file or memory map, and
building it reads nothing from the file (only its size is looked up).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import Any

import numpy as np

from .._errors import CaptureError
from ._datatypes import SampleFormat, decode, parse_datatype

__all__ = ["read_block", "load_samples", "chunk_sizes"]

#: Decoded bytes per chunk for ``chunks="auto"``.
_AUTO_CHUNK_BYTES = 64 * 2**20


def read_block(
    path: str,
    offset: int,
    count: int,
    datatype: str,
    channels: int = 1,
    row_stride: int | None = None,
) -> np.ndarray:
    """Read and decode ``count`` samples per channel starting at byte ``offset``.

    ``row_stride=None``: channels interleaved sample by sample (SigMF, WAV, raw); the block
    is a frame run ``count * channels`` samples long. Otherwise channel ``k``'s run starts at
    ``offset + k * row_stride`` (a C-ordered ``(channel, time)`` array, as in ``.npy``).

    Returns shape ``(count,)`` for one channel, ``(channels, count)`` otherwise.
    """
    fmt = parse_datatype(datatype)
    per = fmt.components
    if row_stride is None:
        n = count * channels * per
        raw = np.fromfile(path, dtype=fmt.component, count=n, offset=offset)
        _check_length(path, raw.size, n, offset, fmt)
        out = decode(raw, fmt, scratch=True)
        if channels > 1:
            out = np.ascontiguousarray(out.reshape(count, channels).T)
        return out
    rows = []
    for k in range(channels):
        start = offset + k * row_stride
        raw = np.fromfile(path, dtype=fmt.component, count=count * per, offset=start)
        _check_length(path, raw.size, count * per, start, fmt)
        rows.append(decode(raw, fmt, scratch=True))
    return rows[0] if channels == 1 else np.stack(rows)


def _check_length(path: str, got: int, want: int, offset: int, fmt: SampleFormat) -> None:
    if got != want:
        raise CaptureError(
            f"{path}: expected {want * fmt.component.itemsize} bytes of {fmt.name} samples at "
            f"byte offset {offset}, found {got * fmt.component.itemsize}; the file is shorter "
            "than its metadata says (was it truncated or changed after it was opened?)"
        )


def chunk_sizes(n: int, chunks: Any, sample_bytes: int, *, source: str) -> tuple[int, ...]:
    """Time chunk sizes for ``n`` samples from ``chunks`` (int, sequence of ints or "auto")."""
    if isinstance(chunks, dict):
        chunks = chunks.get("time", "auto")
    if chunks == "auto":
        chunks = max(1, _AUTO_CHUNK_BYTES // max(sample_bytes, 1))
    if isinstance(chunks, (int, np.integer)) and not isinstance(chunks, bool):
        size = int(chunks)
        if size < 1:
            raise ValueError(f"{source}: chunks={chunks!r} must be a positive number of samples")
        if n == 0:
            return (0,)
        full, rest = divmod(n, size)
        return (size,) * full + ((rest,) if rest else ())
    if isinstance(chunks, Sequence) and not isinstance(chunks, str):
        sizes = tuple(int(c) for c in chunks)
        if any(c < 0 for c in sizes) or sum(sizes) != n:
            raise ValueError(
                f"{source}: chunks={tuple(chunks)!r} must be non-negative sizes adding up to "
                f"the {n} samples of the file"
            )
        return sizes
    raise ValueError(
        f"{source}: chunks={chunks!r} must be a positive int (samples per chunk), a sequence "
        "of chunk sizes, or 'auto'"
    )


def load_samples(
    path: str | os.PathLike[str],
    *,
    offset: int,
    count: int,
    datatype: str,
    channels: int = 1,
    row_stride: int | None = None,
    chunks: Any = None,
) -> Any:
    """Samples of a file region as a numpy array (``chunks=None``) or a lazy dask array."""
    path = os.fspath(path)
    fmt = parse_datatype(datatype)
    if chunks is None:
        return read_block(path, offset, count, datatype, channels, row_stride)
    import dask.array as da
    from dask.base import tokenize
    from dask.highlevelgraph import HighLevelGraph

    sizes = chunk_sizes(count, chunks, fmt.sample_bytes * channels, source=path)
    st = os.stat(path)
    name = "quadkit-read-" + tokenize(
        os.path.abspath(path), st.st_size, st.st_mtime_ns, offset, count, datatype, channels,
        row_stride, sizes,
    )
    step = fmt.sample_bytes if row_stride is not None else fmt.sample_bytes * channels
    dsk: dict[tuple, tuple] = {}
    start = 0
    for i, size in enumerate(sizes):
        key = (name, i) if channels == 1 else (name, 0, i)
        dsk[key] = (read_block, path, offset + start * step, size, datatype, channels,
                    row_stride)
        start += size
    if channels == 1:
        dask_chunks: tuple = (sizes,)
        meta = np.empty((0,), fmt.output)
    else:
        dask_chunks = ((channels,), sizes)
        meta = np.empty((0, 0), fmt.output)
    graph = HighLevelGraph.from_collections(name, dsk, dependencies=[])
    return da.Array(graph, name, dask_chunks, dtype=fmt.output, meta=meta)


def whole_samples(path: str, n_bytes: int, frame_bytes: int, *, what: str) -> int:
    """Number of whole frames in ``n_bytes``; CaptureError for an empty or ragged file."""
    if n_bytes <= 0:
        raise CaptureError(f"{path}: the {what} is empty (0 bytes of samples)")
    frames, left = divmod(n_bytes, frame_bytes)
    if left:
        raise CaptureError(
            f"{path}: {n_bytes} bytes of samples is not a whole number of {frame_bytes}-byte "
            f"samples: {left} byte{'s' if left != 1 else ''} left over after {frames} samples "
            "(wrong datatype, channel count or header offset?)"
        )
    return frames
