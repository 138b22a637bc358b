"""Reconstruction of several files as tasks of a Dask distributed cluster (in-process cluster for the test)."""

import numpy as np
import pytest

import trackfit
from trackfit.recon import ReconConfig
from trackfit.recon.distributed import reconstruct_on_cluster

distributed = pytest.importorskip("dask.distributed", reason="needs the optional extra trackfit[dask]")


@pytest.fixture
def raw_files(tmp_path, make_batch):
    paths = []
    for k in range(3):
        path = tmp_path / f"run{k}.h5"
        trackfit.write_raw(path, make_batch(200 + 50 * k, k))
        paths.append(path)
    return paths


def test_cluster_gives_the_same_tables_as_one_process(raw_files, tmp_path):
    config = ReconConfig(threshold_adc=50.0)
    jobs = [(raw, tmp_path / f"{raw.stem}_cluster.h5") for raw in raw_files]
    seen = []
    with distributed.Client(processes=False, n_workers=2, threads_per_worker=1, dashboard_address=None) as client:
        results = reconstruct_on_cluster(jobs, config, client=client, on_result=seen.append)
    assert [r.raw_path for r in results] == [str(raw) for raw in raw_files]
    assert sorted(r.raw_path for r in seen) == sorted(str(raw) for raw in raw_files)
    for (raw, out), result in zip(jobs, results, strict=True):
        assert not result.error
        local = tmp_path / f"{raw.stem}_local.h5"
        trackfit.reconstruct_file(raw, local, config, progress=False)
        a, b = trackfit.read_table(out), trackfit.read_table(local)
        assert len(a) == result.n_rows == len(trackfit.open_raw(raw))
        for column in a.columns:
            assert np.array_equal(a[column], b[column], equal_nan=a[column].dtype.kind == "f"), column


def test_a_bad_file_is_reported_and_the_others_finish(raw_files, tmp_path):
    bad = tmp_path / "broken.h5"
    bad.write_text("not an HDF5 file")
    jobs = [(raw_files[0], tmp_path / "a.h5"), (bad, tmp_path / "b.h5")]
    with distributed.Client(processes=False, n_workers=1, threads_per_worker=1, dashboard_address=None) as client:
        good, failed = reconstruct_on_cluster(jobs, client=client)
    assert not good.error and good.n_rows == 200
    assert "not a readable HDF5 file" in failed.error and str(bad) in failed.error
    assert "FAILED" in str(failed)


def test_command_line_on_a_local_cluster(raw_files, tmp_path, capsys):
    from trackfit.cli import main

    out_dir = tmp_path / "tables"
    assert main(["reconstruct", *map(str, raw_files), "--out-dir", str(out_dir), "--scheduler", "local",
                 "--no-progress"]) == 0
    text = capsys.readouterr()
    for raw in raw_files:
        table = trackfit.read_table(out_dir / f"{raw.stem}_events.h5")
        assert len(table) == len(trackfit.open_raw(raw))
        assert f"{raw.stem}_events.h5: {len(table)} events" in text.out + text.err


def _single_file(tmp_path):
    from trackfit import EventBatch, RawEventWriter
    from trackfit.recon._synthetic import toy_tracks

    batch = toy_tracks(3000, 41, roi_shape=(16, 16))
    batch = EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, time_s=np.arange(3000) * 1e-3,
                       trigger_id=np.arange(3000) * 5, grid=batch.grid, truth=batch.truth)
    path = tmp_path / "big.h5"
    with RawEventWriter(path, batch.grid) as writer:
        writer.append(batch)
    return path


def _assert_same(a, b):
    assert a.columns == b.columns
    for column in a.columns:
        assert np.array_equal(a[column], b[column], equal_nan=a[column].dtype.kind == "f"), column
    for key in ("input_fingerprint", "settings_hash", "config_toml", "n_malformed_events", "input_n_events"):
        assert a.provenance[key] == b.provenance[key], key


def test_one_file_split_over_two_workers_of_a_local_cluster(tmp_path):
    raw = _single_file(tmp_path)
    config = ReconConfig(threshold_adc=30.0)
    out = tmp_path / "split.h5"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        (result,) = reconstruct_on_cluster([(raw, out)], config, client=client, part_events=1500)
        assert not result.error and result.n_parts == 2 and result.n_rows == 3000
        assert "joined from 2 parts" in str(result)
        (result,) = reconstruct_on_cluster([(raw, tmp_path / "four.h5")], config, client=client, part_events=750)
        assert result.n_parts == 4
        # without part_events a file this small is one task (files are split only into ranges of >= 50 000 events)
        (result,) = reconstruct_on_cluster([(raw, tmp_path / "whole.h5")], config, client=client)
        assert result.n_parts == 1
    single = trackfit.reconstruct_file(raw, tmp_path / "single.h5", config, progress=False)
    for table in (out, tmp_path / "four.h5", tmp_path / "whole.h5"):
        _assert_same(trackfit.read_table(table), trackfit.read_table(single))


def test_a_rerun_after_a_lost_part_redoes_only_that_part(tmp_path):
    from trackfit.recon.parts import plan_file, run_task

    raw = _single_file(tmp_path)
    out = tmp_path / "split.h5"
    # an interrupted run: three of four parts written, the worker of the fourth lost mid-task (its .partial left)
    job = plan_file(raw, out, part_events=750)
    for task in job.tasks[:3]:
        run_task(task)
    lost = job.tasks[3].out_path
    with open(lost + ".partial", "wb") as f:
        f.write(b"half a part")
    assert not out.exists()
    with distributed.Client(processes=False, n_workers=2, threads_per_worker=1, dashboard_address=None) as client:
        (result,) = reconstruct_on_cluster([(raw, out)], client=client, part_events=750)
    assert result.n_parts == 4 and result.n_parts_reused == 3
    _assert_same(trackfit.read_table(out), trackfit.read_table(trackfit.reconstruct_file(raw, tmp_path / "s.h5",
                                                                                          progress=False)))
