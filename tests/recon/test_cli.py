"""``trackfit reconstruct``: one file, several files in a spawn process pool, config files, errors."""

import numpy as np
import pytest

from trackfit import ReconConfig, read_table, reconstruct, write_raw
from trackfit.cli import main
from trackfit.recon._synthetic import toy_tracks


@pytest.fixture
def raws(tmp_path):
    paths, batches = [], []
    for k in range(3):
        batch = toy_tracks(400 + 100 * k, 30 + k, roi_shape=(20, 20))
        paths.append(write_raw(tmp_path / f"run{k}.h5", batch))
        batches.append(batch)
    return paths, batches


def test_one_file_with_a_config(raws, tmp_path, capsys):
    paths, batches = raws
    config = ReconConfig(threshold_adc=30, second_pass_length_mm=0.03)
    config_path = config.write_toml(tmp_path / "recon.toml")
    out = tmp_path / "table.h5"
    assert main(["reconstruct", str(paths[0]), "-o", str(out), "--config", str(config_path), "--no-progress"]) == 0
    assert f"wrote {out}: 400 events" in capsys.readouterr().out
    table = read_table(out)
    expected = reconstruct(batches[0], config)
    for name in expected:
        assert np.array_equal(table[name], expected[name], equal_nan=True)
    # existing output: refused unless --overwrite
    assert main(["reconstruct", str(paths[0]), "-o", str(out), "--no-progress"]) == 2
    assert "exists; pass --overwrite" in capsys.readouterr().err
    assert main(["reconstruct", str(paths[0]), "-o", str(out), "--no-progress", "--overwrite"]) == 0


def test_several_files_in_a_process_pool(raws, tmp_path, capsys):
    paths, batches = raws
    out_dir = tmp_path / "tables"
    args = ["reconstruct", *map(str, paths), "--out-dir", str(out_dir), "--workers", "2", "--batch-size", "128"]
    assert main(args) == 0
    captured = capsys.readouterr()
    for k, batch in enumerate(batches):
        table = read_table(out_dir / f"run{k}_events.h5")
        assert len(table) == len(batch)
        assert np.array_equal(table["emission_rad"], reconstruct(batch)["emission_rad"], equal_nan=True)
        assert f"run{k}_events.h5: {len(batch)} events" in captured.out
    assert "1.50k/1.50k" in captured.err  # one progress bar over all files (400 + 500 + 600 events)


@pytest.mark.parametrize("args, text", [
    (["-o", "x.h5", "--workers", "0"], "--workers must be >= 1"),
    (["--config", "missing.toml", "-o", "x.h5"], "missing.toml' does not exist"),
    (["-o", "x.h5", "--batch-size", "0"], "--batch-size must be >= 1"),
])
def test_argument_errors(raws, tmp_path, capsys, monkeypatch, args, text):
    paths, _ = raws
    monkeypatch.chdir(tmp_path)
    assert main(["reconstruct", str(paths[0]), *args]) == 2
    assert text in capsys.readouterr().err


def test_file_errors(raws, tmp_path, capsys):
    paths, _ = raws
    assert main(["reconstruct", str(paths[0]), str(paths[1]), "-o", str(tmp_path / "x.h5")]) == 2
    assert "takes one RAW file" in capsys.readouterr().err
    assert main(["reconstruct", str(tmp_path / "nothing.h5"), "-o", str(tmp_path / "x.h5")]) == 2
    assert "does not exist" in capsys.readouterr().err
    other = tmp_path / "other"
    other.mkdir()
    write_raw(other / "run0.h5", toy_tracks(5, 1))
    assert main(["reconstruct", str(paths[0]), str(other / "run0.h5"), "--out-dir", str(tmp_path / "o")]) == 2
    assert "would both be written" in capsys.readouterr().err
    bad = tmp_path / "bad.toml"
    bad.write_text("threshold = 3\n")
    assert main(["reconstruct", str(paths[0]), "-o", str(tmp_path / "y.h5"), "--config", str(bad)]) == 2
    assert "unknown key(s) ['threshold']" in capsys.readouterr().err
