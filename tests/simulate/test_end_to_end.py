"""Simulate -> reconstruct: modulation of reconstructed emission angles (the detector's modulation factor).

The sanity band is docs/methods.md §9: modulation factor of a He/DME 20/80, 1 atm, 1 cm cell with moment analysis
≈0.25 (2.7 keV), ≈0.32 (3.7 keV), ≈0.47 (5.9 keV), ±0.1 — from memory, a sanity band only.
"""

import dataclasses

import numpy as np
import pytest

from trackfit import ReconConfig, reconstruct
from trackfit.simulate import load_preset, run

SANITY_BAND = {2.7: 0.25, 3.7: 0.32, 5.9: 0.47}          # docs/methods.md §9 [memory — sanity band only], ±0.1


def _spot(config):
    return dataclasses.replace(config, source=dataclasses.replace(config.source, beam="gaussian", beam_sigma_mm=0.5))


def _reconstructed_angles(config, n, seed):
    result = run(config, n, rng=seed)
    table = reconstruct(result.batch, ReconConfig())
    good = np.asarray(table["status"]) == 0
    assert good.mean() > 0.9
    return np.asarray(table["emission_rad"], dtype=np.float64)[good]


def _modulation(phi):
    """Modulation amplitude and phase from Stokes sums (Kislat et al. 2015): m = 2 sqrt(<cos 2φ>² + <sin 2φ>²)."""
    q, u = np.mean(np.cos(2 * phi)), np.mean(np.sin(2 * phi))
    return 2 * np.hypot(q, u), 0.5 * np.arctan2(u, q), q, u


def test_polarized_5p9kev_modulation_factor_in_sanity_band():
    config = _spot(load_preset("hedme-1atm-1cm").with_monochromatic(energy_kev=5.9, polarization_degree=1.0,
                                                                     polarization_angle_deg=30.0))
    phi = _reconstructed_angles(config, 4000, seed=41)
    m, angle, _, _ = _modulation(phi)
    assert m == pytest.approx(SANITY_BAND[5.9], abs=0.1)
    # the phase is the polarization angle (3 sigma of σ_φ0 ≈ σ_m/(2m), docs/methods.md §3)
    assert np.rad2deg(angle) == pytest.approx(30.0, abs=np.rad2deg(3 * np.sqrt(2 / len(phi)) / (2 * m)))


def test_unpolarized_run_shows_no_modulation():
    # docs/methods.md §9 [derived]: |Q|/I, |U|/I consistent with 0 within 3·sqrt(1/(2N)) on a perfect hex grid
    config = _spot(load_preset("hedme-1atm-1cm").with_monochromatic(energy_kev=5.9, polarization_degree=0.0))
    phi = _reconstructed_angles(config, 4000, seed=42)
    _, _, q, u = _modulation(phi)
    bound = 3 * np.sqrt(1 / (2 * len(phi)))
    assert abs(q) < bound and abs(u) < bound


@pytest.mark.slow
@pytest.mark.parametrize("energy_kev", [2.7, 3.7, 5.9])
def test_modulation_factor_energy_dependence(energy_kev):
    config = _spot(load_preset("hedme-1atm-1cm").with_monochromatic(energy_kev=energy_kev, polarization_degree=1.0))
    phi = _reconstructed_angles(config, 30_000, seed=43)
    m, _, _, _ = _modulation(phi)
    assert m == pytest.approx(SANITY_BAND[energy_kev], abs=0.1)
