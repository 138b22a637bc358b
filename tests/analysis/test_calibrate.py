"""build_calibration: the default selection, energy scales from any lines, gain maps from any flat-field line,
gain-map cells chosen from the event count, poor fits reported, and cut flows kept."""

import numpy as np
import pytest
import xraydb

from trackfit.analysis import (
    CalibrationRun,
    ElongationCut,
    EnergyWindow,
    FitQualityWarning,
    NoEventsLeftError,
    UsableEvents,
    build_calibration,
    measure_polarization,
)
from trackfit.analysis.estimates import EstimateMismatchError
from trackfit.analysis.gainmap import choose_gain_cell_mm
from trackfit.recon.status import Status

from .test_commands import ADC_PER_KEV, make_table

#: line energies from xraydb (Elam et al. tables), keV: Cu K-alpha1, Mo K-alpha1, Ar K-alpha1
CU_KA_KEV = xraydb.xray_lines("Cu")["Ka1"].energy / 1000.0
MO_KA_KEV = xraydb.xray_lines("Mo")["Ka1"].energy / 1000.0
AR_KA_KEV = xraydb.xray_lines("Ar")["Ka1"].energy / 1000.0


def line_table(rng, lines, *, nominal_adc_per_kev=2000.0, resolution=0.07, gain=None, extent_mm=5.0):
    """A table of several lines {energy_kev: events}: pulse heights at ADC_PER_KEV per keV (times ``gain(x, y)``);
    the table's own energy_kev uses another, nominal scale, as an uncalibrated reconstruction does."""
    tables = [make_table(rng, n, energy_kev=energy) for energy, n in lines.items()]
    table = {name: np.concatenate([t[name] for t in tables]) for name in tables[0]}
    n = table["pulse_height"].size
    energy = np.concatenate([np.full(t["pulse_height"].size, e) for e, t in zip(lines, tables, strict=True)])
    x, y = rng.uniform(-extent_mm, extent_mm, n), rng.uniform(-extent_mm, extent_mm, n)
    ph = ADC_PER_KEV * energy * (1 + resolution * rng.standard_normal(n)) * (1.0 if gain is None else gain(x, y))
    table.update(pulse_height=ph.astype(np.float32), energy_kev=(ph / nominal_adc_per_kev).astype(np.float32),
                 centroid_x_mm=x.astype(np.float32), centroid_y_mm=y.astype(np.float32),
                 conv_x_mm=x.astype(np.float32), conv_y_mm=y.astype(np.float32))
    return table


def test_energy_scale_from_lines_alone():
    # two fluorescence lines (xraydb energies) in one table, no flat field; the table's nominal scale is 50 % off
    rng = np.random.default_rng(300)
    table = line_table(rng, {CU_KA_KEV: 6000, MO_KA_KEV: 4000})
    runs = [CalibrationRun(table=table, label="tube.h5", energy_kev=e) for e in (CU_KA_KEV, MO_KA_KEV)]
    calibration, report = build_calibration(lines=runs)
    assert calibration.parts() == ["energy_scale"]
    scale = calibration.energy_scale
    for energy, (_, _, fit) in zip((CU_KA_KEV, MO_KA_KEV), report.line_fits, strict=True):
        assert fit.peak == pytest.approx(ADC_PER_KEV * energy, abs=4 * fit.peak_err)  # the injected gain
        assert scale.energy_kev(ADC_PER_KEV * energy) == pytest.approx(energy, rel=4 * fit.peak_rel_err)
    assert len([role for _, role, _ in report.cut_flows if role == "line"]) == 1  # one table, one cut flow
    # one line gives a scale through the origin
    single, report = build_calibration(lines=runs[:1])
    assert single.energy_scale.coefficients[0] == 0.0
    assert single.energy_scale.energy_kev(ADC_PER_KEV * CU_KA_KEV) == pytest.approx(
        CU_KA_KEV, rel=4 * report.line_fits[0][2].peak_rel_err)
    assert any("through the origin" in note for note in report.notes)


def test_a_line_and_its_escape_peak():
    # an argon detector at 20 keV: the escape peak sits one Ar K-alpha (xraydb) below the line
    rng = np.random.default_rng(301)
    escape = 20.0 - AR_KA_KEV
    table = line_table(rng, {20.0: 5000, escape: 600}, resolution=0.035)
    runs = [CalibrationRun(table=table, label="ar.h5", energy_kev=e) for e in (20.0, escape)]
    calibration, report = build_calibration(lines=runs)
    peaks = [fit.peak for _, _, fit in report.line_fits]
    errors = [fit.peak_err for _, _, fit in report.line_fits]
    assert abs(peaks[1] / peaks[0] - escape / 20.0) < 4 * np.hypot(errors[0] / peaks[0], errors[1] / peaks[1])


def test_gain_map_from_a_flat_field_of_any_line():
    # a 10 keV line (not Fe-55), the right half of the chip with 6 % more gain: recovered cell by cell
    rng = np.random.default_rng(302)
    table = line_table(rng, {10.0: 20_000}, gain=lambda x, y: np.where(x > 0, 1.06, 1.0))
    run = CalibrationRun(table=table, label="flat10.h5", energy_kev=10.0)
    calibration, report = build_calibration(flat_field=[run], gain_cell_mm=2.5)
    gain = calibration.gain_map
    assert gain.line == "gaussian" and gain.n_measured == 16
    centres = 0.5 * (gain.x_edges_mm[1:] + gain.x_edges_mm[:-1])
    right, left = gain.relative_gain[centres > 0], gain.relative_gain[centres < 0]
    assert np.mean(right) / np.mean(left) == pytest.approx(1.06, abs=4 * np.median(gain.relative_gain_err))
    assert report.flat_field_line_kev == 10.0
    corrected_peak = report.flat_field_fit.peak
    assert calibration.energy_scale.energy_kev(corrected_peak) == pytest.approx(10.0, rel=1e-9)
    assert calibration.provenance["gain_map"]["line_kev"] == 10.0


def test_gain_cells_from_the_event_count():
    # a flat field of N events over an area A holds about N c^2 / A events per cell of size c: the chosen cell is
    # the smallest candidate above sqrt(A min_counts / N) (geometry), e.g. 1.83 mm -> 2 mm for 9000 events on
    # 10 x 10 mm and 300 per cell
    rng = np.random.default_rng(303)
    for n, expected in ((9_000, 2.0), (40_000, 1.0), (2_000, 5.0)):
        x, y = rng.uniform(-5, 5, n), rng.uniform(-5, 5, n)
        assert choose_gain_cell_mm(x, y, min_counts=300) == expected
        assert expected >= np.sqrt(100 * 300 / n)
    assert choose_gain_cell_mm(x[:100], y[:100], min_counts=300) is None


def test_defaults_work_on_a_few_thousand_events_and_errors_name_the_settings():
    rng = np.random.default_rng(304)
    table = make_table(rng, 3000)  # Fe-55 flat field over 8 x 8 mm
    calibration, report = build_calibration(flat_field=[CalibrationRun(table=table, label="flat.h5")])
    gain = calibration.gain_map
    # the 8 x 8 mm field in 3 x 3 cells of 2.5 mm (the outer ones stretched to the edge), ~ 330 events each
    assert report.gain_cell_mm == 2.5
    assert gain.counts[np.isfinite(gain.relative_gain)].sum() >= 0.8 * gain.counts.sum()
    assert any("chosen for" in note for note in report.notes)
    with pytest.raises(ValueError, match=r"gain_cell_mm=0\.5 mm reached gain_min_counts=300.*gain_cell_mm=2\.5 "
                                         r"would work.*smaller gain_min_counts"):
        build_calibration(flat_field=[CalibrationRun(table=table, label="flat.h5")], gain_cell_mm=0.5)


def test_poor_line_fit_warns():
    # two unresolved lines 12 % apart claimed as one line: the single Gaussian does not describe them
    rng = np.random.default_rng(305)
    table = line_table(rng, {10.0: 15_000, 11.2: 15_000}, resolution=0.03)
    with pytest.warns(FitQualityWarning, match="poor fit of the line at 10 keV"):
        build_calibration(lines=[CalibrationRun(table=table, label="double.h5", energy_kev=10.0)])


def test_default_selection_everywhere_and_cut_flows():
    rng = np.random.default_rng(306)
    flat = make_table(rng, 6000)
    flat["status"][:50] = int(Status.ROI_BORDER)  # a warning: kept by default
    flat["emission_rad"][50:70] = np.nan  # no emission angle: never kept
    flat["status"][50:70] = int(Status.ROUND)
    polarized = make_table(rng, 6000, energy_kev=6.0, modulation=0.5)
    calibration, report = build_calibration(
        flat_field=[CalibrationRun(table=flat, label="flat.h5")],
        polarized=[CalibrationRun(table=polarized, label="pol.h5")], selection=EnergyWindow(low_kev=4, high_kev=8))
    flows = {(label, role): flow for label, role, flow in report.cut_flows}
    flat_flow = flows[("flat.h5", "flat field")]
    failures = int(Status.TOO_FEW_PIXELS | Status.ROUND)  # the failure bits the toy table sets
    expected = np.count_nonzero(np.isfinite(flat["emission_rad"]) & ((flat["status"] & failures) == 0))
    assert flat_flow.rows[0] == ("default: emission angle, no failure bit", expected, 6000 - expected)
    pol_flow = flows[("pol.h5", "polarized")]
    assert [row[0] for row in pol_flow.rows] == ["default: emission angle, no failure bit",
                                                 "4 <= energy_kev < 8 keV"]
    recorded = calibration.provenance["modulation_factor"]
    assert recorded["selection"] == "default: emission angle, no failure bit and 4 <= energy_kev < 8 keV"
    assert recorded["cut_flows"]["pol.h5"]["steps"][1]["kept"] == pol_flow.n_kept
    assert calibration.selection_of("modulation_factor").steps()[0] == UsableEvents()
    # a run that loses every event: the error shows its cut flow
    with pytest.raises(NoEventsLeftError, match=r"(?s)polarized run 'pol.h5'.*40 <= energy_kev < 50 keV"):
        build_calibration(polarized=[CalibrationRun(table=polarized, label="pol.h5")],
                          selection=EnergyWindow(low_kev=40, high_kev=50))


def test_measurement_warns_when_its_selection_differs_from_the_calibration_and_refuses_other_weights():
    rng = np.random.default_rng(307)
    polarized = make_table(rng, 6000, energy_kev=6.0, modulation=0.5)
    calibration, _ = build_calibration(polarized=[CalibrationRun(table=polarized, label="pol.h5")],
                                       selection=ElongationCut(low=1.5))
    science = make_table(rng, 4000, energy_kev=6.0, modulation=0.3)
    with pytest.warns(Warning, match="only the calibration's modulation factor has 'elongation >= 1.5'"):
        measure_polarization(science, calibration=calibration)
    # the same track-shape cut and any energy window: no warning (warnings are errors in this suite); the table's
    # energies are on its nominal scale (6 keV at 9 "keV"), as there is no energy scale
    measure_polarization(science, calibration=calibration,
                         selection=ElongationCut(low=1.5) & EnergyWindow(low_kev=8, high_kev=10))
    # other weights than the calibration's modulation factor: refused, naming both
    with pytest.raises(EstimateMismatchError, match="made with weights 'none', this measurement uses 'ellipticity'"):
        measure_polarization(science, calibration=calibration, selection=ElongationCut(low=1.5),
                             weighting="ellipticity")
