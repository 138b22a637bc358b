"""The committed sample files are what ``sample_data/make_sample_data.py`` makes (same configs, seeds, counts)."""

import importlib.util
from pathlib import Path

import h5py
import numpy as np
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


def _contents(path) -> dict:
    """Every attribute and dataset of an HDF5 file, by name (the file's bytes also depend on how HDF5 laid it out)."""
    out = {}

    def visit(name, obj):
        out.update({f"{name}@{k}": np.asarray(v) for k, v in obj.attrs.items()})
        if isinstance(obj, h5py.Dataset):
            out[name] = obj[()]

    with h5py.File(path, "r") as f:
        out.update({f"@{k}": np.asarray(v) for k, v in f.attrs.items()})
        f.visititems(visit)
    return out


@pytest.mark.slow
def test_regenerated_files_hold_the_committed_data_and_reruns_are_bit_identical(tmp_path):
    script = _script()
    script.main(["--out", str(tmp_path / "a")])
    script.main(["--out", str(tmp_path / "b")])
    for name in script.RUNS:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
        made, committed = _contents(tmp_path / "a" / name), _contents(SAMPLE / name)
        assert made.keys() == committed.keys(), name
        for key, value in made.items():
            assert value.dtype == committed[key].dtype and value.shape == committed[key].shape, (name, key)
            assert np.array_equal(value, committed[key], equal_nan=value.dtype.kind == "f"), (name, key)
