"""reconstruct / reconstruct_file: one row per input event in order, provenance that reproduces the run,
streaming with threads, nothing half-written on failure."""

import h5py
import numpy as np
import pytest
from recon_helpers import assert_nan_explained

from trackfit import EventBatch, RawEventWriter, ReconConfig, read_table, reconstruct, reconstruct_file
from trackfit.recon import TABLE_COLUMNS, content_fingerprint
from trackfit.recon._synthetic import toy_tracks
from trackfit.recon.estimators import columns_of
from trackfit.recon.status import Status

DOCUMENTED_COLUMNS = ["trigger_id", "time_s", "status", "n_pixels", "n_clusters", "pulse_height", "energy_kev",
                      "centroid_x_mm", "centroid_y_mm", "conv_x_mm", "conv_y_mm", "axis_rad", "emission_rad",
                      "m2_major_mm2", "m2_minor_mm2", "m3_major_mm3", "peak_adc"]
DOCUMENTED_DTYPES = {"trigger_id": "int64", "time_s": "float64", "status": "uint16", "n_pixels": "int32",
                     "n_clusters": "int32", "peak_adc": "int16"}


@pytest.fixture
def raw_file(tmp_path):
    batch = toy_tracks(3000, 17, roi_shape=(20, 20))
    batch = EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, time_s=np.arange(3000) * 0.01,
                       trigger_id=np.arange(3000) * 7 + 3, grid=batch.grid, truth=batch.truth)
    path = tmp_path / "run.h5"
    with RawEventWriter(path, batch.grid) as writer:
        writer.append(batch.select(np.arange(1000)))
        writer.append(batch.select(np.arange(1000, 3000)))
    return path, batch


def test_columns_and_dtypes_of_the_table_format():
    table = reconstruct(toy_tracks(50, 1))
    for name in DOCUMENTED_COLUMNS:
        assert name in table
        assert table[name].dtype == np.dtype(DOCUMENTED_DTYPES.get(name, "float32")), name
    assert list(table)[:len(TABLE_COLUMNS)] == list(TABLE_COLUMNS)
    # then the columns of the default emission estimate (docs/table-format.md), then the toy generator's truth,
    # prefixed
    added = list(columns_of(ReconConfig().emission_estimator))
    assert list(table)[len(TABLE_COLUMNS):] == added + ["truth_" + k for k in sorted(toy_tracks(1, 1).truth)]
    assert "config_toml" in table.provenance and "trackfit_version" in table.provenance


def test_reconstruct_keeps_order_and_copies_raw_columns(make_batch):
    batch = make_batch(300, 4)
    table = reconstruct(batch)
    assert len(table) == len(batch)
    assert np.array_equal(table["trigger_id"], batch.trigger_id) and np.array_equal(table["time_s"], batch.time_s)
    assert np.array_equal(table["event_index"], batch.index)
    # a batch whose start[0] != 0 (a slice of a larger signal array) gives the same rows
    shifted = EventBatch(roi=batch.roi[5:], start=batch.start[5:], signal=batch.signal, grid=batch.grid,
                         trigger_id=batch.trigger_id[5:], time_s=batch.time_s[5:], validate=False)
    part = reconstruct(shifted)
    for name in ("status", "emission_rad", "pulse_height"):
        assert np.array_equal(part[name], table[name][5:], equal_nan=True)
    threaded = reconstruct(batch, threads=2)
    for name in table:
        assert np.array_equal(threaded[name], table[name], equal_nan=True)
    assert len(reconstruct(EventBatch.empty())) == 0
    with pytest.raises(TypeError, match="must be an EventBatch"):
        reconstruct({"signal": []})


@pytest.mark.parametrize("batch_size, threads", [(64, 1), (1000, 2), (100_000, 2)])
def test_file_gives_the_same_rows_as_memory(raw_file, tmp_path, batch_size, threads):
    path, batch = raw_file
    out = reconstruct_file(path, tmp_path / "out.h5", batch_size=batch_size, progress=False, threads=threads)
    table = read_table(out)
    expected = reconstruct(batch)
    assert len(table) == len(batch) == 3000
    for name in expected:
        assert np.array_equal(table[name], expected[name], equal_nan=True), name
    assert np.array_equal(table["truth_angle_rad"], batch.truth["angle_rad"])  # simulated truth rides along
    prov = table.provenance
    assert prov["input_name"] == "run.h5" and prov["input_size_bytes"] == path.stat().st_size
    assert prov["input_n_events"] == 3000 and prov["n_malformed_events"] == 0
    # the fingerprint does not depend on the batch size used while streaming
    assert prov["input_fingerprint"] == content_fingerprint(path, batch_size=333)
    assert prov["input_fingerprint"].startswith("crc32:roi=")
    assert not list(tmp_path.glob("*.partial"))


def test_provenance_reproduces_the_run(raw_file, tmp_path):
    path, _ = raw_file
    config = ReconConfig(threshold_adc=25, start_search_inner_rms=1.2, second_pass_length_mm=0.04,
                         second_pass_centre="weighted_centroid",
                         bad_pixels=[(150, 176)])
    first = read_table(reconstruct_file(path, tmp_path / "a.h5", config, progress=False))
    stored = ReconConfig.from_toml(first.provenance["config_toml"])
    assert stored == config
    second = read_table(reconstruct_file(path, tmp_path / "b.h5", stored, batch_size=500, progress=False))
    for name in first:
        assert np.array_equal(first[name], second[name], equal_nan=True), name
    assert first.provenance["input_fingerprint"] == second.provenance["input_fingerprint"]
    default = read_table(reconstruct_file(path, tmp_path / "c.h5", progress=False))
    assert not np.array_equal(default["n_pixels"], first["n_pixels"])  # the config did matter


def test_malformed_events_keep_their_rows(raw_file, tmp_path):
    path, batch = raw_file
    with h5py.File(path, "r+") as f:
        f["events/roi"][77, 2] += 1  # ROI area no longer matches the pixel count
        f["events/roi"][2500, 0] = 10_000  # outside the chip
    out = reconstruct_file(path, tmp_path / "out.h5", batch_size=256, progress=False)
    table = read_table(out)
    assert len(table) == 3000
    bad = np.flatnonzero(table["status"] & Status.MALFORMED_INPUT)
    assert list(bad) == [77, 2500]
    assert table.provenance["n_malformed_events"] == 2
    assert np.array_equal(table["trigger_id"], batch.trigger_id)
    assert_nan_explained(table)
    from trackfit import RawFormatError

    with pytest.raises(RawFormatError, match="event 77"):
        reconstruct_file(path, tmp_path / "strict.h5", strict=True, progress=False)
    assert not (tmp_path / "strict.h5").exists() and not list(tmp_path.glob("strict.h5*.partial"))


def test_a_failure_leaves_no_file(raw_file, tmp_path):
    path, _ = raw_file
    seen = []

    def progress(n):
        seen.append(n)
        if len(seen) == 3:
            raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        reconstruct_file(path, tmp_path / "out.h5", batch_size=100, progress=progress)
    assert not list(tmp_path.glob("out.h5*"))


def test_refuses_to_overwrite_and_checks_arguments(raw_file, tmp_path):
    path, _ = raw_file
    out = reconstruct_file(path, tmp_path / "out.h5", progress=False)
    with pytest.raises(FileExistsError, match="overwrite"):
        reconstruct_file(path, out, progress=False)
    reconstruct_file(path, out, progress=False, overwrite=True, config={"threshold_adc": 30})
    assert ReconConfig.from_toml(read_table(out).provenance["config_toml"]).threshold_adc == 30
    with pytest.raises(ValueError, match="batch_size"):
        reconstruct_file(path, tmp_path / "x.h5", batch_size=0)
    with pytest.raises(FileNotFoundError):
        reconstruct_file(tmp_path / "missing.h5", tmp_path / "y.h5")
    with pytest.raises(ValueError, match="overwrite the input"):
        reconstruct_file(path, path, overwrite=True)
    with pytest.raises(TypeError, match="'config' must be"):
        reconstruct_file(path, tmp_path / "z.h5", config=3)


def test_progress_bar_counts_every_event(raw_file, tmp_path, capsys):
    path, _ = raw_file
    reconstruct_file(path, tmp_path / "out.h5", batch_size=700, progress=True)
    err = capsys.readouterr().err
    assert "3.00k/3.00k" in err or "3000/3000" in err


def test_energy_scale_comes_from_settings_raw_file_or_nowhere(tmp_path):
    batch = toy_tracks(200, 3, roi_shape=(20, 20))
    plain = reconstruct(batch)
    assert plain.provenance["energy_scale_source"] == "none"
    assert plain.provenance["energy_scale_counts_per_kev"] == 3333.3
    from_run = reconstruct(batch, run_info={"nominal_counts_per_kev": 1000.0})
    assert from_run.provenance["energy_scale_source"] == "raw file"
    ok = np.isfinite(from_run["energy_kev"]) & (plain["pulse_height"] > 0)
    # energy = pulse height / scale, the definition in docs/table-format.md
    assert np.allclose(from_run["energy_kev"][ok], plain["pulse_height"][ok] / 1000.0, rtol=1e-6)
    settings = reconstruct(batch, ReconConfig(counts_per_kev=500.0), run_info={"nominal_counts_per_kev": 1000.0})
    assert settings.provenance["energy_scale_source"] == "settings"
    assert np.allclose(settings["energy_kev"][ok], 2 * from_run["energy_kev"][ok], rtol=1e-6)
    # the file's attribute reaches reconstruct_file; a bad one is an error naming the file and the attribute
    path = tmp_path / "run.h5"
    with RawEventWriter(path, batch.grid, run_info={"nominal_counts_per_kev": 1000.0}) as writer:
        writer.append(batch)
    table = read_table(reconstruct_file(path, tmp_path / "t.h5", progress=False))
    assert table.provenance["energy_scale_source"] == "raw file"
    assert np.array_equal(table["energy_kev"], from_run["energy_kev"], equal_nan=True)
    # 200 rows in chunks of 200 rows: the values (numpy's count) plus about 4 kB of HDF5 header and attributes per
    # column, far below one 65 536-row chunk per column
    n_columns = len(table.columns)
    assert (tmp_path / "t.h5").stat().st_size < sum(table[c].nbytes for c in table) + 5_000 * n_columns
    bad = tmp_path / "bad.h5"
    with RawEventWriter(bad, batch.grid, run_info={"nominal_counts_per_kev": -1.0}) as writer:
        writer.append(batch)
    with pytest.raises(ValueError, match="bad.h5', dataset '/run': attribute 'nominal_counts_per_kev'"):
        reconstruct_file(bad, tmp_path / "u.h5", progress=False)
    assert not (tmp_path / "u.h5").exists()
