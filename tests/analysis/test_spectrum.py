"""Line fits of pulse-height spectra and the energy scale (docs/methods.md section 6)."""

import numpy as np
import pytest
from scipy import stats

from trackfit.analysis import FE55_KALPHA_KEV, FE55_KBETA_KEV, FE55_LINES_KEV, EnergyScale, fit_fe55, fit_line
from trackfit.analysis.spectrum import FE55_INTENSITIES, FE55_KB_KA_RATIO, FWHM_PER_SIGMA


def fe55_pulse_heights(rng, n, *, gain=1000.0, fwhm_frac=0.18, kbeta_fraction=0.1, background=0):
    """Pulse heights of an Fe-55 source: K-alpha and K-beta with sigma proportional to sqrt(E)."""
    energy = np.where(rng.random(n) < kbeta_fraction / (1 + kbeta_fraction), FE55_KBETA_KEV, FE55_KALPHA_KEV)
    sigma_frac = fwhm_frac / FWHM_PER_SIGMA * np.sqrt(FE55_KALPHA_KEV / energy)
    ph = gain * energy * (1 + sigma_frac * rng.standard_normal(n))
    if background:
        ph = np.concatenate([ph, rng.uniform(0.5 * gain * FE55_KALPHA_KEV, 1.5 * gain * FE55_KALPHA_KEV,
                                             background)])
    return ph


def test_fe55_line_energies():
    # docs/methods.md section 9 [X-ray Data Booklet]: Mn K-alpha1 / K-alpha2 / K-beta = 5898.75 / 5887.65 / 6490.45 eV
    # (tolerance 0.01 eV); K-alpha centroid 5.8950 keV and the K-beta/K-alpha ratio 1.1010 (section 6). This pins the
    # table the code was written from (same source); the next test compares it with a second one.
    assert 1000 * FE55_LINES_KEV["Ka1"] == pytest.approx(5898.75, abs=0.01)
    assert 1000 * FE55_LINES_KEV["Ka2"] == pytest.approx(5887.65, abs=0.01)
    assert 1000 * FE55_LINES_KEV["Kb"] == pytest.approx(6490.45, abs=0.01)
    assert FE55_KALPHA_KEV == pytest.approx(5.8950, abs=5e-5)
    assert FE55_KB_KA_RATIO == pytest.approx(1.1010, abs=5e-5)
    assert FE55_INTENSITIES == {"Ka1": 16.2, "Ka2": 8.2, "Kb": 2.85}


def test_fe55_line_energies_agree_with_xraydb():
    # second source (docs/methods.md section 6 and 9 [xraydb]): the Elam tables list the Mn K lines 1.3-1.6 eV higher
    # (5900.3 / 5889.1 / 6491.8 eV); both agree within 2 eV, and the Ka1/Ka2 intensity ratio (0.58/0.29) within 5 %
    xraydb = pytest.importorskip("xraydb")
    lines = xraydb.xray_lines("Mn", "K")
    for ours, theirs in (("Ka1", "Ka1"), ("Ka2", "Ka2"), ("Kb", "Kb1")):
        assert 1000 * FE55_LINES_KEV[ours] == pytest.approx(lines[theirs].energy, abs=2.0)
    ratio_theirs = lines["Ka1"].intensity / lines["Ka2"].intensity
    assert FE55_INTENSITIES["Ka1"] / FE55_INTENSITIES["Ka2"] == pytest.approx(ratio_theirs, rel=0.05)


def test_gaussian_fit_matches_scipy_mle():
    # without background, the binned Poisson fit of one Gaussian agrees with the unbinned maximum-likelihood fit
    # of scipy.stats.norm.fit to a small fraction of its error
    rng = np.random.default_rng(40)
    values = rng.normal(250.0, 12.0, 20_000)
    fit = fit_line(values, bins=120, range=(150, 350), background=False)
    mean, sigma = stats.norm.fit(values)
    assert fit.peak == pytest.approx(mean, abs=0.2 * fit.peak_err)
    assert fit.sigma == pytest.approx(sigma, rel=0.01)
    # error of a Gaussian mean: sigma / sqrt(N) (textbook)
    assert fit.peak_err == pytest.approx(sigma / np.sqrt(values.size), rel=0.03)
    assert fit.counts == pytest.approx(values.size, rel=0.01)


def test_fe55_fit_recovers_peak_and_resolution():
    rng = np.random.default_rng(41)
    ph = fe55_pulse_heights(rng, 30_000, fwhm_frac=0.18, background=3000)
    fit = fit_fe55(ph, bins=100, range=(3000, 8800))
    assert abs(fit.peak - 1000 * FE55_KALPHA_KEV) < 4 * fit.peak_err
    assert abs(fit.fwhm_frac - 0.18) < 4 * fit.fwhm_frac_err
    assert abs(fit.counts_kbeta / fit.counts - 0.1) < 0.07  # spread 0.017 in 40 toys of this size
    assert fit.deviance / fit.ndof < 1.5 and fit.success
    # the uniform background of 3000 events over 0.5-1.5 x 5.9 keV (toy) puts 3000 x 5800 / 5900 in the range
    assert fit.background_counts == pytest.approx(3000 * 5800 / 5900, rel=0.15)
    text = repr(fit)
    assert "background in range" in text and "per unit" not in text and "fit quality" in text


def test_fe55_peak_precision():
    # docs/methods.md section 6 [derived]: the peak of a line with 18 % FWHM is known to 0.0764 / sqrt(N) relative;
    # with the K-beta fraction fixed the blend costs only a few per cent; spread over 25 toys
    rng = np.random.default_rng(42)
    n = 3000
    peaks, errors = [], []
    for _ in range(25):
        fit = fit_fe55(fe55_pulse_heights(rng, n), bins=60, range=(2900, 8800), kbeta_fraction=0.1)
        peaks.append(fit.peak)
        errors.append(fit.peak_err)
    rel_err = np.median(errors) / (1000 * FE55_KALPHA_KEV)
    assert rel_err == pytest.approx(0.0764 / np.sqrt(n), rel=0.15)
    assert np.std(peaks, ddof=1) == pytest.approx(np.median(errors), rel=0.45)  # 25 toys: +-14 % (1 sigma)


def test_energy_scale_linear_and_quadratic():
    # a scale fitted to exact lines reproduces them (compare numpy.polyfit)
    ph = np.array([2000.0, 3700.0, 5900.0, 8100.0])
    energy = 0.05 + 1e-3 * ph + 2e-9 * ph**2
    quad = EnergyScale.from_lines(ph, energy, degree=2)
    assert quad.coefficients == pytest.approx(np.polyfit(ph, energy, 2)[::-1], rel=1e-6)
    assert quad.energy_kev(ph) == pytest.approx(energy, rel=1e-9)
    one = EnergyScale.from_lines([5895.0], [5.895])  # one line: through the origin
    assert one.coefficients[0] == 0.0 and one.energy_kev(2000.0) == pytest.approx(2.0)
    with pytest.raises(ValueError, match="at least 3 lines"):
        EnergyScale.from_lines([1.0, 2.0], [1.0, 2.0], degree=2, through_origin=False)
    assert "EnergyScale" in repr(quad)
