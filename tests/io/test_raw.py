"""Raw event files: round trips, streaming, and the named error of every malformed case (docs/raw-format.md)."""

import tracemalloc

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from trackfit import EventBatch, HexGrid, RawEventWriter, RawFormatError, open_raw, write_raw
from trackfit.io import available_compressions

FIELDS = ("roi", "start", "signal", "time_s", "trigger_id", "index", "bad")


def assert_same_events(a: EventBatch, b: EventBatch):
    a, b = a.compact(), b.compact()
    for name in FIELDS:
        x, y = getattr(a, name), getattr(b, name)
        assert x.dtype == y.dtype, name
        assert np.array_equal(x, y), name
    assert sorted(a.truth) == sorted(b.truth)
    for key in a.truth:
        assert a.truth[key].dtype == b.truth[key].dtype and np.array_equal(a.truth[key], b.truth[key])


@st.composite
def runs(draw):
    """A small random chip and 1-3 batches for it."""
    grid = HexGrid(n_columns=draw(st.integers(1, 40)), n_rows=draw(st.integers(1, 30)),
                   shifted_rows=draw(st.sampled_from(["odd", "even"])))
    return grid, [draw(ragged_batches(grid)) for _ in range(draw(st.integers(1, 3)))]


@st.composite
def ragged_batches(draw, grid):
    """Random batches: sizes 0..30, ROIs from 1x1 up to 9x7 anywhere on the chip, full int16 range."""
    n = draw(st.integers(0, 30))
    rois, pixels = [], []
    for _ in range(n):
        nc = draw(st.integers(1, min(9, grid.n_columns)))
        nr = draw(st.integers(1, min(7, grid.n_rows)))
        c0 = draw(st.integers(0, grid.n_columns - nc))
        r0 = draw(st.integers(0, grid.n_rows - nr))
        rois.append((c0, r0, nc, nr))
        pixels.append(draw(st.lists(st.integers(-32768, 32767), min_size=nc * nr, max_size=nc * nr)))
    start = np.concatenate([[0], np.cumsum([len(p) for p in pixels])])
    signal = np.array([v for p in pixels for v in p], dtype=np.int16)
    time_s = np.array(draw(st.lists(st.floats(0, 1e6), min_size=n, max_size=n)))
    trigger_id = np.array(draw(st.lists(st.integers(-(2**62), 2**62), min_size=n, max_size=n)), dtype=np.int64)
    return EventBatch(roi=np.array(rois, dtype=np.int32).reshape(-1, 4), start=start, signal=signal,
                      time_s=time_s, trigger_id=trigger_id, grid=grid)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(run=runs(), compression=st.sampled_from(["lzf", "gzip", "none"]))
def test_round_trip_is_bit_exact(tmp_path_factory, run, compression):
    grid, batches = run
    path = tmp_path_factory.mktemp("rt") / "run.h5"
    with RawEventWriter(path, grid, compression=compression) as writer:
        for b in batches:
            writer.append(b)  # empty batches included
    expected = EventBatch.concatenate(batches)
    expected = EventBatch(roi=expected.roi, start=expected.start, signal=expected.signal, time_s=expected.time_s,
                          trigger_id=expected.trigger_id, grid=grid)
    with open_raw(path) as reader:
        assert len(reader) == len(expected)
        assert reader.grid == grid
        assert_same_events(reader.read_all(), expected)
        # streaming in odd-sized batches gives the same events
        streamed = list(reader.iter_batches(7))
        if streamed:
            assert_same_events(EventBatch.concatenate(streamed), expected)


@pytest.mark.parametrize("compression", available_compressions())
def test_every_filter_round_trips(tmp_path, make_batch, compression):
    batch = make_batch(300, 5, with_truth=True)
    path = write_raw(tmp_path / f"{compression}.h5", batch, compression=compression)
    with open_raw(path) as reader:
        assert_same_events(reader.read_all(), batch)
        assert reader.truth_names == ["energy_kev", "shell"]


def test_header_run_info_and_single_events(small_raw_file):
    path, batch = small_raw_file
    with open_raw(path) as reader:
        assert reader.header["trackfit_format"] == "raw-events"
        assert reader.header["format_version"] == 1
        assert reader.header["created_by"].startswith("trackfit ")
        assert reader.header["created_utc"].endswith("Z")
        assert reader.run_info == {"source": "test generator", "pressure_atm": 1.0}
        assert reader.n_pixels_total == len(batch.signal)
        event = reader[123]
        expected = batch.event(123)
        assert event.index == 123 and event.trigger_id == expected.trigger_id
        assert np.array_equal(event.signal, expected.signal)
        c0, r0, nc, nr = batch.roi[123]
        # row by row: rows outer, columns inner
        assert np.array_equal(event.columns.reshape(nr, nc), np.tile(np.arange(c0, c0 + nc), (nr, 1)))
        assert np.array_equal(event.rows.reshape(nr, nc), np.repeat(np.arange(r0, r0 + nr)[:, None], nc, 1))
        x, y = reader.grid.pixel_centre_mm(event.columns, event.rows)
        assert np.array_equal(event.x_mm, x) and np.array_equal(event.y_mm, y)
        assert event.image().shape == (nr, nc)
        assert reader[-1].index == len(batch) - 1
        with pytest.raises(IndexError, match="holds 500 events"):
            reader[500]
        truth = reader.read_truth(["shell"], 10, 20)
        assert np.array_equal(truth["shell"], batch.truth["shell"][10:20])


def test_run_info_values(tmp_path, make_batch):
    batch = make_batch(3, 2)
    info = {"source": "Fe-55 line source", "voltages_v": [350.0, 520.5], "shells": ["K", "L1", "L2"], "n": 3,
            "notes": "line one\nline two"}
    path = write_raw(tmp_path / "info.h5", batch, run_info=info)
    with open_raw(path) as reader:
        got = reader.run_info
    assert got["shells"] == ["K", "L1", "L2"] and got["source"] == info["source"] and got["n"] == 3
    assert np.array_equal(got["voltages_v"], info["voltages_v"]) and got["notes"] == info["notes"]
    with pytest.raises(TypeError, match="store structured information as TOML or JSON text"):
        write_raw(tmp_path / "bad.h5", batch, run_info={"nested": {"a": 1}})
    assert sorted(p.name for p in tmp_path.iterdir()) == ["info.h5"]  # no partial file left behind


def test_prefetch_gives_the_same_batches(small_raw_file):
    path, batch = small_raw_file
    with open_raw(path) as reader:
        plain = list(reader.iter_batches(64))
        fetched = list(reader.iter_batches(64, prefetch=True))
        partial = list(reader.iter_batches(64, start=100, stop=290, prefetch=True))
    assert [len(b) for b in plain] == [64] * 7 + [52]
    for a, b in zip(plain, fetched, strict=True):
        assert_same_events(a, b)
    assert_same_events(EventBatch.concatenate(partial), batch.select(np.arange(100, 290)))


def test_writer_leaves_no_file_on_failure(tmp_path, make_batch):
    batch = make_batch(10, 1)
    path = tmp_path / "crash.h5"
    with pytest.raises(RuntimeError):
        with RawEventWriter(path, batch.grid) as writer:
            writer.append(batch)
            assert not path.exists()  # data go to a partial file until close
            raise RuntimeError("acquisition died")
    assert not path.exists()
    assert list(tmp_path.iterdir()) == []


def test_writer_refuses_to_overwrite_and_other_chips(tmp_path, make_batch):
    batch = make_batch(10, 1)
    path = write_raw(tmp_path / "a.h5", batch)
    with pytest.raises(FileExistsError, match="exists"):
        RawEventWriter(path, batch.grid)
    with RawEventWriter(tmp_path / "b.h5", HexGrid()) as writer, pytest.raises(ValueError, match="geometry"):
        writer.append(batch)
    with pytest.raises(ValueError, match="unknown compression 'snappy'"):
        RawEventWriter(tmp_path / "c.h5", batch.grid, compression="snappy")


# ---------------------------------------------------------------------------------------------- malformed files
def _corrupt(path, action):
    with h5py.File(path, "r+") as f:
        action(f)


def _replace(f, name, values):
    del f[name]
    f.create_dataset(name, data=values)


CASES = {
    "missing dataset": (lambda f: f["events"].__delitem__("time_s"), "/events/time_s", None, "missing dataset"),
    "missing attribute": (lambda f: f["geometry"].attrs.__delitem__("pitch_mm"), "/geometry", None,
                          "missing attribute 'pitch_mm'"),
    "missing root attribute": (lambda f: f.attrs.__delitem__("created_utc"), "/", None,
                               "missing root attribute 'created_utc'"),
    "not our format": (lambda f: f.attrs.__setitem__("trackfit_format", "event-table"), "/", None,
                       "must be 'raw-events'"),
    "unknown version": (lambda f: f.attrs.__setitem__("format_version", 7), "/", None, "unknown format_version 7"),
    "wrong dtype": (lambda f: _replace(f, "events/signal", f["events/signal"][:].astype(np.float32)),
                    "/events/signal", None, "expected dtype int16, found float32"),
    "wrong shape": (lambda f: _replace(f, "events/roi", f["events/roi"][:, :3]), "/events/roi", None,
                    "expected shape (N, 4)"),
    "start decreasing": (lambda f: f["events/start"].__setitem__(41, f["events/start"][40] - 1), "/events/start", 40,
                         "start is decreasing"),
    "start[-1] != len(signal)": (lambda f: _replace(f, "events/signal", f["events/signal"][:-3]),
                                 "/events/start", 499, "differs from the length of /events/signal"),
    "ROI area != pixel count": (lambda f: f["events/roi"].__setitem__((77, 2), f["events/roi"][77, 2] + 1),
                                "/events/roi", 77, "ROI area"),
    "ROI outside chip": (lambda f: f["events/roi"].__setitem__((300, 0), 1000), "/events/roi", 300,
                         "ROI outside the chip"),
    "time_s too short": (lambda f: _replace(f, "events/time_s", f["events/time_s"][:-2]), "/events/time_s", 498,
                         "expected 500 entries"),
    "trigger_id too long": (lambda f: _replace(f, "events/trigger_id", np.zeros(503, np.int64)),
                            "/events/trigger_id", 500, "expected 500 entries"),
}


def _streamed_error(path):
    with open_raw(path) as reader:
        for _ in reader.iter_batches(64):
            pass


@pytest.mark.parametrize("case", CASES)
def test_malformed_files_raise_a_named_error(small_raw_file, case):
    path, _ = small_raw_file
    action, dataset, event, text = CASES[case]
    _corrupt(path, action)
    with pytest.raises(RawFormatError) as err:
        _streamed_error(path)
    message = str(err.value)
    assert isinstance(err.value, ValueError)
    assert str(path) in message and text in message, message
    assert err.value.dataset == dataset and f"dataset '{dataset}'" in message
    assert err.value.event == event
    if event is not None:
        assert f"event {event}" in message


def test_wrong_file_kinds(tmp_path):
    text = tmp_path / "notes.h5"
    text.write_text("not hdf5")
    with pytest.raises(RawFormatError, match="not a readable HDF5 file"):
        open_raw(text)
    with pytest.raises(FileNotFoundError, match="does not exist"):
        open_raw(tmp_path / "nothing.h5")


@pytest.mark.parametrize("case", ["start decreasing", "ROI area != pixel count", "ROI outside chip",
                                  "time_s too short", "start[-1] != len(signal)"])
def test_lenient_mode_recovers_every_good_event(small_raw_file, case):
    path, batch = small_raw_file
    action, dataset, event, text = CASES[case]
    _corrupt(path, action)
    with open_raw(path, strict=False) as reader:
        got = EventBatch.concatenate(list(reader.iter_batches(64)))
        bad = reader.bad_events
    assert len(got) == len(batch)  # one entry per input event, bad ones as flagged placeholders
    bad_index = [i for i, _ in bad]
    assert bad_index[0] == event
    assert np.array_equal(np.flatnonzero(got.bad), bad_index)
    good = ~got.bad
    assert good.sum() >= len(batch) - 2
    assert_same_events(got.select(good), batch.select(good))
    assert np.all(got.n_pixels[got.bad] == 0)


def test_validate_lists_every_bad_event(small_raw_file):
    path, _ = small_raw_file
    _corrupt(path, lambda f: f["events/roi"].__setitem__((slice(10, 13), 0), -1))
    with open_raw(path) as reader:
        problems = reader.validate(batch_size=4)
        assert [i for i, _ in problems] == [10, 11, 12]
        assert all("ROI outside the chip" in why for _, why in problems)
        with pytest.raises(RawFormatError, match="event 10"):
            reader[10]


def test_streaming_memory_does_not_grow_with_file_size(tmp_path, make_batch):
    """Peak numpy memory while streaming a file 10x larger stays the same (bounded by the batch size)."""
    peaks = []
    for n in (20_000, 200_000):
        path = tmp_path / f"{n}.h5"
        with RawEventWriter(path, HexGrid(n_columns=64, n_rows=48)) as writer:
            for k in range(n // 20_000):
                writer.append(make_batch(20_000, k, max_side=6, first_index=k * 20_000))
        with open_raw(path) as reader:
            tracemalloc.start()
            total = 0
            for batch in reader.iter_batches(2048):
                total += int(batch.signal.sum(dtype=np.int64))
            peaks.append(tracemalloc.get_traced_memory()[1])
            tracemalloc.stop()
    assert peaks[1] < 1.3 * peaks[0], peaks
