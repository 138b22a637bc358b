"""The optional /events attributes pedestal_subtracted and trigger_mode: defaults keep older files valid, values
round-trip, bad values are named, and batches that disagree with their file are refused."""

import h5py
import numpy as np
import pytest

from trackfit import EventBatch, RawEventWriter, RawFormatError, open_raw
from trackfit.events import EventBatchError


def test_defaults_and_round_trip(tmp_path, make_batch):
    batch = make_batch(30, 1)
    with RawEventWriter(tmp_path / "plain.h5", batch.grid) as writer:
        writer.append(batch)
    with h5py.File(tmp_path / "plain.h5") as f:
        assert dict(f["events"].attrs) == {}  # ordinary runs look exactly as before the attributes existed
    with open_raw(tmp_path / "plain.h5") as reader:
        assert reader.pedestal_subtracted is True and reader.trigger_mode == "self"
        assert reader.read_all().pedestal_subtracted is True
    raw = EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, grid=batch.grid, pedestal_subtracted=False)
    with RawEventWriter(tmp_path / "raw.h5", batch.grid, trigger_mode="random") as writer:
        writer.append(raw.select(np.arange(10)))
        writer.append(raw.select(np.arange(10, 30)))
    with open_raw(tmp_path / "raw.h5") as reader:
        assert reader.pedestal_subtracted is False and reader.trigger_mode == "random"
        back = reader.read_all()
        assert back.pedestal_subtracted is False and "not pedestal-subtracted" in repr(reader)
        np.testing.assert_array_equal(back.signal, batch.signal)
    with pytest.raises(EventBatchError, match="cannot concatenate pedestal-subtracted batches with raw"):
        EventBatch.concatenate([batch, raw])


def test_mismatches_and_bad_values_are_named(tmp_path, make_batch):
    batch = make_batch(5, 2)
    with pytest.raises(ValueError, match=r"holds pedestal-subtracted signal but the batch is raw"):
        with RawEventWriter(tmp_path / "a.h5", batch.grid, pedestal_subtracted=True) as writer:
            writer.append(EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, grid=batch.grid,
                                     pedestal_subtracted=False))
    assert not (tmp_path / "a.h5").exists() and not list(tmp_path.glob("a.h5*"))
    with pytest.raises(ValueError, match=r"'trigger_mode' must be one of \('self', 'random'\)"):
        RawEventWriter(tmp_path / "b.h5", batch.grid, trigger_mode="cosmic")
    with pytest.raises(EventBatchError, match="'pedestal_subtracted' must be True or False"):
        EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, pedestal_subtracted="no")
    with RawEventWriter(tmp_path / "c.h5", batch.grid) as writer:
        writer.append(batch)
    for key, value, message in [("pedestal_subtracted", "maybe", "'pedestal_subtracted' must be true or false"),
                                ("pedestal_subtracted", 3, "'pedestal_subtracted' must be true or false"),
                                ("trigger_mode", "cosmic", "'trigger_mode' must be one of")]:
        with h5py.File(tmp_path / "c.h5", "r+") as f:
            f["events"].attrs[key] = value
        with pytest.raises(RawFormatError, match=f"file '.*c.h5', dataset '/events': attribute {message}"):
            open_raw(tmp_path / "c.h5")
        with h5py.File(tmp_path / "c.h5", "r+") as f:
            del f["events"].attrs[key]
