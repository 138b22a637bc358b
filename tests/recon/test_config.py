"""ReconConfig: validation, TOML round trips, unknown keys, bad-pixel forms; status bits and their docs."""

import dataclasses

import numpy as np
import pytest

from trackfit import HexGrid, ReconConfig
from trackfit.recon.status import STATUS_DOCS, Status, explain_status, status_counts


def test_defaults_and_toml_round_trip(tmp_path):
    config = ReconConfig()
    assert ReconConfig.from_toml(config.to_toml()) == config
    custom = ReconConfig(threshold_adc=12.5, min_pixels=3, start_search_inner_rms=1.2, start_search_outer_rms=4.0,
                         second_pass_length_mm=0.04,
                         second_pass_centre="weighted_centroid", counts_per_kev=55.0, saturation_adc=4000,
                         bad_pixels=[(3, 4), (1, 2), (3, 4)])
    path = custom.write_toml(tmp_path / "recon.toml")
    again = ReconConfig.read_toml(path)
    assert again == custom
    assert again.bad_pixels == ((1, 2), (3, 4))  # sorted by row, duplicates removed
    assert "[recon]" in path.read_text()
    # top-level keys are accepted too, and missing keys take their defaults
    assert ReconConfig.from_toml("threshold_adc = 7\n") == ReconConfig(threshold_adc=7)
    # counts_per_kev unset (from the raw file) is left out of the TOML, which has no null
    assert config.counts_per_kev is None and "counts_per_kev =" not in config.to_toml()


def test_frozen_and_replace():
    config = ReconConfig()
    with pytest.raises(dataclasses.FrozenInstanceError):
        config.start_search_inner_rms = 2.0
    assert dataclasses.replace(config, start_search_inner_rms=1.0).start_search_inner_rms == 1.0


def test_unknown_keys_are_rejected_with_the_valid_ones(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("[recon]\nthreshold = 3\nstart_search_inner_rms = 1.0\n")
    with pytest.raises(ValueError) as err:
        ReconConfig.read_toml(path)
    message = str(err.value)
    assert "unknown key(s) ['threshold']" in message and "threshold_adc" in message and str(path) in message
    with pytest.raises(ValueError, match="not valid TOML"):
        ReconConfig.from_toml("start_search_inner_rms = = 2")
    with pytest.raises(FileNotFoundError):
        ReconConfig.read_toml(tmp_path / "missing.toml")


@pytest.mark.parametrize("text, new", [
    ("r_min = 1.2", "'r_min' is now 'start_search_inner_rms'"),
    ("r_max = 4.0", "'r_max' is now 'start_search_outer_rms'"),
    ("weight_scale_mm = 0.04", "'weight_scale_mm' is now 'second_pass_length_mm'"),
    ('second_pass_centre = "weighted_barycentre"', "second_pass_centre = 'weighted_barycentre' is now "
                                                   "'weighted_centroid'"),
])
def test_old_setting_names_are_refused_with_the_new_name(tmp_path, text, new):
    path = tmp_path / "old.toml"
    path.write_text(f"[recon]\n{text}\n")
    with pytest.raises(ValueError) as err:
        ReconConfig.read_toml(path)
    assert new in str(err.value) and str(path) in str(err.value)


@pytest.mark.parametrize("kwargs, text", [
    ({"threshold_adc": -1}, "'threshold_adc' must be a number between 0 and 32767 ADC counts (got -1)"),
    ({"threshold_adc": 1e20}, "'threshold_adc' must be a number between 0 and 32767 ADC counts (got 1e+20)"),
    ({"threshold_adc": 10**400}, "'threshold_adc' must be a number between 0 and 32767 ADC counts (got 1000"),
    ({"threshold_adc": True}, "'threshold_adc' must be a number between 0 and 32767 ADC counts (got True)"),
    ({"min_pixels": 0}, "'min_pixels' must be an integer between 1 and 1073741824 pixels (got 0)"),
    ({"min_pixels": float("inf")}, "'min_pixels' must be finite (got inf)"),
    ({"min_pixels": np.float64("nan")}, "'min_pixels' must be finite (got"),
    ({"min_pixels": 2**63}, "'min_pixels' must be an integer between 1 and 1073741824 pixels"),
    ({"saturation_adc": 2**64}, "'saturation_adc' must be an integer between 1 and 32768 ADC counts"),
    ({"saturation_adc": np.uint64(2**64 - 1)}, "'saturation_adc' must be an integer between 1 and 32768 ADC"),
    ({"counts_per_kev": 1e-300}, "'counts_per_kev' must be a number between 1e-06 and 1e+09 ADC counts per keV"),
    ({"start_search_outer_rms": 1e300}, "'start_search_outer_rms' must be a number between 0 and 100"),
    ({"second_pass_length_mm": 1e300}, "'second_pass_length_mm' must be a number between 0 and 1000 mm"),
    ({"threshold_noise_rms": 1e9, "pixel_map": "map.h5"}, "'threshold_noise_rms' must be a number between 0 and"),
    ({"emission_estimator": ["adaptive"]}, "'emission_estimator' must be one of"),
    ({"min_pixels": 2.5}, "'min_pixels' must be an integer"),
    ({"start_search_inner_rms": 2.0, "start_search_outer_rms": 1.0},
     "'start_search_outer_rms' must be > start_search_inner_rms"),
    ({"second_pass_length_mm": 0}, "'second_pass_length_mm' must be > 0"),
    ({"second_pass_centre": "centre"}, "'second_pass_centre' must be one of"),
    ({"counts_per_kev": float("nan")}, "'counts_per_kev' must be finite"),
    ({"start_search_inner_rms": "1"}, "'start_search_inner_rms' must be a number"),
    ({"bad_pixels": [(1, 2, 3)]}, "'bad_pixels' must be a list of (column, row)"),
    ({"bad_pixels": [(-1, 2)]}, "non-negative"),
    ({"bad_pixels": np.array([[2**64 - 1, 2]], np.uint64)},
     f"below 32768, the largest chip side (got [{2**64 - 1}, 2])"),
])
def test_invalid_values_name_the_field(kwargs, text):
    with pytest.raises(ValueError) as err:
        ReconConfig(**kwargs)
    assert text in str(err.value)


def test_bad_pixels_from_a_chip_map_and_outside_the_chip():
    grid = HexGrid(n_columns=10, n_rows=8)
    chip = np.zeros(grid.shape, bool)
    chip[2, 5] = chip[7, 0] = True  # [row, column]
    config = ReconConfig(bad_pixels=chip)
    assert config.bad_pixels == ((5, 2), (0, 7))
    flat = config.bad_pixel_map(grid)
    assert flat.reshape(grid.shape)[2, 5] == 1 and flat.sum() == 2
    with pytest.raises(ValueError, match=r"\(column 12, row 1\) outside the chip"):
        ReconConfig(bad_pixels=[(12, 1)]).bad_pixel_map(grid)
    assert ReconConfig().bad_pixel_map(grid).size == 0


def test_every_status_bit_is_documented():
    assert Status.MALFORMED_INPUT == 1  # bit 0: placeholders of malformed input events (strict=False)
    assert set(STATUS_DOCS) == set(Status)
    assert max(Status) < 2**16  # fits the uint16 column
    for bit in Status:
        assert bin(int(bit)).count("1") == 1
        assert bit.name in explain_status(bit) and STATUS_DOCS[bit] in explain_status(bit)
    assert explain_status(0) == "0: fully reconstructed"
    text = explain_status(Status.NO_SIGNAL | Status.ROI_BORDER | 1 << 15)
    assert "NO_SIGNAL" in text and "ROI_BORDER" in text and "unknown bits 0x8000" in text
    counts = status_counts(np.array([0, 2, 2, 3], np.uint16))
    assert counts["ok"] == 1 and counts["NO_SIGNAL"] == 3 and counts["MALFORMED_INPUT"] == 1
