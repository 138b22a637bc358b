"""Event tables in memory (EventTable) and on disk (format version 1, docs/table-format.md)."""

import h5py
import numpy as np
import pytest

from trackfit import EventTable, TableFormatError, read_table, write_table
from trackfit.io.table import COLUMN_DOCS, TableWriter


def _columns(n=10, seed=0):
    rng = np.random.default_rng(seed)
    return {
        "trigger_id": np.arange(n, dtype=np.int64) * 2,
        "status": rng.integers(0, 4, n).astype(np.uint16),
        "energy_kev": rng.uniform(1, 8, n).astype(np.float32),
        "emission_rad": np.where(rng.random(n) < 0.2, np.nan, rng.uniform(-3, 3, n)),
        "flag": rng.random(n) < 0.5,
    }


def test_mapping_behaviour_rows_and_selection():
    cols = _columns()
    table = EventTable(cols, provenance={"input_name": "run.h5"})
    assert len(table) == 10 and table.columns == list(cols) and list(table) == list(cols)
    assert "status" in table and "nothing" not in table
    assert dict(table).keys() == cols.keys()
    with pytest.raises(KeyError, match="has \\['trigger_id'"):
        table["nothing"]
    with pytest.raises(ValueError, match="read-only"):
        table["status"][0] = 3
    row = table.row(3)
    assert set(row) == set(cols) and isinstance(row["trigger_id"], int) and isinstance(row["energy_kev"], float)
    assert isinstance(row["flag"], bool) and row["trigger_id"] == 6
    assert table.row(-1)["trigger_id"] == 18
    with pytest.raises(IndexError):
        table.row(10)
    good = table.select(table["status"] == 0)
    assert len(good) == int((cols["status"] == 0).sum()) and good.provenance == table.provenance
    assert list(table.select([4, 2])["trigger_id"]) == [8, 4]
    with pytest.raises(ValueError, match="boolean mask has 3 entries"):
        table.select(np.ones(3, bool))
    both = EventTable.concatenate([table, good])
    assert len(both) == len(table) + len(good)
    assert len(table.with_columns(extra=np.zeros(10))) == 10


def test_construction_errors_and_empty_table():
    with pytest.raises(ValueError, match="'b' has 3 rows but 'a' has 2"):
        EventTable({"a": np.zeros(2), "b": np.zeros(3)})
    with pytest.raises(ValueError, match="must be 1-D"):
        EventTable({"a": np.zeros((2, 2))})
    with pytest.raises(ValueError, match="numeric or boolean"):
        EventTable({"a": np.array(["x"])})
    empty = EventTable({})
    assert len(empty) == 0 and empty.columns == [] and "0 rows" in repr(empty)


def test_summary_repr_html_and_pandas():
    table = EventTable(_columns(), provenance={"input_name": "run.h5"})
    text = table.summary()
    assert "10 rows" in text and "emission_rad" in text and "run.h5" in text and "status == 0" in text
    nan_count = int(np.isnan(table["emission_rad"]).sum())
    line = next(ln for ln in text.splitlines() if ln.startswith("emission_rad"))
    assert line.split()[-1] == str(nan_count)
    assert "EventTable(10 rows" in repr(table)
    assert "<table>" in table._repr_html_() and "energy_kev" in table._repr_html_()
    pd = pytest.importorskip("pandas")
    frame = table.to_pandas()
    assert isinstance(frame, pd.DataFrame) and len(frame) == 10 and frame.attrs["provenance"]["input_name"] == "run.h5"


def test_to_pandas_without_pandas(monkeypatch):
    import builtins

    real_import = builtins.__import__

    def no_pandas(name, *args, **kwargs):
        if name == "pandas":
            raise ImportError("no pandas here")
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_pandas)
    with pytest.raises(ImportError, match=r'pip install "trackfit\[pandas\]"'):
        EventTable(_columns()).to_pandas()


@pytest.mark.parametrize("compression", ["lzf", "gzip", "none"])
def test_write_read_round_trip(tmp_path, compression):
    table = EventTable(_columns(1000), provenance={"input_name": "run.h5", "config_toml": "x = 1\n" * 2000,
                                                    "input_size_bytes": 12345, "numbers": [1.5, 2.5]})
    path = write_table(tmp_path / "t.h5", table, provenance={"note": "extra"}, compression=compression)
    back = read_table(path)
    assert back.columns == table.columns
    for name in table:
        assert back[name].dtype == table[name].dtype
        assert np.array_equal(back[name], table[name], equal_nan=name == "emission_rad")
    prov = back.provenance
    assert prov["config_toml"] == "x = 1\n" * 2000 and prov["note"] == "extra" and prov["input_size_bytes"] == 12345
    assert prov["numbers"] == [1.5, 2.5] and "trackfit_version" in prov and "created_utc" in prov
    some = read_table(path, ["status", "trigger_id"], start=100, stop=110)
    assert some.columns == ["status", "trigger_id"] and list(some["trigger_id"]) == list(range(200, 220, 2))
    with h5py.File(path) as f:  # the layout of docs/table-format.md
        assert f.attrs["trackfit_format"] == "event-table" and f.attrs["format_version"] == 2
        ds = f["events/status"]
        assert ds.chunks is not None and ds.maxshape == (None,)
        assert (ds.compression is None) == (compression == "none")
        assert ds.attrs["description"] == COLUMN_DOCS["status"][2]


def test_streaming_writer_appends_and_renames(tmp_path):
    path = tmp_path / "stream.h5"
    with TableWriter(path, provenance={"a": 1}, chunk_rows=7) as writer:
        assert writer.partial_path.exists() and not path.exists()
        assert writer.partial_path.name.startswith("stream.h5.") and writer.partial_path.suffix == ".partial"
        writer.append(_columns(10, 1))
        writer.append(EventTable(_columns(5, 2)))
        writer.append({k: v[:0] for k, v in _columns(3).items()})
        writer.set_provenance(fingerprint="abc")
        with pytest.raises(ValueError, match="differ from those of earlier appends"):
            writer.append({"status": np.zeros(2, np.uint16)})
        with pytest.raises(ValueError, match="do not fit the column dtype"):
            writer.append({**_columns(2), "status": np.array([1.5, 2.0])})
    table = read_table(path)
    assert len(table) == 15 and table.provenance["fingerprint"] == "abc" and table.provenance["a"] == 1
    assert sorted(p.name for p in tmp_path.iterdir()) == ["stream.h5"]
    with pytest.raises(FileExistsError):
        TableWriter(path)


def test_aborted_writer_leaves_nothing(tmp_path):
    path = tmp_path / "crash.h5"
    with pytest.raises(RuntimeError), TableWriter(path) as writer:
        writer.append(_columns(4))
        raise RuntimeError("boom")
    assert list(tmp_path.iterdir()) == []


def _corrupt(path, action):
    with h5py.File(path, "r+") as f:
        action(f)


@pytest.mark.parametrize("action, dataset, text", [
    (lambda f: f.attrs.__setitem__("trackfit_format", "raw-events"), "/", "must be 'event-table'"),
    (lambda f: f.attrs.__setitem__("format_version", 3), "/", "unknown format_version 3"),
    (lambda f: f.attrs.__delitem__("format_version"), "/", "missing root attribute 'format_version'"),
    (lambda f: f.__delitem__("events"), "/events", "missing group"),
    (lambda f: (f["events"].__delitem__("status"), f["events"].create_dataset("status", data=np.zeros(3))),
     "/events/status", "has 3 rows but /events/trigger_id has 10"),
    (lambda f: f["events"].create_dataset("image", data=np.zeros((10, 2))), "/events/image", "expected a 1-D"),
    (lambda f: f["events"].create_group("sub"), "/events/sub", "expected a dataset, found a group"),
])
def test_malformed_files_name_file_and_dataset(tmp_path, action, dataset, text):
    path = write_table(tmp_path / "t.h5", _columns())
    _corrupt(path, action)
    with pytest.raises(TableFormatError) as err:
        read_table(path)
    assert isinstance(err.value, ValueError) and err.value.dataset == dataset
    assert str(path) in str(err.value) and text in str(err.value) and f"dataset '{dataset}'" in str(err.value)


def test_unknown_columns_and_wrong_files(tmp_path):
    path = write_table(tmp_path / "t.h5", _columns())
    with pytest.raises(KeyError) as err:
        read_table(path, ["status", "energy"])
    assert "['energy']" in str(err.value) and "energy_kev" in str(err.value)
    notes = tmp_path / "notes.h5"
    notes.write_text("not hdf5")
    with pytest.raises(TableFormatError, match="not a readable HDF5 file"):
        read_table(notes)
    with pytest.raises(FileNotFoundError):
        read_table(tmp_path / "missing.h5")
    with pytest.raises(FileExistsError):
        write_table(path, _columns())
    write_table(path, _columns(3), overwrite=True)
    assert len(read_table(path)) == 3


def test_provenance_lists_of_strings_round_trip(tmp_path):
    table = EventTable({"energy_kev": np.array([5.9, 3.7], np.float32)})
    path = write_table(tmp_path / "t.h5", table, provenance={"runs": ["a.h5", "b.h5"], "cuts_kev": [2.0, 8.0]})
    provenance = read_table(path).provenance
    assert provenance["runs"] == ["a.h5", "b.h5"] and provenance["cuts_kev"] == [2.0, 8.0]


def test_version_1_tables_are_read_with_the_new_column_names(tmp_path):
    # a file as trackfit 0.1 wrote it: format_version 1 and the old names of five columns
    old = {"status": np.zeros(4, np.uint16), "bary_x_mm": np.arange(4, dtype=np.float32),
           "bary_y_mm": -np.arange(4, dtype=np.float32), "mom2_long": np.full(4, 0.04, np.float32),
           "mom2_trans": np.full(4, 0.01, np.float32), "mom3_long": np.full(4, 1e-3, np.float32)}
    path = write_table(tmp_path / "v1.h5", old)
    with h5py.File(path, "r+") as f:
        f.attrs["format_version"] = 1
    table = read_table(path)
    assert table.columns == ["status", "centroid_x_mm", "centroid_y_mm", "m2_major_mm2", "m2_minor_mm2",
                             "m3_major_mm3"]
    assert np.array_equal(table["centroid_y_mm"], old["bary_y_mm"]) and table["m2_major_mm2"][0] == np.float32(0.04)
    assert table.provenance["read_from_format_version"] == 1
    assert read_table(path, ["m3_major_mm3"]).columns == ["m3_major_mm3"]


def test_chunks_are_sized_from_the_row_count(tmp_path):
    """HDF5 allocates whole chunks: a 3 000-row table in 65 536-row chunks took 8.8 MB for 0.4 MB of values."""
    from trackfit.io.table import DEFAULT_CHUNK_ROWS, chunk_rows_for

    cols = _columns(3000, seed=4)
    data_bytes = sum(np.asarray(v).nbytes for v in cols.values())  # numpy's own count of the values
    path = tmp_path / "small.h5"
    with TableWriter(path, expected_rows=3000) as writer:
        writer.append({k: v[:1000] for k, v in cols.items()})
        writer.append({k: v[1000:] for k, v in cols.items()})
    with h5py.File(path) as f:
        assert {f["events"][name].chunks for name in cols} == {(3000,)}
    assert path.stat().st_size < data_bytes + 20_000  # the values plus HDF5's headers and attributes
    write_table(tmp_path / "whole.h5", cols)
    with h5py.File(tmp_path / "whole.h5") as f:
        assert f["events/status"].chunks == (3000,) and f["events/status"].compression is None
    # large tables keep 65 536-row chunks; a writer that does not know the size uses small ones
    assert chunk_rows_for(10 * DEFAULT_CHUNK_ROWS) == DEFAULT_CHUNK_ROWS
    with TableWriter(tmp_path / "unknown.h5") as writer:
        writer.append(cols)
    with h5py.File(tmp_path / "unknown.h5") as f:
        assert f["events/status"].chunks == (chunk_rows_for(None),)


def test_exact_row_count_stores_columns_contiguously(tmp_path):
    """Told the exact row count, an uncompressed writer stores each column as one contiguous block (h5py reports
    ``chunks is None`` for the contiguous layout); a wrong count is refused and leaves no file."""
    cols = _columns(3000, seed=5)
    path = tmp_path / "exact.h5"
    with TableWriter(path, expected_rows=3000, exact_rows=True) as writer:
        writer.append({k: v[:1000] for k, v in cols.items()})
        writer.append({k: v[1000:] for k, v in cols.items()})
    with h5py.File(path) as f:
        assert {f["events"][name].chunks for name in cols} == {None}
    back = read_table(path)
    for name, values in cols.items():
        np.testing.assert_array_equal(back[name], values)
    with TableWriter(tmp_path / "lzf.h5", expected_rows=3000, exact_rows=True, compression="lzf") as writer:
        writer.append(cols)
    with h5py.File(tmp_path / "lzf.h5") as f:
        assert f["events/status"].chunks is not None  # filters need chunks
    with pytest.raises(ValueError, match="more than the 2999 announced"):
        with TableWriter(tmp_path / "short.h5", expected_rows=2999, exact_rows=True) as writer:
            writer.append(cols)
    with pytest.raises(ValueError, match="not the 3001 announced"):
        with TableWriter(tmp_path / "long.h5", expected_rows=3001, exact_rows=True) as writer:
            writer.append(cols)
    assert not list(tmp_path.glob("short.h5*")) and not list(tmp_path.glob("long.h5*"))
    with pytest.raises(ValueError, match="'exact_rows' needs 'expected_rows'"):
        TableWriter(tmp_path / "none.h5", exact_rows=True)
