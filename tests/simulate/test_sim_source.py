"""Photon source: spectra weighted by window transmission and gap absorption (Beer-Lambert, xraydb), beams, times."""

import dataclasses

import numpy as np
import pytest
import xraydb
from scipy import integrate, stats

from trackfit.simulate import GasMixture, SimConfig, load_preset
from trackfit.simulate.photons import PhotonSampler


def _with_source(**changes):
    config = load_preset("dme-0.8atm-1cm")
    return dataclasses.replace(config, source=dataclasses.replace(config.source, **changes))


def _detected_cdf(config, density):
    """CDF of converted-photon energies: emitted density x Be transmission x DME absorption, from xraydb directly."""
    grid = np.linspace(config.source.e_min_kev, config.source.e_max_kev, 4001)
    window = np.exp(-xraydb.material_mu("Be", grid * 1000, density=1.848, kind="total") * 50e-4)
    rho = 0.8 * 101325 / (1.380649e-23 * 293.15) * 1e-6 / 6.02214076e23    # mol/cm³ of DME molecules
    mu = rho * sum(count * xraydb.atomic_mass(s) * xraydb.mu_elam(s, grid * 1000, kind="photo")
                   for s, count in (("C", 2), ("H", 6), ("O", 1)))
    weight = density(grid) * window * (1 - np.exp(-mu * 1.0))
    cdf = integrate.cumulative_trapezoid(weight, grid, initial=0.0)
    return grid, cdf / cdf[-1], np.trapezoid(weight, grid) / np.trapezoid(density(grid), grid)


@pytest.mark.parametrize("spectrum, density", [
    ("flat", lambda e: np.ones_like(e)),
    ("powerlaw", lambda e: e ** -2.0),
])
def test_continuum_spectra_are_weighted_by_the_efficiency(spectrum, density):
    config = _with_source(spectrum=spectrum, e_min_kev=2.0, e_max_kev=8.0, photon_index=2.0)
    sampler = PhotonSampler(config)
    energies = sampler.sample(40_000, np.random.default_rng(1)).energy_kev
    grid, cdf, efficiency = _detected_cdf(config, density)
    assert stats.kstest(energies, lambda x: np.interp(x, grid, cdf)).pvalue > 0.001
    assert sampler.efficiency == pytest.approx(efficiency, rel=5e-3)


def test_table_spectrum_equals_the_same_flat_spectrum():
    flat = _with_source(spectrum="flat", e_min_kev=2.0, e_max_kev=8.0)
    table = _with_source(spectrum="table", table_energies_kev=(2.0, 5.0, 8.0), table_weights=(3.0, 3.0, 3.0))
    a = PhotonSampler(flat).sample(1000, np.random.default_rng(2)).energy_kev
    b = PhotonSampler(table).sample(1000, np.random.default_rng(2)).energy_kev
    np.testing.assert_allclose(a, b, rtol=1e-12)


def test_line_intensities_are_weighted_by_the_efficiency():
    config = _with_source(spectrum="lines", line_energies_kev=(3.0, 6.0), line_weights=(1.0, 1.0))
    energies = PhotonSampler(config).sample(100_000, np.random.default_rng(3)).energy_kev
    mixture = GasMixture.from_config(config.gas)
    eff = [np.exp(-xraydb.material_mu("Be", e * 1000, density=1.848, kind="total") * 50e-4)
           * mixture.absorption_probability(e) for e in (3.0, 6.0)]
    expected = eff[0] / (eff[0] + eff[1])
    assert np.mean(energies == 3.0) == pytest.approx(expected, abs=4 * np.sqrt(expected * (1 - expected) / 1e5))


def test_beams_and_arrival_times():
    rng = np.random.default_rng(4)
    gauss = PhotonSampler(_with_source(beam="gaussian", beam_centre_mm=(1.0, -2.0), beam_sigma_mm=0.3)).sample(
        50_000, rng)
    assert np.mean(gauss.x_mm) == pytest.approx(1.0, abs=0.01) and np.std(gauss.y_mm) == pytest.approx(0.3, rel=0.02)
    flat = PhotonSampler(_with_source(beam="flat", field_size_mm=(4.0, 2.0))).sample(50_000, rng)
    assert flat.x_mm.min() >= -2.0 and flat.x_mm.max() <= 2.0 and np.ptp(flat.y_mm) == pytest.approx(2.0, abs=0.01)
    pencil = PhotonSampler(SimConfig()).sample(10, rng)
    assert np.all(pencil.x_mm == 0.0) and np.all(pencil.y_mm == 0.0)
    # converted photons arrive as a Poisson process of rate rate_hz x efficiency: exponential gaps (KS)
    sampler = PhotonSampler(_with_source(rate_hz=5000.0))
    gaps = np.diff(sampler.sample(20_000, rng).time_s)
    assert stats.kstest(gaps, stats.expon(scale=1 / sampler.converted_rate_hz).cdf).pvalue > 0.001
