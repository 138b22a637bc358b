"""One file as event ranges: parts joined into the single-process table, a killed worker, reruns that redo only the
missing parts, fingerprints combined from ranges."""

import os
import signal
import subprocess
import sys
import time
import zlib

import h5py
import numpy as np
import pytest

from trackfit import EventBatch, RawEventWriter, read_table, reconstruct_file
from trackfit.io._partial import partial_files
from trackfit.io.fingerprint import RawFingerprint, crc32_combine
from trackfit.recon import ReconConfig, content_fingerprint
from trackfit.recon._synthetic import toy_tracks
from trackfit.recon.parts import join_parts, parts_folder, plan_file, run_jobs_here, run_task

CONFIG = ReconConfig(threshold_adc=20.0)


@pytest.fixture
def raw_file(tmp_path):
    """2 400 toy events with truth columns and two malformed events (read with strict=False)."""
    batch = toy_tracks(2400, 23, roi_shape=(16, 16))
    batch = EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, time_s=np.arange(2400) * 1e-3,
                       trigger_id=np.arange(2400) * 3 + 1, grid=batch.grid, truth=batch.truth)
    path = tmp_path / "run.h5"
    with RawEventWriter(path, batch.grid, run_info={"nominal_counts_per_kev": 2500.0}) as writer:
        writer.append(batch)
    with h5py.File(path, "r+") as f:
        f["events/roi"][100, 2] += 1  # area no longer matches the pixel count
        f["events/roi"][1900, 0] = 10_000  # off the chip
    return path


def assert_same_table(a, b):
    assert a.columns == b.columns
    for column in a.columns:
        assert np.array_equal(a[column], b[column], equal_nan=a[column].dtype.kind == "f"), column
    pa, pb = a.provenance, b.provenance
    for key in ("input_fingerprint", "settings_hash", "config_toml", "energy_scale_counts_per_kev",
                "energy_scale_source", "input_n_events", "input_size_bytes", "input_path", "n_malformed_events",
                "trackfit_version"):  # not batch_size: the results do not depend on it
        assert pa[key] == pb[key], key


def test_crc32_of_pieces_combines_like_zlib():
    # zlib.crc32 of the concatenation is the outside reference
    rng = np.random.default_rng(3)
    data = rng.integers(0, 256, 100_000, dtype=np.uint8).tobytes()
    for cut in (0, 1, 7, 4096, 99_999, 100_000):
        a, b = data[:cut], data[cut:]
        assert crc32_combine(zlib.crc32(a), zlib.crc32(b), len(b)) == zlib.crc32(data)
    with pytest.raises(ValueError, match="n_bytes_second"):
        crc32_combine(1, 2, -1)


def test_range_fingerprints_combine_into_the_file_fingerprint(raw_file):
    from trackfit import open_raw

    pieces = []
    with open_raw(raw_file, strict=False) as reader:
        for a, b in ((0, 1), (1, 1000), (1000, 1000), (1000, 2400)):
            fingerprint = RawFingerprint()
            fingerprint.update(reader.read_batch(a, b, with_truth=False))
            pieces.append(RawFingerprint.from_hexdigest(fingerprint.hexdigest(), fingerprint.n_bytes))
    total = pieces[0]
    for piece in pieces[1:]:
        total = total.combine(piece)
    assert total.hexdigest() == content_fingerprint(raw_file)
    with pytest.raises(ValueError, match="not a fingerprint"):
        RawFingerprint.from_hexdigest("crc32:roi=1", [1])


@pytest.mark.parametrize("compression", ["none", "lzf"])
def test_parts_join_into_the_single_process_table(raw_file, tmp_path, compression):
    single = reconstruct_file(raw_file, tmp_path / "single.h5", CONFIG, progress=False, compression=compression)
    out = tmp_path / "joined.h5"
    job = plan_file(raw_file, out, CONFIG, part_events=700, batch_size=128, compression=compression)
    assert job.split and [(t.start, t.stop) for t in job.tasks] == [(0, 600), (600, 1200), (1200, 1800),
                                                                    (1800, 2400)]
    (result,) = run_jobs_here([job])
    assert not result.error and result.n_parts == 4 and result.n_rows == 2400
    joined, expected = read_table(out), read_table(single)
    assert_same_table(joined, expected)
    assert joined.provenance["n_parts"] == 4 and joined.provenance["n_malformed_events"] == 2
    assert "truth_angle_rad" in joined.columns
    assert not parts_folder(out).exists() and not list(tmp_path.glob("*.partial"))
    with h5py.File(out) as f:
        assert (f["events/status"].compression == "lzf") == (compression == "lzf")


_KILLED_PART = """
import sys, time
from pathlib import Path
from trackfit.recon.parts import RangeTask, run_task

task = RangeTask(*sys.argv[1:3], int(sys.argv[3]), int(sys.argv[4]), False, Path(sys.argv[5]).read_text(),
                 {{"batch_size": 64, "threads": 1}})

def stall(n):  # after the first batch: say so and hang until killed
    Path(sys.argv[6]).touch()
    time.sleep(600)

run_task(task, stall)
"""


def test_a_killed_worker_leaves_no_table_and_a_rerun_redoes_only_its_part(raw_file, tmp_path):
    out = tmp_path / "joined.h5"
    job = plan_file(raw_file, out, CONFIG, part_events=800, batch_size=64)
    first, second, third = job.tasks
    run_task(first)
    run_task(third)
    # the worker of the second part is killed (SIGKILL: no clean-up at all) in the middle of its range
    config_file = tmp_path / "config.toml"
    config_file.write_text(second.config_toml)
    flag = tmp_path / "started"
    worker = subprocess.Popen([sys.executable, "-c", _KILLED_PART.format(), second.raw_path, second.out_path,
                               str(second.start), str(second.stop), str(config_file), str(flag)],
                              env={**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)})
    try:
        deadline = time.monotonic() + 120
        while not flag.exists():
            assert worker.poll() is None, "the worker ended before its first batch"
            assert time.monotonic() < deadline
            time.sleep(0.05)
    finally:
        os.kill(worker.pid, signal.SIGKILL)
        worker.wait()
    part = second.out_path
    assert partial_files(part) and not os.path.exists(part)  # the killed worker's partial file, nothing else
    assert not out.exists()  # nothing that looks like a complete table
    with pytest.raises(RuntimeError, match="1 of 3 parts are missing"):
        join_parts(job)
    # a rerun plans only the missing part and reuses the two complete ones
    rerun = plan_file(raw_file, out, CONFIG, part_events=800, batch_size=64)
    assert [(t.start, t.stop) for t in rerun.tasks] == [(second.start, second.stop)] and rerun.n_reused == 2
    (result,) = run_jobs_here([rerun])
    assert result.n_parts == 3 and result.n_parts_reused == 2
    assert_same_table(read_table(out), read_table(reconstruct_file(raw_file, tmp_path / "single.h5", CONFIG,
                                                                   progress=False)))


def test_parts_of_other_settings_or_input_are_not_reused(raw_file, tmp_path):
    out = tmp_path / "joined.h5"
    job = plan_file(raw_file, out, CONFIG, part_events=1200)
    run_task(job.tasks[0])
    assert plan_file(raw_file, out, CONFIG, part_events=1200).n_reused == 1
    # a rerun with another part size keeps the ranges of the plan on disk (ranges.json) ...
    assert plan_file(raw_file, out, CONFIG, part_events=500).n_reused == 1
    # ... or, without it, of parts that cover the file (with the .partial file of an interrupted part)
    (parts_folder(out) / "ranges.json").unlink()
    assert plan_file(raw_file, out, CONFIG, part_events=500).n_reused == 0  # replans, writes a new ranges.json
    (parts_folder(out) / "ranges.json").unlink()
    (parts_folder(out) / "events_000000001200-000000002400.h5.partial").write_bytes(b"")
    assert plan_file(raw_file, out, CONFIG, part_events=500).n_reused == 1
    assert plan_file(raw_file, out, ReconConfig(threshold_adc=25.0), part_events=1200).n_reused == 0
    assert plan_file(raw_file, out, CONFIG, part_events=1200, with_truth=False).n_reused == 0
    os.utime(raw_file, ns=(0, 0))  # the input's modification time changed: its identity is not the same
    assert plan_file(raw_file, out, CONFIG, part_events=1200).n_reused == 0


def test_command_line_splits_one_file_over_a_process_pool(raw_file, tmp_path, capsys):
    from trackfit.cli import main

    out = tmp_path / "pool.h5"
    config = CONFIG.write_toml(tmp_path / "recon.toml")
    assert main(["reconstruct", str(raw_file), "-o", str(out), "--config", str(config), "--workers", "2",
                 "--part-events", "1000", "--no-progress"]) == 0
    assert "joined from 3 parts" in capsys.readouterr().out
    assert_same_table(read_table(out), read_table(reconstruct_file(raw_file, tmp_path / "single.h5", CONFIG,
                                                                   progress=False)))
    assert main(["reconstruct", str(raw_file), "-o", str(tmp_path / "x.h5"), "--part-events", "0"]) == 2
    assert "--part-events must be >= 1" in capsys.readouterr().err
