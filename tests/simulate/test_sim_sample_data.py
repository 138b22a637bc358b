"""The committed sample files are what ``sample_data/make_sample_data.py`` makes (same configs, seeds, counts)."""

import importlib.util
from pathlib import Path

import pytest

from trackfit import open_raw
from trackfit.simulate import SimConfig

SAMPLE = Path(__file__).resolve().parents[2] / "sample_data"


def _script():
    spec = importlib.util.spec_from_file_location("make_sample_data", SAMPLE / "make_sample_data.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_committed_files_match_the_script():
    script = _script()
    for name, (n_events, seed, changes, description) in script.RUNS.items():
        with open_raw(SAMPLE / name) as reader:
            assert len(reader) == n_events
            assert reader.run_info["seed"] == seed
            assert SimConfig.from_toml(reader.run_info["config_toml"]) == script.config_for(changes, description)
    assert sum((SAMPLE / name).stat().st_size for name in script.RUNS) < 6.5e6


def test_script_runs(tmp_path, capsys):
    script = _script()
    script.main(["--out", str(tmp_path), "--scale", "0.01"])
    assert "total" in capsys.readouterr().out
    for name in script.RUNS:
        with open_raw(tmp_path / name) as reader:
            assert len(reader) >= 1 and reader.truth_names


@pytest.mark.slow
def test_regenerated_files_are_bit_identical(tmp_path):
    script = _script()
    script.main(["--out", str(tmp_path)])
    for name in script.RUNS:
        assert (tmp_path / name).read_bytes() == (SAMPLE / name).read_bytes(), name
