"""Columns copied whole into a table (``TableWriter.copy_column``) and the text attributes the writers add through
h5py's low-level API: checked against h5py's own high-level reads and writes (the reference library)."""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from trackfit.io.table import TableWriter, _new_text_attribute, read_table


def _source(path, n, *, chunks, compression=None, dtype="<f4"):
    values = (np.arange(n, dtype=np.float64) * 0.37 - 11.0).astype(dtype)
    with h5py.File(path, "w") as f:
        # resizable, as the simulator writes its truth: a chunk may then be longer than the data
        f.create_dataset("x", data=values, chunks=chunks, compression=compression,
                         maxshape=(None,) if chunks else None)
    return values


@pytest.mark.parametrize(("n", "chunks", "compression"), [
    (50_000, (4096,), None),  # chunks no longer than the data, uncompressed: HDF5 copies the stored bytes
    (100, (16384,), None),  # a chunk longer than the data: copied through memory
    (3000, (1000,), "gzip"),  # a compressed source: through memory
    ((1 << 20) + 7, None, None),  # contiguous, more rows than one step of the copy through memory
    (0, None, None),
])
@pytest.mark.parametrize("exact_rows", [True, False])
def test_a_copied_column_holds_what_h5py_reads_from_the_source(tmp_path, n, chunks, compression, exact_rows):
    values = _source(tmp_path / "source.h5", n, chunks=chunks, compression=compression, dtype=">f8" if n == 100
                     else "<f4")
    out = tmp_path / "table.h5"
    with h5py.File(tmp_path / "source.h5", "r") as source, \
            TableWriter(out, expected_rows=n, exact_rows=exact_rows and n > 0) as writer:
        writer.append({"a": np.arange(n, dtype=np.int32), "b": np.ones(n, np.float32)})
        writer.copy_column("truth_x", source["x"])
        writer.copy_column("truth_y", source["x"])
        assert writer.columns == ["a", "b", "truth_x", "truth_y"]
    with h5py.File(out, "r") as f:
        # h5py's high-level read is the reference for both the source and the copy
        np.testing.assert_array_equal(f["events/truth_x"][...], values)
        assert f["events/truth_x"].dtype == values.dtype
        assert [v.decode() if isinstance(v, bytes) else v for v in f["events"].attrs["column_order"]] == \
            ["a", "b", "truth_x", "truth_y"]
        assert int(f["events"].attrs["n_rows"]) == n
    table = read_table(out)
    assert table.columns[-2:] == ["truth_x", "truth_y"]
    np.testing.assert_array_equal(table["truth_y"], values)


def test_a_copied_column_of_another_length_is_refused_at_close(tmp_path):
    _source(tmp_path / "source.h5", 10, chunks=None)
    with h5py.File(tmp_path / "source.h5", "r") as source:
        writer = TableWriter(tmp_path / "table.h5", expected_rows=12, exact_rows=True)
        writer.append({"a": np.zeros(12)})
        writer.copy_column("truth_x", source["x"])
        with pytest.raises(ValueError, match="copied column 'truth_x' has 10 rows, the table 12"):
            writer.close()
    assert not (tmp_path / "table.h5").exists()


@pytest.mark.parametrize("text", ["keV", "", "photoelectron emission angle, °", "x" * 5000])
def test_text_attributes_are_stored_as_h5py_stores_a_python_str(tmp_path, text):
    with h5py.File(tmp_path / "a.h5", "w") as f:
        ds = f.create_dataset("d", shape=(3,), dtype="f4")
        ds.attrs["reference"] = text  # h5py's own way: the reference
        _new_text_attribute(ds, "ours", text)
    with h5py.File(tmp_path / "a.h5", "r") as f:
        ds = f["d"]
        assert ds.attrs["ours"] == ds.attrs["reference"] == text
        ours, reference = ds.attrs.get_id("ours"), ds.attrs.get_id("reference")
        assert ours.get_type() == reference.get_type()
        assert ours.get_type().is_variable_str() and ours.get_type().get_cset() == h5py.h5t.CSET_UTF8
        assert ours.get_space().get_simple_extent_type() == reference.get_space().get_simple_extent_type() \
            == h5py.h5s.SCALAR
