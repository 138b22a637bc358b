"""Goodness of fit: poor fits are told apart from good ones and reported, never shown as plain "converged"."""

import warnings

import numpy as np
import pytest
from scipy import stats

from trackfit.analysis import FitQualityWarning, fit_fe55, fit_line, modulation_curve
from trackfit.analysis.fitquality import (
    POOR_FIT_P_VALUE,
    POOR_FIT_RATIO,
    combined_quality,
    fit_quality,
    warn_if_poor,
)

from .test_spectrum import fe55_pulse_heights
from .toys import modulated_angles


def test_p_value_is_the_chi_square_tail():
    # scipy.stats.chi2: the survival function of the chi-square law with ndof degrees of freedom
    quality = fit_quality(120.0, 94)
    assert quality.p_value == pytest.approx(stats.chi2.sf(120.0, 94))
    assert quality.ratio == pytest.approx(120.0 / 94)
    combined = combined_quality([50.0, np.nan, 70.0], [40, 40, 54])
    assert (combined.statistic, combined.ndof) == (120.0, 94)


def test_poor_needs_both_an_improbable_and_a_large_statistic():
    # a deviance/ndof of 12 at ndof 94 (the case that was reported as converged) is poor
    assert fit_quality(12 * 94, 94).poor
    # improbable but close to 1 (large data sets, small model imperfections): not poor
    ndof = 100_000
    statistic = stats.chi2.isf(1e-6, ndof)
    assert statistic / ndof < POOR_FIT_RATIO and not fit_quality(statistic, ndof).poor
    # large ratio but not improbable (few degrees of freedom): not poor
    assert stats.chi2.sf(4.0, 2) > POOR_FIT_P_VALUE and not fit_quality(4.0, 2).poor
    assert "not testable" in str(fit_quality(0.0, 0)) and not fit_quality(0.0, 0).poor
    with pytest.warns(FitQualityWarning, match="poor fit of the test line"):
        assert warn_if_poor(fit_quality(500.0, 50), "the test line")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert not warn_if_poor(fit_quality(50.0, 50), "a good line")


def test_right_model_is_good_and_wrong_model_is_poor():
    rng = np.random.default_rng(200)
    ph = fe55_pulse_heights(rng, 40_000, kbeta_fraction=0.12)
    right = fit_fe55(ph, bins=100, range=(2900, 8800))
    assert not right.quality.poor and right.quality.p_value > POOR_FIT_P_VALUE
    # one Gaussian for the K-alpha/K-beta pair: the K-beta shoulder is not described (Poisson deviance,
    # Baker & Cousins 1984)
    wrong = fit_line(ph, bins=100, range=(2900, 8800))
    assert wrong.success and wrong.quality.poor
    text = repr(wrong)
    assert "POOR" in text and "converged" in text  # the minimiser converged, the fit is still poor


def test_modulation_curve_quality():
    rng = np.random.default_rng(201)
    good = modulation_curve(modulated_angles(rng, 50_000, 0.3, 0.2))
    assert not good.quality.poor
    # a 60-degree pattern on top of cos 2phi (as a hexagonal grid makes) is not A + B cos^2
    phi = modulated_angles(rng, 50_000, 0.3, 0.2)
    grid = np.round(phi / (np.pi / 3)) * (np.pi / 3)
    mixed = np.where(rng.random(phi.size) < 0.2, grid, phi)
    assert modulation_curve(mixed).quality.poor
