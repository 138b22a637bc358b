"""docs/calibration-format.md: its TOML example is a valid selection (tests/docs runs its Python example)."""

import re
from pathlib import Path

import numpy as np

from trackfit.analysis import selection_from_dict

DOC = Path(__file__).resolve().parents[2] / "docs" / "calibration-format.md"


def test_toml_example_is_a_valid_selection():
    import tomllib

    blocks = re.findall(r"```toml\n(.*?)```", DOC.read_text(), flags=re.S)
    selection = selection_from_dict(tomllib.loads(blocks[0]))
    table = {"status": np.array([0, 512]), "emission_rad": np.array([0.1, 0.2]), "energy_kev": np.array([5.0, 5.0]),
             "n_pixels": np.array([50, 50]),
             "m2_major_mm2": np.array([2.0, 2.0]), "m2_minor_mm2": np.array([1.0, 1.0]),
             "conv_x_mm": np.zeros(2), "conv_y_mm": np.zeros(2), "peak_adc": np.array([100, 100])}
    assert selection.mask(table).tolist() == [True, True]  # bit 512 is ROI_BORDER, allowed
    assert len(selection.steps()) == 7  # the default selection and the six cuts of the example
