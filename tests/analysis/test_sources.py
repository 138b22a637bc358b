"""Polarization of Bragg-reflected calibration beams (docs/methods.md section 8)."""

import numpy as np
import pytest

from trackfit.analysis.sources import bragg_angle_rad, bragg_energy_kev, bragg_mosaic_polarization


def test_mosaic_polarization_check_value():
    # docs/methods.md section 9 [derived; Silver et al. 1990]: P_mosaic(43.26 deg) = 0.9927 (tol 1e-4)
    assert bragg_mosaic_polarization(np.deg2rad(43.26)) == pytest.approx(0.9927, abs=1e-4)
    # exactly 45 deg: fully polarized; grazing: unpolarized (Thomson factor cos^2 2theta)
    assert bragg_mosaic_polarization(np.pi / 4) == pytest.approx(1.0)
    assert bragg_mosaic_polarization(0.0) == pytest.approx(0.0)


def test_bragg_energy_and_angle_are_inverse():
    # E45 = n 12.398 / (2 d 0.7071) keV (docs/methods.md section 8)
    assert bragg_energy_kev(3.0) == pytest.approx(12.398 / (2 * 3.0 * 0.70711), rel=1e-4)
    assert bragg_energy_kev(3.0, order=2) == pytest.approx(2 * bragg_energy_kev(3.0))
    theta = bragg_angle_rad(3.0, 2.5)
    assert bragg_energy_kev(2.5, theta) == pytest.approx(3.0)
    assert np.isnan(bragg_angle_rad(1.0, 2.0))
    with pytest.raises(ValueError, match="d_angstrom"):
        bragg_energy_kev(-1.0)
