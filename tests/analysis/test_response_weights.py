"""Weights from the expected modulation response (``--weights response``, docs/methods.md §11), the choice of the
emission estimate in the analysis, and the refusal of calibrations made with other weights or another estimate.

Toys: tracks whose modulation response grows with their ellipticity, mu_k = 0.8 e_k, with angles drawn from
1 + mu_k p cos 2(phi - psi). Outside references: the weighted estimators of Kislat et al. (2015) and Di Marco et al.
(2022), and the Cauchy-Schwarz bound: weights w_k give Q = sum w mu / sqrt(N sum w^2), largest for w = mu, where it is
sqrt(<mu^2>) (Marshall 2021, docs/methods.md §4)."""

import numpy as np
import pytest

from trackfit import ReconConfig
from trackfit.analysis import Calibration, CalibrationRun, build_calibration, measure_polarization
from trackfit.analysis.estimates import EstimateMismatchError, estimator_of, with_estimate
from trackfit.analysis.response_weights import ModulationResponse, ellipticity, fit_modulation_response
from trackfit.cli import main
from trackfit.io.table import EventTable, write_table

from .test_commands import make_table
from .toys import modulated_angles


def response_table(rng, n, *, degree=1.0, angle_rad=0.0, energy_kev=5.0, estimator=None):
    """A toy table (tests/analysis/test_commands.make_table) whose events respond with mu_k = 0.8 e_k; with an
    estimator, an EventTable that says it was reconstructed with it and holds its columns (a copy of the
    two-stage ones with other angles)."""
    table = make_table(rng, n, energy_kev=energy_kev)
    minor = rng.uniform(0.001, 0.003, n)
    e = rng.uniform(0.02, 0.95, n)
    table["m2_minor_mm2"] = minor.astype(np.float32)
    table["m2_major_mm2"] = (minor * (1 + e) / (1 - e)).astype(np.float32)
    table["m3_major_mm3"] = rng.normal(0, 1e-5, n).astype(np.float32)
    mu = 0.8 * ellipticity(table)
    table["emission_rad"] = modulated_angles(rng, n, mu * degree, angle_rad).astype(np.float32)
    table["true_response"] = mu
    if estimator is None:
        return table
    prefix = estimator + "_"
    table[prefix + "emission_rad"] = modulated_angles(rng, n, mu * degree, angle_rad).astype(np.float32)
    table[prefix + "conv_x_mm"], table[prefix + "conv_y_mm"] = table["conv_x_mm"], table["conv_y_mm"]
    return EventTable(table, {"config_toml": ReconConfig(emission_estimator=estimator).to_toml()})


def quality(phi, w, psi=0.0):
    """Q = mu_w sqrt(N_eff / N): the weighted modulation (Di Marco et al. 2022) and effective events."""
    c = 2 * np.cos(2 * (phi - psi))
    return (w @ c) / w.sum() * np.sqrt(w.sum() ** 2 / (w @ w) / phi.size)


def test_fitted_response_is_the_expected_modulation_and_reaches_the_optimal_quality():
    rng = np.random.default_rng(401)
    calibration_run = response_table(rng, 60_000)
    model = fit_modulation_response([(calibration_run, calibration_run["emission_rad"], 1.0, 0.0)])
    test = response_table(rng, 60_000)
    predicted, true = model(test), test["true_response"]
    assert np.corrcoef(predicted, true)[0, 1] > 0.97
    assert np.abs(predicted - true).mean() < 0.04
    phi = test["emission_rad"].astype(float)
    unweighted = quality(phi, np.ones(phi.size))
    optimum = np.sqrt(np.mean(true**2))  # Cauchy-Schwarz: the best Q any weights reach (derived)
    weighted = quality(phi, predicted)
    sigma = np.sqrt(2 / phi.size)
    assert unweighted == pytest.approx(np.mean(true), abs=4 * sigma)  # Kislat et al. 2015: mu = <mu_k>
    assert weighted == pytest.approx(optimum, abs=4 * sigma)
    assert weighted > unweighted + 4 * sigma


def test_response_of_an_unknown_beam_angle_is_measured_from_the_run():
    rng = np.random.default_rng(402)
    run = response_table(rng, 40_000, angle_rad=np.deg2rad(50))
    known = fit_modulation_response([(run, run["emission_rad"], 1.0, np.deg2rad(50))])
    measured = fit_modulation_response([(run, run["emission_rad"], 1.0, None)])
    assert np.allclose(known(run), measured(run), atol=0.02)


def test_response_weights_leave_unpolarized_data_unmodulated():
    rng = np.random.default_rng(403)
    run = response_table(rng, 40_000)
    model = fit_modulation_response([(run, run["emission_rad"], 1.0, 0.0)])
    unpolarized = response_table(rng, 40_000, degree=0.0)
    w = model(unpolarized)
    phi = unpolarized["emission_rad"].astype(float)
    for harmonic in (np.cos(2 * phi), np.sin(2 * phi)):
        mean = (w @ harmonic) / w.sum()
        error = np.sqrt(w**2 @ harmonic**2) / w.sum()  # compound-Poisson error of a weighted mean (§4)
        assert abs(mean) < 4 * error


def test_response_model_is_validated_and_needs_events():
    with pytest.raises(ValueError, match="coefficients"):
        ModulationResponse(coefficients=(1.0,), degree=2, feature_low=(0,) * 5, feature_high=(1,) * 5,
                           feature_mean=(0,) * 5, feature_scale=(1,) * 5)
    with pytest.raises(ValueError, match="feature_scale"):
        ModulationResponse(coefficients=(1.0,), degree=0, feature_low=(0,) * 5, feature_high=(1,) * 5,
                           feature_mean=(0,) * 5, feature_scale=(0,) * 5)
    rng = np.random.default_rng(404)
    small = response_table(rng, 100)
    with pytest.raises(ValueError, match="at least 210"):
        fit_modulation_response([(small, small["emission_rad"], 1.0, 0.0)])
    with pytest.raises(KeyError, match="needs column .m2_minor_mm2."):
        fit_modulation_response([({"m2_major_mm2": [1.0]}, [0.0], 1.0, 0.0)])


def test_calibration_with_response_weights_measures_the_weighted_modulation_factor(tmp_path):
    rng = np.random.default_rng(405)
    polarized = response_table(rng, 60_000, angle_rad=0.3)
    calibration, report = build_calibration(
        polarized=[CalibrationRun(table=polarized, label="pol.h5", polarization_angle_rad=0.3)], weighting="response")
    assert calibration.parts() == ["modulation_factor", "modulation_response"]
    for part in ("modulation_factor", "modulation_response"):
        assert calibration.weights_of(part) == "response" and calibration.estimator_of(part) == "two-stage"
    # with weights w_k the measured factor is sum w mu / sum w (Di Marco et al. 2022); w ~ mu here
    mu = polarized["true_response"]
    w = calibration.apply(polarized)["response_weight"]
    point = report.modulation_points[0][1]
    assert point.value == pytest.approx((w @ mu) / w.sum(), abs=4 * point.error)
    assert point.value > mu.mean() + 4 * point.error
    # the file keeps the model: the same weights after a round trip
    path = calibration.save(tmp_path / "cal.h5")
    loaded = Calibration.load(path)
    assert np.allclose(loaded.apply(polarized)["response_weight"], w)
    assert "estimate: two-stage" in repr(loaded)
    # a science run of degree 0.6 at -20 degrees, measured with the same weights
    science = response_table(rng, 40_000, degree=0.6, angle_rad=np.deg2rad(-20))
    result = measure_polarization(science, calibration=loaded, weighting="response")
    assert result.degree == pytest.approx(0.6, abs=4 * result.degree_err)
    assert result.angle_deg == pytest.approx(-20, abs=4 * result.angle_err_deg)
    # other weights than the calibration's: refused, naming both
    with pytest.raises(EstimateMismatchError, match="made with weights 'response', this measurement uses 'none'"):
        measure_polarization(science, calibration=loaded)
    with pytest.raises(ValueError, match="need a calibration with a modulation-response part"):
        measure_polarization(science, modulation_factor=0.5, weighting="response")


def test_response_weights_need_polarized_runs():
    rng = np.random.default_rng(406)
    with pytest.raises(ValueError, match="needs polarized runs"):
        build_calibration(unpolarized=[CalibrationRun(table=response_table(rng, 1000), label="u.h5")],
                          weighting="response")


def test_the_analysis_uses_the_estimate_the_table_was_reconstructed_with():
    rng = np.random.default_rng(407)
    table = response_table(rng, 2000, estimator="adaptive")
    assert estimator_of(table) == "adaptive"
    swapped = with_estimate(table)
    assert np.array_equal(swapped["emission_rad"], table["adaptive_emission_rad"])
    assert np.array_equal(swapped["two_stage_emission_rad"], table["emission_rad"])
    assert with_estimate(table, "two-stage") is table
    assert swapped.provenance == table.provenance
    assert estimator_of({"emission_rad": [0.0]}) == "two-stage"  # no provenance: the two-stage columns
    with pytest.raises(ValueError, match="has no 'skeleton' estimate"):
        with_estimate(table, "skeleton")


def test_calibration_of_one_estimate_is_refused_for_another():
    rng = np.random.default_rng(408)
    polarized = response_table(rng, 20_000, estimator="adaptive")
    calibration, _ = build_calibration(polarized=[CalibrationRun(table=polarized, label="pol.h5",
                                                                 polarization_angle_rad=0.0)])
    assert calibration.estimator_of("modulation_factor") == "adaptive"
    science = response_table(rng, 5000, degree=0.5, estimator="adaptive")
    assert measure_polarization(science, calibration=calibration).settings["estimator"] == "adaptive"
    with pytest.raises(EstimateMismatchError, match="made with the 'adaptive' emission estimate, this measurement "
                                                    "uses the 'two-stage' estimate"):
        measure_polarization(science, calibration=calibration, estimator="two-stage")
    old_style = response_table(rng, 5000, degree=0.5)  # no provenance: the two-stage estimate
    with pytest.raises(EstimateMismatchError, match="--estimator adaptive"):
        measure_polarization(old_style, calibration=calibration)
    two_stage = response_table(rng, 5000, estimator="adaptive")
    with pytest.raises(ValueError, match="different emission estimates"):
        build_calibration(polarized=[CalibrationRun(table=polarized, label="a.h5"),
                                     CalibrationRun(table=old_style, label="b.h5")])
    # one estimate for all: the two-stage columns that every table holds
    calibration, _ = build_calibration(polarized=[CalibrationRun(table=polarized, label="a.h5"),
                                                  CalibrationRun(table=two_stage, label="b.h5")],
                                       estimator="two-stage")
    assert calibration.estimator_of("modulation_factor") == "two-stage"


def test_commands_take_response_weights_and_refuse_a_mismatch(tmp_path, capsys):
    rng = np.random.default_rng(409)
    pol = write_table(tmp_path / "pol.h5", response_table(rng, 30_000, estimator="adaptive"))
    science = write_table(tmp_path / "sci.h5", response_table(rng, 20_000, degree=0.5, estimator="adaptive"))
    cal = tmp_path / "cal.h5"
    assert main(["calibrate", "-o", str(cal), "--polarized", f"{pol},angle_deg=0", "--weights", "response"]) == 0
    assert Calibration.load(cal).estimator_of("modulation_response") == "adaptive"
    capsys.readouterr()
    assert main(["polarization", str(science), "-c", str(cal), "--weights", "response"]) == 0
    assert "degree" in capsys.readouterr().out
    assert main(["polarization", str(science), "-c", str(cal), "--weights", "ellipticity"]) == 2
    err = capsys.readouterr().err
    assert "made with weights 'response', this measurement uses 'ellipticity'" in err and len(err.splitlines()) == 1
    assert main(["polarization", str(science), "-c", str(cal), "--weights", "response",
                 "--estimator", "two-stage"]) == 2
    assert "'adaptive' emission estimate" in capsys.readouterr().err
