"""quadkit.io lazy reads: equal to eager reads, nothing read while building, distributed."""

from __future__ import annotations

import os
import pickle

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from xarray.indexes import RangeIndex

import quadkit
from quadkit import io as qio
from quadkit._capture import is_lazy
from quadkit.testing import raise_if_dask_computes

RNG = np.random.default_rng(99)
N = 1009  # prime, so most chunk sizes leave a shorter last chunk


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("lazy")
    x = ((RNG.standard_normal((2, N)) + 1j * RNG.standard_normal((2, N))) * 0.25)
    two = quadkit.capture(x.astype(np.complex64), sample_rate=1e6, center_frequency=2.4e9)
    one = two.isel(channel=0, drop=True)
    out = {}
    for name, cap, opts in (
        ("one.sigmf-meta", one, {"dtype": "ci16_le"}),
        ("two.sigmf-meta", two, {"dtype": "cu8"}),
        ("one.sigmf", one, {"dtype": "cf32_be"}),
        ("one.wav", one, {"dtype": "int16"}),
        ("two.npy", two, {}),
        ("one.cs16", one, {"dtype": "ci16_le"}),
        ("one.nc", one, {}),
        ("two.zarr", two, {}),
    ):
        qio.write(cap, folder / name, **opts)
        extra = {}
        if name.endswith(".cs16"):
            extra = {"dtype": "ci16_le", "sample_rate": 1e6}
        elif name.endswith(".npy"):
            extra = {"sample_rate": 1e6}
        out[name] = (folder / name, extra)
    return out


NAMES = ["one.sigmf-meta", "two.sigmf-meta", "one.sigmf", "one.wav", "two.npy", "one.cs16",
         "one.nc", "two.zarr"]


@settings(max_examples=30, deadline=None)
@given(name=st.sampled_from(NAMES), size=st.integers(1, N + 5))
def test_lazy_equals_eager_random_chunk_sizes(files, name, size):
    path, extra = files[name]
    eager = qio.read(path, **extra)
    with raise_if_dask_computes():
        lazy = qio.read(path, chunks=size, **extra)
    assert is_lazy(lazy)
    chunks = lazy.chunks[-1]
    assert sum(chunks) == N and max(chunks) <= size
    assert lazy.dtype == eager.dtype and lazy.dims == eager.dims
    assert lazy.attrs == eager.attrs
    np.testing.assert_array_equal(lazy.values, eager.values)  # same bytes, same decoding


def test_explicit_chunk_sizes_with_short_last_chunk(files):
    path, _ = files["two.sigmf-meta"]
    sizes = (400, 400, 200, 9)
    lazy = qio.read(path, chunks=sizes)
    assert lazy.chunks == ((2,), sizes)
    np.testing.assert_array_equal(lazy.values, qio.read(path).values)
    # a slice of the lazy capture reads the same samples as a slice of the eager one
    np.testing.assert_array_equal(lazy.isel(time=slice(395, 810)).values,
                                  qio.read(path).values[:, 395:810])


def test_building_the_graph_reads_nothing(tmp_path, monkeypatch):
    # A 16 GiB sparse file: building its graph must not read it (nor hash it).
    path = tmp_path / "huge.sigmf-data"
    n_bytes = 16 * 2**30
    with open(path, "wb") as fh:
        fh.truncate(n_bytes)
    fake = quadkit.capture(np.zeros(1, np.complex64), sample_rate=20e6)
    qio.write_sigmf(fake, tmp_path / "tmpl", dtype="ci16_le")
    meta = (tmp_path / "tmpl.sigmf-meta").read_text()
    (tmp_path / "huge.sigmf-meta").write_text(meta)  # carries a sha512 of other data

    def no_reading(*args, **kwargs):
        raise AssertionError("the file was read while building the graph")

    monkeypatch.setattr(np, "fromfile", no_reading)
    monkeypatch.setattr("quadkit.io._sigmf._sha512", no_reading)
    with raise_if_dask_computes():
        cap = qio.read_sigmf(tmp_path / "huge.sigmf-meta", chunks=2**26)
    n = n_bytes // 4
    assert cap.sizes["time"] == n
    # the time coordinate is computed, not stored: no memory per sample
    assert isinstance(cap.xindexes["time"], RangeIndex)
    assert cap.data.npartitions == n // 2**26
    monkeypatch.undo()
    tail = cap.isel(time=slice(n - 3, None)).values  # reads only the last piece
    np.testing.assert_array_equal(tail, np.zeros(3, np.complex64))


def test_tasks_carry_path_offset_count_and_pickle(files):
    path, _ = files["two.sigmf-meta"]
    lazy = qio.read(path, chunks=300)
    graph = dict(lazy.data.__dask_graph__())
    blob = pickle.dumps(graph)
    # no samples and no memory map inside: a few hundred bytes per task
    assert len(blob) < 1000 * len(graph)
    assert os.fspath(path).replace(".sigmf-meta", ".sigmf-data").encode() in blob
    restored = pickle.loads(blob)
    import dask

    keys = [k for k in restored if k[0] == lazy.data.name]
    values = dask.get(restored, sorted(keys))
    np.testing.assert_array_equal(np.concatenate(values, axis=-1), qio.read(path).values)


def test_lazy_read_on_a_distributed_cluster(files):
    distributed = pytest.importorskip("distributed")
    path, _ = files["two.sigmf-meta"]
    eager = qio.read(path)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        lazy = qio.read(path, chunks=250)
        # a reduction and the samples themselves, computed in the worker process
        power = client.compute((abs(lazy) ** 2).mean("time")).result()
        samples = client.compute(lazy).result()
    np.testing.assert_array_equal(samples.values, eager.values)
    # mean power from numpy on the eager samples; float32 summation order differs
    np.testing.assert_allclose(power.values, (np.abs(eager.values) ** 2).mean(-1), rtol=1e-5)


def test_lazy_capture_is_written_chunk_by_chunk(files, tmp_path):
    import sigmf

    path, _ = files["two.sigmf-meta"]
    lazy = qio.read(path, chunks=111)
    # one computation per chunk, never the whole capture at once
    with raise_if_dask_computes(max_computes=len(lazy.chunks[-1])):
        qio.write_sigmf(lazy, tmp_path / "copy")
    data = path.with_name("two.sigmf-data").read_bytes()
    assert (tmp_path / "copy.sigmf-data").read_bytes() == data
    sigmf.fromfile(str(tmp_path / "copy"))  # checks the sha512 we computed while streaming
