"""Modulation factor versus energy."""

import numpy as np
import pytest

from trackfit.analysis import fit_modulation_factor_curve, measure_modulation_factor, stokes_parameters

from .toys import modulated_angles


def true_mu(energy_kev):
    return 0.5 * (1 - np.exp(-(energy_kev - 1.5) / 3.0))


def test_curve_from_polarized_runs():
    # 100 %-polarized runs at four energies; the curve through the measured points matches the injected mu(E) and
    # the per-event modulation factor gives an unbiased degree for a partly polarized broad-band source
    rng = np.random.default_rng(70)
    points = []
    for energy in (2.7, 3.7, 5.9, 8.0):
        phi = modulated_angles(rng, 100_000, true_mu(energy), np.deg2rad(15.0))
        points.append(measure_modulation_factor(phi, np.full(phi.size, energy),
                                                polarization_angle_rad=np.deg2rad(15.0)))
    for point in points:
        assert abs(point.value - true_mu(point.energy_kev)) < 4 * point.error
        # error of a projected Stokes parameter (Kislat et al. 2015): sqrt((2 - m^2)/N) for mu = 1
        assert point.error == pytest.approx(np.sqrt((2 - point.value**2) / 100_000), rel=0.03)
    curve = fit_modulation_factor_curve(points)
    grid = np.linspace(2.7, 8.0, 20)
    assert np.max(np.abs(curve(grid) - true_mu(grid))) < 0.01
    assert curve(1.0) == pytest.approx(curve(2.7)) and curve(20.0) == pytest.approx(curve(8.0))  # clamped
    assert np.isnan(curve(np.nan))

    energy = rng.uniform(2.7, 8.0, 300_000)
    phi = modulated_angles(rng, energy.size, true_mu(energy) * 0.4, np.deg2rad(-30.0))
    result = stokes_parameters(phi, modulation_factor=curve(energy))
    assert abs(result.degree - 0.4) < 4 * result.degree_err
    assert abs(result.angle_deg + 30.0) < 4 * result.angle_err_deg
    text = repr(curve)
    # "degree" is the polarization's word: the curve's form is said as a polynomial order, with its fit quality
    assert "ModulationFactorCurve" in text and "polynomial of order 2 in ln E" in text and "degree" not in text
    assert "chi2/ndof" in text and not curve.quality.poor  # 4 points, 3 coefficients: one degree of freedom


def test_unknown_angle_and_partial_polarization():
    rng = np.random.default_rng(71)
    phi = modulated_angles(rng, 200_000, 0.9 * 0.3, 0.7)
    point = measure_modulation_factor(phi, np.full(phi.size, 4.0), polarization_degree=0.9)
    assert abs(point.value - 0.3) < 4 * point.error
    with pytest.raises(ValueError, match="polarization_degree"):
        measure_modulation_factor(phi, phi, polarization_degree=0.0)


def test_curve_needs_points():
    with pytest.raises(ValueError, match="at least one"):
        fit_modulation_factor_curve([])


def test_curve_error_matches_point_errors():
    # a straight line through two points (weighted least squares): at the points the curve's error equals the
    # points' errors, in between it is smaller than the larger one (error propagation, any statistics textbook)
    from trackfit.analysis.modfactor import ModulationFactorPoint

    points = [ModulationFactorPoint(energy_kev=3.0, value=0.3, error=0.02, n_events=1),
              ModulationFactorPoint(energy_kev=6.0, value=0.5, error=0.01, n_events=1)]
    curve = fit_modulation_factor_curve(points)
    assert curve.error([3.0, 6.0]) == pytest.approx([0.02, 0.01], rel=1e-9)
    assert curve.error(4.5) < 0.02
    # four points on the same line at equal errors: the mean error shrinks like 1/sqrt(2) at the centre
    many = [ModulationFactorPoint(energy_kev=e, value=0.1 * np.log(e), error=0.01, n_events=1)
            for e in (3.0, 3.0, 6.0, 6.0)]
    assert fit_modulation_factor_curve(many).error(3.0) == pytest.approx(0.01 / np.sqrt(2), rel=1e-9)
