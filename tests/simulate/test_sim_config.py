"""Simulation configs: TOML round trips, unknown-key rejection with the valid list, validation messages, presets."""

import dataclasses
import tomllib

import pytest

from trackfit.simulate import ConfigError, GasConfig, SimConfig, list_presets, load_preset


def test_the_three_shipped_presets_are_listed():
    assert {"hedme-1atm-1cm", "dme-0.8atm-1cm", "ardme-3atm-3cm"} <= set(list_presets())


@pytest.mark.parametrize("name", ["hedme-1atm-1cm", "dme-0.8atm-1cm", "ardme-3atm-3cm"])
def test_toml_round_trip_of_presets(name):
    config = load_preset(name)
    text = config.to_toml()
    assert SimConfig.from_toml(text) == config
    assert tomllib.loads(text) == config.to_dict()        # the writer's output is standard TOML (tomllib)


def test_preset_designs():
    hedme = load_preset("hedme-1atm-1cm").gas
    assert (hedme.molecules, hedme.fractions, hedme.pressure_atm, hedme.gap_cm) == (("He", "C2H6O"), (0.2, 0.8),
                                                                                    1.0, 1.0)
    dme = load_preset("dme-0.8atm-1cm").gas
    assert (dme.molecules, dme.pressure_atm, dme.gap_cm) == (("C2H6O",), 0.8, 1.0)
    high = load_preset("ardme-3atm-3cm")
    assert "Ar" in high.gas.molecules and 2 <= high.gas.pressure_atm <= 3 and 2 <= high.gas.gap_cm <= 3
    assert high.source.energy_range_kev == (15.0, 35.0)


def test_round_trip_after_replace_and_file(tmp_path):
    config = load_preset("hedme-1atm-1cm").with_monochromatic(energy_kev=3.7, polarization_degree=1.0,
                                                              polarization_angle_deg=30.0)
    config = dataclasses.replace(config, gas=dataclasses.replace(config.gas, pressure_atm=1.25))
    path = config.save(tmp_path / "run.toml")
    again = SimConfig.load(path)
    assert again == config
    assert again.source.line_energies_kev == (3.7,) and again.source.polarization_angle_deg == 30.0


def test_missing_keys_take_defaults():
    config = SimConfig.from_toml('[gas]\npressure_atm = 2.0\n')
    assert config.gas.pressure_atm == 2.0 and config.gas.molecules == GasConfig().molecules


def test_unknown_key_in_table_is_rejected_with_valid_list():
    with pytest.raises(ConfigError) as err:
        SimConfig.from_toml('[gas]\npresure_atm = 2.0\n')
    message = str(err.value)
    assert "gas.presure_atm" in message and "pressure_atm" in message and "fano_factor" in message


def test_unknown_table_is_rejected_with_valid_list():
    with pytest.raises(ConfigError, match="detector.*valid top-level keys and tables: description, source"):
        SimConfig.from_toml('[detector]\nx = 1\n')


@pytest.mark.parametrize("text, fragment", [
    ('[gas]\nfractions = [0.5, 0.4]\nmolecules = ["He", "C2H6O"]\n', "'gas.fractions' must be fractions adding up"),
    ('[gas]\npressure_atm = -1.0\n', "'gas.pressure_atm' must be > 0 (got -1.0)"),
    ('[source]\npolarization_degree = 1.5\n', "'source.polarization_degree' must be between 0 and 1"),
    ('[source]\nbeam = "cone"\n', "'source.beam' must be one of"),
    ('[readout]\npitch_mm = -0.05\n', "'pitch_mm' must be a finite number of mm between 0.0001 and 10 (got -0.05)"),
    ('[readout]\ntrigger_min_pixels = 0\n', "'readout.trigger_min_pixels' must be an integer >= 1"),
    ('[gas]\ngap_cm = "one"\n', "'gas.gap_cm' must be a number (got 'one')"),
    ('[source]\nline_energies_kev = [5.9, 6.5]\n', "'source.line_weights' must be a list of 2 weights"),
])
def test_validation_messages_name_key_and_value(text, fragment):
    with pytest.raises(ConfigError) as err:
        SimConfig.from_toml(text)
    assert fragment in str(err.value)


def test_unknown_preset_lists_known_ones():
    with pytest.raises(KeyError, match="hedme-1atm-1cm"):
        load_preset("no-such-cell")


def test_with_monochromatic_replaces_the_spectrum():
    config = load_preset("ardme-3atm-3cm").with_monochromatic(energy_kev=22.0)
    assert config.source.spectrum == "lines" and config.source.line_energies_kev == (22.0,)
    assert config.source.polarization_degree == 0.0            # untouched
