"""Binned modulation-curve fit (docs/methods.md section 3 and 9)."""

import numpy as np
import pytest

from trackfit.analysis import modulation_curve, stokes_parameters

from .toys import modulated_angles


def test_fit_of_check_curve():
    # docs/methods.md section 9 [derived]: N proportional to 1 + 0.3 cos 2(phi - 30 deg), N = 1e6 ->
    # m = 0.300 +- 0.0045, phi0 = 30.0 +- 0.4 deg
    rng = np.random.default_rng(20)
    phi = modulated_angles(rng, 10**6, 0.3, np.deg2rad(30.0))
    fit = modulation_curve(phi, n_bins=36)
    assert fit.modulation == pytest.approx(0.300, abs=0.0045)
    assert np.rad2deg(fit.phase_rad) == pytest.approx(30.0, abs=0.4)
    # errors for large N (docs/methods.md section 3 [derived]): sigma_m ~ sqrt(2/N), sigma_phi0 ~ sigma_m / (2 m)
    assert fit.modulation_err == pytest.approx(np.sqrt(2 / 10**6), rel=0.05)
    assert fit.phase_err_rad == pytest.approx(fit.modulation_err / (2 * fit.modulation), rel=0.05)
    # A + B cos^2 form (Strohmayer & Kallman 2013): m = B / (2A + B)
    assert fit.b / (2 * fit.a + fit.b) == pytest.approx(fit.modulation, rel=1e-12)
    assert fit.n_fit == pytest.approx(10**6, rel=3e-3)


def test_binned_and_unbinned_agree():
    # the binned fit and the unbinned Stokes estimate measure the same modulation (Kislat et al. 2015, sec. 2)
    rng = np.random.default_rng(21)
    phi = modulated_angles(rng, 200_000, 0.2, np.deg2rad(-70.0))
    fit = modulation_curve(phi, n_bins=72)
    stokes = stokes_parameters(phi)
    assert fit.modulation == pytest.approx(stokes.degree, abs=0.3 * fit.modulation_err)
    assert fit.phase_rad == pytest.approx(stokes.angle_rad, abs=0.3 * fit.phase_err_rad)


def test_goodness_of_fit_is_chi_square():
    # at the true model the Pearson chi-square follows chi2(ndof): mean ndof (scipy.stats.chi2), 80 toys
    rng = np.random.default_rng(22)
    chi2 = [modulation_curve(modulated_angles(rng, 20_000, 0.1, 0.5), n_bins=24).chi2 for _ in range(80)]
    assert np.mean(chi2) == pytest.approx(21, abs=4 * np.sqrt(2 * 21 / 80))


def test_unpolarized_curve_is_flat():
    rng = np.random.default_rng(23)
    fit = modulation_curve(rng.uniform(-np.pi, np.pi, 100_000), n_bins=36)
    assert fit.modulation < 4 * np.sqrt(2 / 100_000)


def test_weighted_curve():
    rng = np.random.default_rng(24)
    phi = modulated_angles(rng, 200_000, 0.25, 0.2)
    w = rng.uniform(0.5, 1.5, phi.size)
    fit = modulation_curve(phi, n_bins=36, weights=w)
    assert fit.weighted and fit.n_fit == pytest.approx(w.sum(), rel=0.01)
    assert abs(fit.modulation - 0.25) < 4 * fit.modulation_err
    assert "weighted" in repr(fit)


@pytest.mark.parametrize("bad", [10, 0, 30, 12.5])
def test_bins_multiple_of_12(bad):
    with pytest.raises(ValueError, match="multiple of 12"):
        modulation_curve(np.zeros(10), n_bins=bad)


def test_angle_wrapping():
    # angles outside (-pi, pi] are wrapped, so phi and phi + 2 pi give the same curve
    rng = np.random.default_rng(25)
    phi = modulated_angles(rng, 50_000, 0.3, 1.0)
    a, b = modulation_curve(phi), modulation_curve(phi + 2 * np.pi)
    assert np.array_equal(a.counts, b.counts)
