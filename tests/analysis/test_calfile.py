"""Calibration files: round trip, application to a table, format errors (docs/calibration-format.md)."""

import h5py
import numpy as np
import pytest

from trackfit.analysis import (
    Calibration,
    CalibrationFormatError,
    EnergyScale,
    GainDrift,
    GainMap,
    ModulationFactorCurve,
    SpuriousMap,
    StatusCut,
    measure_polarization,
)
from trackfit.analysis.calfile import make_provenance

from .toys import modulated_angles


@pytest.fixture
def calibration():
    edges = np.array([-2.0, 0.0, 2.0])
    gain = GainMap(x_edges_mm=edges, y_edges_mm=edges, relative_gain=np.array([[0.9, 1.1], [np.nan, 1.0]]),
                   relative_gain_err=np.full((2, 2), 0.01), counts=np.array([[500, 600], [10, 700]]),
                   reference_peak=5000.0, min_counts=300)
    drift = GainDrift(node_time_s=np.array([0.0, 100.0]), node_gain=np.array([1.05, 0.95]), model="spline")
    scale = EnergyScale(coefficients=(0.0, 5.895 / 5000.0), line_pulse_heights=(5000.0,), line_energies_kev=(5.895,))
    curve = ModulationFactorCurve(coefficients=(0.1, 0.2), energy_range_kev=(2.0, 8.0), points_energy_kev=(2.0, 8.0),
                                  points_value=(0.24, 0.52), points_error=(0.01, 0.01))
    shape = (2, 2, 2)
    spurious = SpuriousMap(energy_kev=np.array([3.0, 6.0]), x_edges_mm=edges, y_edges_mm=edges,
                           q=np.arange(8.0).reshape(shape) / 100, u=-np.arange(8.0).reshape(shape) / 100,
                           q_err=np.full(shape, 0.001), u_err=np.full(shape, 0.001), counts=np.full(shape, 1e5))
    prov = {name: make_provenance(runs=[f"run_{name}.h5"], cuts={"cut": "StatusCut"}) for name in
            ("energy_scale", "gain_map", "gain_drift", "modulation_factor", "spurious_modulation")}
    return Calibration(energy_scale=scale, gain_map=gain, gain_drift=drift, modulation_factor=curve,
                       spurious_modulation=spurious, provenance=prov)


def test_round_trip(tmp_path, calibration):
    path = calibration.save(tmp_path / "cal.h5")
    loaded = Calibration.load(path)
    assert loaded.parts() == calibration.parts()
    assert loaded.energy_scale == calibration.energy_scale
    assert loaded.modulation_factor == calibration.modulation_factor
    for name in ("relative_gain", "relative_gain_err", "counts", "x_edges_mm"):
        np.testing.assert_array_equal(getattr(loaded.gain_map, name), getattr(calibration.gain_map, name))
    for name in ("q", "u", "q_err", "counts", "energy_kev"):
        np.testing.assert_array_equal(getattr(loaded.spurious_modulation, name),
                                      getattr(calibration.spurious_modulation, name))
    np.testing.assert_array_equal(loaded.gain_drift.node_gain, calibration.gain_drift.node_gain)
    assert loaded.provenance["gain_map"]["runs"] == ["run_gain_map.h5"]
    assert loaded.provenance["gain_map"]["trackfit_version"]
    assert "gain_map" in repr(loaded) and "<table>" in loaded._repr_html_()
    with pytest.raises(FileExistsError, match="overwrite"):
        calibration.save(path)


def test_apply(calibration):
    table = {"pulse_height": np.array([4500.0, 5500.0, 5000.0, 5000.0]),
             "centroid_x_mm": np.array([-1.0, -1.0, 1.0, 1.0]), "centroid_y_mm": np.array([-1.0, 1.0, -1.0, 1.0]),
             "conv_x_mm": np.array([-1.0, -1.0, 1.0, 1.0]), "conv_y_mm": np.array([-1.0, 1.0, -1.0, 1.0]),
             "energy_kev": np.zeros(4), "time_s": np.array([0.0, 50.0, 100.0, 200.0])}
    out = calibration.apply(table)
    # E = scale(PH / G): the gain map holds 0.9, 1.1, (unmeasured -> 1), 1.0
    np.testing.assert_allclose(out["energy_kev"], 5.895 / 5000 * np.array([5000.0, 5000.0, 5000.0, 5000.0]),
                               rtol=1e-6)
    np.testing.assert_allclose(out["modulation_factor"], 0.1 + 0.2 * np.log(np.clip(out["energy_kev"], 2, 8)))
    # spurious: energy 5.895 keV interpolated between the nodes at 3 and 6 keV
    t = (5.895 - 3.0) / 3.0
    q = calibration.spurious_modulation.q
    np.testing.assert_allclose(out["spurious_q"][0], (1 - t) * q[0, 0, 0] + t * q[1, 0, 0], rtol=1e-6)
    drifted = calibration.apply(table, use_gain_drift=True)
    np.testing.assert_allclose(drifted["gain_relative"] / out["gain_relative"], [1.05, 1.0, 0.95, 0.95])
    with pytest.raises(KeyError, match="pulse_height"):
        calibration.apply({"centroid_x_mm": np.zeros(1), "centroid_y_mm": np.zeros(1)})


def test_measure_polarization_with_calibration(calibration):
    rng = np.random.default_rng(80)
    n = 100_000
    table = {"pulse_height": rng.normal(5000, 300, n), "centroid_x_mm": rng.uniform(0, 2, n),
             "centroid_y_mm": rng.uniform(0, 2, n), "status": np.zeros(n, np.uint16)}
    table["conv_x_mm"], table["conv_y_mm"] = table["centroid_x_mm"], table["centroid_y_mm"]
    energy = 5.895 / 5000 * table["pulse_height"]
    mu = 0.1 + 0.2 * np.log(energy)
    q_sp = calibration.spurious_modulation.at(energy, table["conv_x_mm"], table["conv_y_mm"])
    # angles with modulation mu * 0.5 at 40 deg plus the map's spurious modulation (additive in Stokes space)
    c = mu * 0.25 * np.cos(np.deg2rad(80)) + q_sp[0]
    s = mu * 0.25 * np.sin(np.deg2rad(80)) + q_sp[1]
    table["emission_rad"] = modulated_angles(rng, n, 2 * np.hypot(c, s), 0.5 * np.arctan2(s, c))
    m = measure_polarization(table, selection=StatusCut(), calibration=calibration)
    assert abs(m.stokes.degree - 0.5) < 4 * m.stokes.degree_err
    assert abs(m.stokes.angle_deg - 40.0) < 4 * m.stokes.angle_err_deg
    assert m.to_dict()["stokes"]["n_events"] == n


def test_format_errors(tmp_path, calibration):
    path = calibration.save(tmp_path / "cal.h5")
    with h5py.File(path, "a") as f:
        f.create_group("mystery")
    with pytest.raises(CalibrationFormatError, match="unknown group.*mystery"):
        Calibration.load(path)
    with h5py.File(path, "a") as f:
        del f["mystery"]
        f.attrs["format_version"] = 99
    with pytest.raises(CalibrationFormatError, match="format_version 99"):
        Calibration.load(path)
    other = tmp_path / "other.h5"
    with h5py.File(other, "w") as f:
        f.attrs["trackfit_format"] = "event-table"
    with pytest.raises(CalibrationFormatError, match="'trackfit_format' must be 'calibration'"):
        Calibration.load(other)
    with pytest.raises(FileNotFoundError):
        Calibration.load(tmp_path / "missing.h5")
