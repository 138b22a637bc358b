"""Memory-mapped ranges of uncompressed datasets (``trackfit.io.mapped``): the values must equal what h5py reads
(the reference library), writes must never reach the file, and whatever cannot be mapped must be refused (None)
so that the caller reads through HDF5."""

from __future__ import annotations

import gc
import os
from pathlib import Path

import h5py
import numpy as np
import pytest

from trackfit import EventBatch, HexGrid, RawEventWriter, open_raw
from trackfit.io.mapped import MappedRanges

N = 50_000
RANGES = [(0, N), (0, 1), (N - 1, N), (4095, 4097), (12_345, 31_000), (8192, 16_384)]


def _values(n=N, dtype="<i2"):
    return ((np.arange(n) * 7919) % 4001 - 2000).astype(dtype)


def _file(path, **options):
    values = _values(dtype=options.pop("dtype", "<i2"))
    with h5py.File(path, "w") as f:
        f.create_dataset("x", data=values, **options)
    return values


def _maps_of(path) -> int:
    maps = Path("/proc/self/maps")
    return maps.read_text().count(str(Path(path).resolve())) if maps.exists() else 0


@pytest.mark.parametrize("options", [{}, {"chunks": (4096,)}, {"chunks": (1000,), "maxshape": (None,)}],
                         ids=["contiguous", "chunks", "resizable"])
def test_mapped_ranges_equal_what_h5py_reads(tmp_path, options):
    path = tmp_path / "a.h5"
    values = _file(path, **options)
    with h5py.File(path, "r") as f:
        ranges = MappedRanges(path, f["x"], np.int16)
        assert ranges.usable
        for a, b in RANGES:
            view = ranges.view(a, b)
            assert view is not None and view.dtype == np.int16
            np.testing.assert_array_equal(view, f["x"][a:b])  # h5py's own read: the reference
            np.testing.assert_array_equal(view, values[a:b])
        assert ranges.view(5, 5) is None  # nothing to map
        ranges.close()


def test_writes_into_a_view_stay_in_this_process_and_views_outlive_the_reader(tmp_path):
    path = tmp_path / "a.h5"
    values = _file(path)
    before = path.read_bytes()
    with h5py.File(path, "r") as f:
        ranges = MappedRanges(path, f["x"], np.int16)
        view = ranges.view(100, 200)
        view[:] = 7
        ranges.close()
    assert path.read_bytes() == before
    with h5py.File(path, "r") as f:
        np.testing.assert_array_equal(f["x"][100:200], values[100:200])
    np.testing.assert_array_equal(view, 7)  # still mapped: the mapping holds its own descriptor


@pytest.mark.skipif(not Path("/proc/self/maps").exists(), reason="needs /proc/self/maps (Linux)")
def test_a_mapping_is_released_with_the_last_array_over_it(tmp_path):
    path = tmp_path / "a.h5"
    _file(path)
    with h5py.File(path, "r") as f:
        ranges = MappedRanges(path, f["x"], np.int16)
        views = [ranges.view(a, b) for a, b in RANGES]
        assert _maps_of(path) >= len(RANGES)
        part = views[0][10:20]  # a view of a view keeps its mapping
        del views
        gc.collect()
        assert _maps_of(path) == 1
        del part
        gc.collect()
        assert _maps_of(path) == 0
        ranges.close()


@pytest.mark.parametrize(("options", "why"), [
    ({"chunks": (4096,), "compression": "gzip"}, "filtered"),
    ({"chunks": (4096,), "shuffle": True}, "filtered"),
    ({"dtype": ">i2"}, "big-endian"),
    ({"dtype": "<i4"}, "another dtype"),
])
def test_what_cannot_be_mapped_is_refused(tmp_path, options, why):
    path = tmp_path / "a.h5"
    _file(path, **options)
    with h5py.File(path, "r") as f:
        ranges = MappedRanges(path, f["x"], np.int16)
        assert not ranges.usable, why
        assert ranges.view(0, 10) is None


def test_unwritten_and_out_of_order_chunks_are_refused_range_by_range(tmp_path):
    path = tmp_path / "a.h5"
    values = _values(4 * 1000)
    with h5py.File(path, "w") as f:
        ds = f.create_dataset("x", shape=(5000,), dtype="<i2", chunks=(1000,))
        for k in (3, 2, 1, 0):  # chunks written last to first: laid out in the file in that order
            ds.id.write_direct_chunk((k * 1000,), values[k * 1000:(k + 1) * 1000].tobytes())
        # the fifth chunk is never written
    with h5py.File(path, "r") as f:
        ranges = MappedRanges(path, f["x"], np.int16)
        np.testing.assert_array_equal(ranges.view(1200, 1800), values[1200:1800])  # inside one chunk
        assert ranges.view(900, 1100) is None  # across chunks that are not in file order
        assert ranges.view(4100, 4200) is None  # in the chunk never written
        assert not ranges.read_into(3900, 4100, np.zeros(200, np.int16))


def test_ranges_over_chunks_out_of_file_order_are_copied_run_by_run(tmp_path):
    path = tmp_path / "a.h5"
    values = _values(5000)
    with h5py.File(path, "w") as f:
        ds = f.create_dataset("x", shape=(5000,), dtype="<i2", chunks=(1000,))
        for k in (0, 1, 4, 2, 3):  # runs: chunks 0-1, then 4, then 2-3
            ds.id.write_direct_chunk((k * 1000,), values[k * 1000:(k + 1) * 1000].tobytes())
    with h5py.File(path, "r") as f:
        ranges = MappedRanges(path, f["x"], np.int16)
        for a, b in [(0, 5000), (999, 1001), (1500, 4500), (10, 20), (4999, 5000), (0, 2000), (2000, 4000)]:
            out = np.full(b - a, -1, np.int16)
            assert ranges.read_into(a, b, out)
            np.testing.assert_array_equal(out, f["x"][a:b])  # h5py's own read: the reference
        assert ranges.read_into(7, 7, np.zeros(0, np.int16))
        view = ranges.view(2000, 4000)  # chunks 2 and 3 follow each other: one run, mapped
        assert view is not None
        np.testing.assert_array_equal(view, values[2000:4000])
        assert ranges.view(1500, 2500) is None  # chunk 1 is followed by chunk 4 in the file
        ranges.close()
        assert not ranges.read_into(0, 10, np.zeros(10, np.int16))  # closed


def test_bytes_beyond_the_end_of_the_file_are_not_mapped(tmp_path):
    """A file shortened after it was opened (HDF5 itself refuses to open a file shorter than its header says)."""
    path = tmp_path / "a.h5"
    _file(path)
    with h5py.File(path, "r") as f:
        ranges = MappedRanges(path, f["x"], np.int16)
        offset = f["x"].id.get_offset()
        os.truncate(path, offset + 2 * 1000)  # the first 1000 values are left
        np.testing.assert_array_equal(ranges.view(0, 1000), _values()[:1000])
        assert ranges.view(0, 1001) is None
        assert ranges.view(40_000, 40_010) is None
        assert ranges.read_into(0, 1000, np.zeros(1000, np.int16))
        assert not ranges.read_into(990, 1010, np.zeros(20, np.int16))
        ranges.close()


@pytest.mark.parametrize("compression", ["none", "gzip"])
@pytest.mark.parametrize("append", [700, 3000], ids=["many-appends", "one-append"])
def test_mapped_batches_equal_read_batches(tmp_path, compression, append):
    rng = np.random.default_rng(3)
    grid = HexGrid()
    images = [rng.integers(0, 400, size=(int(rng.integers(1, 9)), int(rng.integers(1, 9)))).astype(np.int16)
              for _ in range(3000)]
    corners = [(int(rng.integers(0, 280)), int(rng.integers(0, 330))) for _ in images]
    path = tmp_path / "raw.h5"
    with RawEventWriter(path, grid, compression=compression) as writer:
        for a in range(0, len(images), append):  # many appends interleave the chunks of the datasets in the file
            writer.append(EventBatch.from_images(images[a:a + append], corners[a:a + append], grid=grid))
    with open_raw(path) as reader:
        for a, b in [(0, 3000), (0, 1), (1000, 2999), (2999, 3000), (5, 5)]:
            mapped = reader.read_batch(a, b, with_truth=False, mapped=True)
            plain = reader.read_batch(a, b, with_truth=False)
            np.testing.assert_array_equal(mapped.signal, plain.signal)
            np.testing.assert_array_equal(mapped.start, plain.start)
            np.testing.assert_array_equal(mapped.roi, plain.roi)
            buffered = reader.read_batch(a, b, with_truth=False, mapped=True,
                                         buffer=lambda n: np.full(n + 5, -1, np.int16))
            np.testing.assert_array_equal(buffered.signal, plain.signal)
            if compression == "gzip":
                assert not isinstance(mapped.signal.base, memoryview)
        whole = reader.read_batch(0, 3000, mapped=True)
    np.testing.assert_array_equal(whole.signal, np.concatenate([image.ravel() for image in images]))
    if os.name == "posix":
        assert _maps_of(path) <= 1  # the reader is closed: only the batch kept alive holds a mapping


@pytest.mark.parametrize("bad", [np.zeros(10**6, np.int32), np.zeros((10**6, 2), np.int16)[:, 0],
                                 np.zeros(10, np.int16), [0] * 10**6], ids=["int32", "strided", "short", "list"])
def test_a_wrong_buffer_is_refused_before_anything_is_read_into_it(tmp_path, bad):
    grid = HexGrid()
    path = tmp_path / "raw.h5"
    with RawEventWriter(path, grid) as writer:
        writer.append(EventBatch.from_images([np.ones((4, 5), np.int16)] * 30, [(10, 10)] * 30, grid=grid))
    with open_raw(path) as reader:
        with pytest.raises(ValueError, match="'buffer' gave .*expected a writable, contiguous int16 array of at "
                                             "least 600 values"):
            reader.read_batch(0, 30, buffer=lambda n: bad)
        # a mapped read views the file (one run of bytes here) and never asks for the buffer
        np.testing.assert_array_equal(reader.read_batch(0, 30, mapped=True, buffer=lambda n: bad).signal, 1)
