"""``trackfit simulate``: presets, config files, flags overriding the source, reproducible output, errors."""

import numpy as np

from trackfit import open_raw
from trackfit.cli import main
from trackfit.simulate import SimConfig, list_presets, load_preset


def test_list_presets(capsys):
    assert main(["simulate", "--list-presets"]) == 0
    out = capsys.readouterr().out
    for name in list_presets():
        assert name in out


def test_preset_with_flags_and_seed_is_reproducible(tmp_path, capsys):
    args = ["simulate", "--preset", "hedme-1atm-1cm", "-n", "150", "--seed", "5", "--energy-kev", "3.7",
            "--polarization-degree", "1", "--polarization-angle-deg", "45", "--no-progress"]
    assert main([*args, "-o", str(tmp_path / "a.h5")]) == 0
    assert "wrote 150 events" in capsys.readouterr().out
    assert main([*args, "-o", str(tmp_path / "b.h5")]) == 0
    assert (tmp_path / "a.h5").read_bytes() == (tmp_path / "b.h5").read_bytes()
    with open_raw(tmp_path / "a.h5") as reader:
        config = SimConfig.from_toml(reader.run_info["config_toml"])
        energies = reader.read_truth(["photon_energy_kev"])["photon_energy_kev"]
    assert config.source.line_energies_kev == (3.7,)
    assert config.source.polarization_degree == 1.0 and config.source.polarization_angle_deg == 45.0
    assert reader.run_info["design"] == "hedme-1atm-1cm"
    assert np.all(energies == np.float32(3.7))


def test_config_file(tmp_path):
    config = load_preset("dme-0.8atm-1cm").with_monochromatic(energy_kev=4.5)
    path = config.save(tmp_path / "cell.toml")
    assert main(["simulate", str(path), "-n", "40", "-o", str(tmp_path / "c.h5"), "--no-progress"]) == 0
    with open_raw(tmp_path / "c.h5") as reader:
        assert len(reader) == 40
        assert SimConfig.from_toml(reader.run_info["config_toml"]) == config
        assert reader.run_info["seed"] == -1
        assert reader.run_info["design"] == "cell.toml"
        # gain 2000 * 1000 / W 23.9 eV / 25 electrons per ADC count (the preset file's design values)
        assert reader.run_info["nominal_counts_per_kev"] == 2000 * 1000 / 23.9 / 25


def test_errors_are_one_line(tmp_path, capsys):
    out = str(tmp_path / "x.h5")
    assert main(["simulate", "-n", "5", "-o", out]) == 2
    assert "either CONFIG.toml or --preset" in capsys.readouterr().err
    assert main(["simulate", "--preset", "nope", "-n", "5", "-o", out]) == 2
    assert "known presets" in capsys.readouterr().err
    assert main(["simulate", "--preset", "hedme-1atm-1cm", "-o", out]) == 2
    assert "-n/--n-events N is required" in capsys.readouterr().err
    bad = tmp_path / "bad.toml"
    bad.write_text("[gas]\nfractionz = [1.0]\n")
    assert main(["simulate", str(bad), "-n", "5", "-o", out]) == 2
    assert "gas.fractionz" in capsys.readouterr().err
    (tmp_path / "x.h5").write_text("")
    assert main(["simulate", "--preset", "hedme-1atm-1cm", "-n", "5", "-o", out, "--no-progress"]) == 2
    assert "--overwrite" in capsys.readouterr().err
