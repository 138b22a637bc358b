"""Transverse diffusion from the drift field, temperature and gas (docs/simulator.md, Transport)."""

import dataclasses

import pytest
from scipy import constants

from trackfit.simulate import ConfigError, DriftConfig, GasConfig, SimConfig, list_presets, load_preset, run
from trackfit.simulate.transport import (
    MIXTURE_TRANSPORT,
    mixture_transport,
    reduced_field_td,
    thermal_diffusion_um_per_sqrt_cm,
    transverse_diffusion,
)


def test_thermal_limit_check_value():
    # docs/methods.md §9 [derived]: sqrt(2kTz/(eE)) = 50.3 µm for 1 cm at 2 kV/cm, 293.15 K (±0.5 µm);
    # recomputed here with scipy's CODATA constants
    assert thermal_diffusion_um_per_sqrt_cm(2000.0, 293.15) == pytest.approx(50.3, abs=0.5)
    expected_cm = (2 * constants.k * 293.15 / constants.e * 1.0 / 2000.0) ** 0.5
    assert thermal_diffusion_um_per_sqrt_cm(2000.0, 293.15) == pytest.approx(expected_cm * 1e4, rel=1e-6)


def test_reduced_field_of_an_ideal_gas():
    # E/N with N = p/(kT) (scipy constants); 1 Td = 1e-17 V cm²
    n_cm3 = constants.atm / (constants.k * 293.15) * 1e-6
    assert reduced_field_td(2000.0, 1.0, 293.15) == pytest.approx(2000.0 / n_cm3 / 1e-17, rel=1e-9)
    assert reduced_field_td(2000.0, 2.0, 293.15) == pytest.approx(reduced_field_td(1000.0, 1.0, 293.15))


@pytest.mark.parametrize("name", ["hedme-1atm-1cm", "dme-0.8atm-1cm", "ardme-3atm-3cm"])
def test_presets_diffuse_at_or_above_the_thermal_limit_with_their_mixture_value(name):
    config = load_preset(name)
    d = transverse_diffusion(config.gas, config.drift)
    entry = mixture_transport(config.gas.molecules, config.gas.fractions)
    assert d.origin == entry.name and not d.extrapolated
    assert d.low_um_per_sqrt_cm <= d.um_per_sqrt_cm <= d.high_um_per_sqrt_cm
    assert d.low_um_per_sqrt_cm >= d.thermal_um_per_sqrt_cm
    # D_T = sqrt(2 ε_k / (e E)) with ε_k = ratio·kT (Einstein relation)
    assert d.um_per_sqrt_cm == pytest.approx(d.thermal_um_per_sqrt_cm * entry.ratio ** 0.5, rel=1e-12)


def test_every_family_has_a_range_around_its_value_and_a_source():
    for entry in MIXTURE_TRANSPORT:
        assert 1.0 <= entry.ratio_low <= entry.ratio <= entry.ratio_high
        assert entry.source


def test_diffusion_scales_as_one_over_sqrt_field():
    gas = GasConfig()
    low = transverse_diffusion(gas, DriftConfig(field_v_per_cm=1000.0)).um_per_sqrt_cm
    high = transverse_diffusion(gas, DriftConfig(field_v_per_cm=4000.0)).um_per_sqrt_cm
    assert low / high == pytest.approx(2.0, rel=1e-12)


def test_explicit_values_and_the_floor():
    gas = GasConfig()
    fixed = transverse_diffusion(gas, DriftConfig(diffusion_um_per_sqrt_cm=90.0))
    assert fixed.um_per_sqrt_cm == 90.0 and fixed.origin == "fixed"
    ratio = transverse_diffusion(gas, DriftConfig(characteristic_energy_ratio=4.0))
    assert ratio.um_per_sqrt_cm == pytest.approx(2 * ratio.thermal_um_per_sqrt_cm)
    with pytest.raises(ConfigError, match="characteristic_energy_ratio.*thermal limit is 1"):
        DriftConfig(characteristic_energy_ratio=0.5)


def test_unknown_mixture_names_the_keys_to_set():
    gas = GasConfig(molecules=("Ne", "CO2"), fractions=(0.9, 0.1))
    with pytest.raises(ValueError, match="drift.characteristic_energy_ratio or drift.diffusion_um_per_sqrt_cm"):
        transverse_diffusion(gas, DriftConfig())
    # a hand value makes the mixture usable
    assert transverse_diffusion(gas, DriftConfig(characteristic_energy_ratio=3.0)).origin == "ratio"


def test_run_uses_and_records_the_diffusion(tmp_path):
    config = load_preset("hedme-1atm-1cm").with_monochromatic(energy_kev=4.0)
    result = run(config, 5, rng=1)
    expected = transverse_diffusion(config.gas, config.drift).um_per_sqrt_cm
    assert result.diffusion_um_per_sqrt_cm == expected
    assert result.run_info()["diffusion_um_per_sqrt_cm"] == expected
    slower = dataclasses.replace(config, drift=dataclasses.replace(config.drift, field_v_per_cm=500.0))
    assert run(slower, 1, rng=1).diffusion_um_per_sqrt_cm == pytest.approx(2 * expected)


def test_all_presets_load_and_default_config_has_transport_data():
    assert transverse_diffusion(SimConfig().gas, SimConfig().drift).origin == "He/DME"
    assert len(list_presets()) >= 3


def test_command_line_names_the_missing_transport_keys(tmp_path, capsys):
    from trackfit.cli import main

    config = tmp_path / "neon.toml"
    config.write_text('[gas]\nmolecules = ["Ne", "CO2"]\nfractions = [0.9, 0.1]\n')
    assert main(["simulate", str(config), "-n", "5", "-o", str(tmp_path / "x.h5"), "--no-progress"]) != 0
    assert "drift.characteristic_energy_ratio" in capsys.readouterr().err
