"""docs/bring-your-own-data.md: the converter keeps every record (compared with numpy's own reading of the file)
and streams: it appends block by block and never holds the whole input (peak traced memory, tracemalloc)."""

import re
import tracemalloc
from pathlib import Path

import numpy as np
import pytest

from trackfit import HexGrid, RawEventWriter, open_raw
from trackfit.events import EventBatchError

DOC = Path(__file__).resolve().parents[2] / "docs" / "bring-your-own-data.md"


@pytest.fixture
def example(tmp_path, monkeypatch):
    """The doc's converter (its first Python block) in a namespace."""
    monkeypatch.chdir(tmp_path)
    namespace = {}
    exec(compile(re.findall(r"```python\n(.*?)```", DOC.read_text(), flags=re.S)[0], str(DOC), "exec"), namespace)
    return namespace


def write_records(path, example, n, grid, seed=1):
    rng = np.random.default_rng(seed)
    records = np.zeros(n, dtype=example["RECORD"])
    records["counter"] = np.arange(n) + 100
    records["time_s"] = np.arange(n) * 1e-3
    records["first_column"] = rng.integers(0, grid.n_columns - 24 + 1, n)
    records["first_row"] = rng.integers(0, grid.n_rows - 24 + 1, n)
    records["window"] = rng.integers(250, 4095, (n, 24, 24))
    records.tofile(path)
    return records


def test_every_record_converts(example, tmp_path):
    grid = HexGrid(n_columns=80, n_rows=70)
    write_records(tmp_path / "in.bin", example, 1234, grid)
    example["convert_frames"](tmp_path / "in.bin", tmp_path / "out.h5", grid=grid, block_records=100)
    expected = np.fromfile(tmp_path / "in.bin", dtype=example["RECORD"])  # numpy reads the layout on its own
    with open_raw(tmp_path / "out.h5") as reader:
        assert len(reader) == 1234 and reader.pedestal_subtracted is False and reader.trigger_mode == "self"
        batch = reader.read_all()
    np.testing.assert_array_equal(batch.trigger_id, expected["counter"])
    np.testing.assert_array_equal(batch.time_s, expected["time_s"])
    np.testing.assert_array_equal(batch.roi[:, 0], expected["first_column"])
    np.testing.assert_array_equal(batch.roi[:, 1], expected["first_row"])
    for i in (0, 617, 1233):
        np.testing.assert_array_equal(batch.event(i).image(), expected["window"][i])


def test_conversion_streams(example, tmp_path, monkeypatch):
    grid = HexGrid()
    write_records(tmp_path / "big.bin", example, 12_000, grid)           # 14 MB of records
    sizes = []
    original = RawEventWriter.append

    def counting(self, batch):
        sizes.append(len(batch))
        return original(self, batch)

    monkeypatch.setattr(RawEventWriter, "append", counting)
    tracemalloc.start()
    example["convert_frames"](tmp_path / "big.bin", tmp_path / "big.h5", block_records=1000)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert sizes == [1000] * 12
    assert peak < 0.35 * (tmp_path / "big.bin").stat().st_size   # one block at a time, not the whole input


def test_a_bad_record_is_named(example, tmp_path):
    grid = HexGrid(n_columns=80, n_rows=70)
    records = write_records(tmp_path / "in.bin", example, 50, grid)
    records["first_column"][37] = 70  # the window would leave the chip
    records.tofile(tmp_path / "in.bin")
    with pytest.raises(EventBatchError, match=r"event 37 \(batch position 17\) is malformed: 'roi': ROI outside"):
        example["convert_frames"](tmp_path / "in.bin", tmp_path / "out.h5", grid=grid, block_records=20)
    assert not (tmp_path / "out.h5").exists()


def test_an_adc_value_beyond_int16_is_named_not_wrapped(example, tmp_path):
    grid = HexGrid(n_columns=80, n_rows=70)
    records = write_records(tmp_path / "in.bin", example, 50, grid)
    records["window"][41, 3, 5] = 40000  # a uint16 ADC value the int16 signal cannot hold (numpy.iinfo(int16))
    records.tofile(tmp_path / "in.bin")
    with pytest.raises(EventBatchError, match=r"'signal' must hold int16 values .*: event 41 \(batch position 1\), "
                                              r"signal\[\d+\] \(pixel 77 of the event\) is 40000 \(uint16\)"):
        example["convert_frames"](tmp_path / "in.bin", tmp_path / "out.h5", grid=grid, block_records=40)
    assert not (tmp_path / "out.h5").exists()
