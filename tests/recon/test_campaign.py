"""Resumable campaigns: ``trackfit reconstruct --out-dir DIR --resume`` and the campaign summary file."""

import json

import numpy as np
import pytest

from trackfit import read_table, reconstruct, write_raw
from trackfit.cli import main
from trackfit.recon import ReconConfig
from trackfit.recon._synthetic import toy_tracks
from trackfit.recon.campaign import SUMMARY_NAME
from trackfit.recon.identity import compatible_version
from trackfit.recon.parts import parts_folder, plan_file, run_task


@pytest.fixture
def campaign(tmp_path):
    raws = [write_raw(tmp_path / f"run{k}.h5", toy_tracks(300 + 100 * k, 50 + k, roi_shape=(16, 16)))
            for k in range(3)]
    return raws, tmp_path / "tables"


def _entries(out_dir):
    summary = json.loads((out_dir / SUMMARY_NAME).read_text())
    return summary, {entry["input"].rsplit("/", 1)[-1]: entry for entry in summary["files"]}


def _run(raws, out_dir, *extra):
    return main(["reconstruct", *map(str, raws), "--out-dir", str(out_dir), "--no-progress", *extra])


def test_resume_redoes_only_what_is_missing_or_stale(campaign, capsys):
    raws, out_dir = campaign
    assert _run(raws, out_dir) == 0
    summary, entries = _entries(out_dir)
    assert summary["layout"] == "trackfit-campaign 1" and len(summary["runs"]) == 1
    first = entries["run0.h5"]
    assert first["state"] == "done" and first["n_events"] == 300 and first["input_fingerprint"].startswith("crc32:")
    assert first["status_counts"]["rows"] == 300 and first["seconds"] > 0 and first["events_per_s"] > 0
    assert first["settings_hash"].startswith("sha256:")
    capsys.readouterr()
    # an interrupted campaign: run1's output never committed (a partial file left), run2's input rewritten since
    (out_dir / "run1_events.h5").rename(out_dir / "run1_events.h5.partial")
    write_raw(raws[2], toy_tracks(500, 99, roi_shape=(16, 16)), overwrite=True)  # same size, other events
    before = (out_dir / "run0_events.h5").stat().st_mtime_ns
    assert _run(raws, out_dir, "--resume") == 0
    text = capsys.readouterr().out
    assert f"skipped {raws[0]}: complete, made from the same input fingerprint" in text
    assert f"to do {raws[1]}: no output yet (an interrupted run left a partial file)" in text
    assert f"to do {raws[2]}: the input's content changed" in text or f"to do {raws[2]}: the input changed" in text
    assert "1 skipped" in text and "2 reconstructed" in text
    assert (out_dir / "run0_events.h5").stat().st_mtime_ns == before  # not touched
    summary, entries = _entries(out_dir)
    assert [entries[f"run{k}.h5"]["state"] for k in range(3)] == ["skipped", "done", "done"]
    assert "input" in entries["run2.h5"]["reason"] and len(summary["runs"]) == 2
    assert summary["runs"][-1]["n_skipped"] == 1 and summary["runs"][-1]["n_done"] == 2
    table = read_table(out_dir / "run2_events.h5")
    assert np.array_equal(table["emission_rad"], reconstruct(toy_tracks(500, 99, roi_shape=(16, 16)))["emission_rad"],
                          equal_nan=True)
    # other settings: every output is redone, and says why
    config = ReconConfig(threshold_adc=25.0).write_toml(out_dir.parent / "recon.toml")
    assert _run(raws, out_dir, "--resume", "--config", str(config)) == 0
    assert capsys.readouterr().out.count("made with other settings") == 3


def test_resume_keeps_the_complete_parts_of_an_interrupted_split_file(campaign, capsys):
    raws, out_dir = campaign
    out_dir.mkdir()
    out = out_dir / "run2_events.h5"
    job = plan_file(raws[2], out, part_events=250)  # 500 events: two parts, the first one written
    run_task(job.tasks[0])
    assert _run(raws[2:], out_dir, "--resume") == 0
    assert "joined from 2 parts, 1 reused" in capsys.readouterr().out
    _, entries = _entries(out_dir)
    assert entries["run2.h5"]["n_parts"] == 2 and entries["run2.h5"]["n_parts_reused"] == 1
    assert not parts_folder(out).exists()


def test_resume_arguments(campaign, tmp_path, capsys):
    raws, out_dir = campaign
    assert main(["reconstruct", str(raws[0]), "-o", str(tmp_path / "x.h5"), "--resume"]) == 2
    assert "--resume needs --out-dir" in capsys.readouterr().err
    assert _run(raws, out_dir, "--resume", "--overwrite") == 2
    assert "give one of the two" in capsys.readouterr().err
    assert _run(raws, out_dir) == 0
    assert _run(raws, out_dir) == 2  # without --resume existing outputs are refused, as before
    assert "or --resume to keep it" in capsys.readouterr().err


@pytest.mark.parametrize("workers", [1, 2])
def test_skip_truth_leaves_the_truth_columns_out_and_counts_as_other_settings(campaign, capsys, workers):
    raws, out_dir = campaign
    extra = ["--workers", "2", "--part-events", "200"] if workers > 1 else []  # 2: split files, joined parts
    assert _run(raws[1:], out_dir, "--skip-truth", *extra) == 0
    table = read_table(out_dir / "run2_events.h5")
    assert not [name for name in table if name.startswith("truth_")] and len(table["event_index"]) == 500
    assert table.provenance["input_n_events"] == 500
    capsys.readouterr()
    assert _run(raws[1:], out_dir, "--skip-truth", "--resume", *extra) == 0
    assert capsys.readouterr().out.count("skipped") >= 2
    assert _run(raws[1:], out_dir, "--resume", *extra) == 0  # the truth asked for now: redone
    assert capsys.readouterr().out.count("made with other settings") == 2
    table = read_table(out_dir / "run2_events.h5")
    truth = toy_tracks(500, 52, roi_shape=(16, 16)).truth
    assert sorted(name for name in table if name.startswith("truth_")) == sorted(f"truth_{k}" for k in truth)
    assert np.array_equal(table["truth_angle_rad"], truth["angle_rad"])


def test_compatible_versions():
    # the rule of identity.compatible_version: same major.minor (semantic versioning, common practice)
    assert compatible_version("1.4.2", "1.4.0") and not compatible_version("1.3.9", "1.4.0")
    assert not compatible_version("garbage", "1.4.0")
