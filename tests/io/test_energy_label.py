"""What energy_kev means: the energy scale in a raw file's run attributes, the table provenance and the labels."""

import doctest

import numpy as np
import pytest

import trackfit.io.energy_label as energy_label
from trackfit import EventTable
from trackfit.io.energy_label import (
    counts_per_kev_from_run,
    describe_energy_scale,
    energy_axis_label,
    energy_is_calibrated,
    energy_scale_source,
)


def test_docstring_examples():
    assert doctest.testmod(energy_label).failed == 0


def test_scale_from_run_attributes():
    assert counts_per_kev_from_run({}) is None
    assert counts_per_kev_from_run({"nominal_counts_per_kev": np.float64(2400.0)}) == 2400.0
    for bad in (-3.0, 0, "many", float("nan"), True):
        with pytest.raises(ValueError, match="file 'run.h5', dataset '/run': attribute 'nominal_counts_per_kev'"):
            counts_per_kev_from_run({"nominal_counts_per_kev": bad}, path="run.h5")


@pytest.mark.parametrize("source, calibrated", [("settings", True), ("raw file", True), ("calibration", True),
                                                ("none", False)])
def test_labels_follow_the_recorded_source(source, calibrated):
    provenance = {"energy_scale_source": source, "energy_scale_counts_per_kev": 2400.0}
    assert energy_scale_source(provenance) == source
    assert energy_is_calibrated(provenance) is calibrated
    label = energy_axis_label(provenance)
    assert label == ("energy [keV]" if calibrated else "energy [keV] (uncalibrated)")
    assert energy_axis_label(provenance, calibrated=True) == "energy [keV]"
    text = describe_energy_scale(provenance)
    assert "2400 ADC counts per keV" in text and ("UNCALIBRATED" in text) is not calibrated


def test_tables_without_a_record_are_not_called_uncalibrated():
    assert energy_scale_source({}) is None and energy_scale_source(None) is None
    assert energy_axis_label({}) == "energy [keV]"
    assert energy_scale_source({"energy_scale_source": "guessed"}) is None
    assert describe_energy_scale({"input_name": "x"}) == "energy scale: not recorded"


def test_table_summary_marks_uncalibrated_energies():
    columns = {"energy_kev": np.array([5.9, 6.4], np.float32), "status": np.array([0, 0], np.uint16)}
    table = EventTable(columns, {"energy_scale_source": "none", "energy_scale_counts_per_kev": 3333.3})
    text = table.summary()
    assert "energy_kev (uncalibrated)" in text and "UNCALIBRATED" in text
    assert "UNCALIBRATED" in table._repr_html_()
    data = table.summary_dict()
    assert "UNCALIBRATED" in data["energy_scale"]
    # min, max and mean against numpy on the same values
    assert data["columns"]["energy_kev"]["min"] == float(np.float32(5.9))
    assert data["columns"]["energy_kev"]["mean"] == pytest.approx(np.mean(columns["energy_kev"], dtype=np.float64))
    calibrated = EventTable(columns, {"energy_scale_source": "raw file", "energy_scale_counts_per_kev": 2400.0})
    assert "(uncalibrated)" not in calibrated.summary() and "from the raw file" in calibrated.summary()
