"""Presets against published detector performance (docs/simulator.md, Validation).

Published values and their sources are listed in docs/simulator.md; where the source could not be checked the
value is marked "from memory" there and here. Statistical checks allow 3 standard deviations of the simulation
beyond the edge of the published band.
"""

import dataclasses

import numpy as np
import pytest

from trackfit import ReconConfig, reconstruct
from trackfit.analysis.spectrum import fit_fe55
from trackfit.design import simulate_performance
from trackfit.simulate import load_preset, run

#: the published analysis the published modulation factors come from (docs/methods.md §2)
TWO_STAGE = ReconConfig(emission_estimator="two-stage")

#: modulation factor of He/DME 20/80, 1 atm, 1 cm cells with moment analysis [from memory: Muleri et al. 2010,
#: NIM A 620, 285; Baldini et al. 2021, Astropart. Phys. 133, 102628]
HEDME_MU_BANDS = {2.7: (0.25, 0.30), 3.7: (0.30, 0.40), 5.9: (0.45, 0.55)}
#: Fe-55 (5.9 keV) FWHM of gas pixel detectors with a gas electron multiplier, flat field: ≈16-20 %
#: [from memory: Bellazzini et al. 2007, NIM A 579, 853; Li et al. 2015, arXiv:1509.05595 (≈18 % in DME)];
#: the acceptance band of the preset is 15-22 % (docs/simulator.md)
FE55_FWHM_BAND = (0.15, 0.22)


def _fe55_fwhm(config, n_events, seed):
    result = run(config, n_events, rng=seed)
    table = reconstruct(result.batch, ReconConfig())
    good = np.asarray(table["status"]) == 0
    ph = np.asarray(table["pulse_height"], dtype=float)[good]
    energy = np.asarray(result.truth["photon_energy_kev"])[good]
    median = np.median(ph)
    fit = fit_fe55(ph, bins=80, range=(0.6 * median, 1.4 * median),
                   kbeta_fraction=float((energy > 6.2).sum() / (energy < 6.2).sum()))
    return fit.fwhm_frac, fit.fwhm_frac_err


def test_hedme_fe55_flat_field_resolution_in_published_band():
    fwhm, err = _fe55_fwhm(load_preset("hedme-1atm-1cm"), 6000, seed=51)
    assert FE55_FWHM_BAND[0] - 3 * err <= fwhm <= FE55_FWHM_BAND[1] + 3 * err


def test_dme_fe55_flat_field_resolution_near_published_value():
    # ≈18 % FWHM at 6 keV for a pure-DME 0.8 atm detector [Li et al. 2015, arXiv:1509.05595]; band ±3 points
    fwhm, err = _fe55_fwhm(load_preset("dme-0.8atm-1cm"), 6000, seed=56)
    assert 0.15 - 3 * err <= fwhm <= 0.21 + 3 * err


def test_fano_and_polya_alone_are_below_the_published_resolution():
    # budget FWHM = 2.355·sqrt((F + 1/(1+θ))·W/E) for a spot without gain map [docs/methods.md §6, common practice]
    config = load_preset("hedme-1atm-1cm")
    spot = dataclasses.replace(config, multiplier=dataclasses.replace(config.multiplier, gain_map_rms=0.0))
    spot = dataclasses.replace(spot, source=dataclasses.replace(spot.source, beam="gaussian", beam_sigma_mm=0.5))
    fwhm, err = _fe55_fwhm(spot, 6000, seed=52)
    f, theta, w = config.gas.fano_factor, config.multiplier.polya_theta, config.gas.w_value_ev
    budget = 2.3548 * np.sqrt((f + 1 / (1 + theta)) * w / 5895.0)
    assert fwhm == pytest.approx(budget, abs=3 * err + 0.01)
    assert fwhm < FE55_FWHM_BAND[0]          # the gain map is what brings the preset into the published band


@pytest.mark.slow
def test_hedme_modulation_factor_in_published_bands():
    # the published values are two-stage moment analyses: compare like with like
    perf = simulate_performance(load_preset("hedme-1atm-1cm"), sorted(HEDME_MU_BANDS), n_events=40_000, seed=53,
                                recon_config=TWO_STAGE)
    for point in perf.points:
        low, high = HEDME_MU_BANDS[point.energy_kev]
        tolerance = 3 * point.modulation_factor_err
        assert low - tolerance <= point.modulation_factor <= high + tolerance, point


@pytest.mark.slow
def test_thermal_diffusion_raises_and_old_value_lowers_the_low_energy_modulation():
    """The sensitivity the docs show: 2.7 keV μ at the thermal limit is above, at 90 µm/√cm below the band."""
    config = load_preset("hedme-1atm-1cm")
    thermal = dataclasses.replace(config, drift=dataclasses.replace(config.drift, characteristic_energy_ratio=1.0))
    wide = dataclasses.replace(config, drift=dataclasses.replace(config.drift, diffusion_um_per_sqrt_cm=90.0))
    mu_thermal = simulate_performance(thermal, [2.7], n_events=30_000, seed=54,
                                      recon_config=TWO_STAGE).points[0].modulation_factor
    mu_wide = simulate_performance(wide, [2.7], n_events=30_000, seed=54,
                                   recon_config=TWO_STAGE).points[0].modulation_factor
    assert mu_wide < HEDME_MU_BANDS[2.7][0] - 0.03 and mu_thermal > HEDME_MU_BANDS[2.7][0] + 0.03


@pytest.mark.slow
def test_argon_design_escape_fraction_high_statistics():
    """Escape of Ar K photons in the argon design (its own source spectrum): 0.15-0.30, and the slab formula
    ½E₂(μz) + ½E₂(μ(L−z)) averaged over conversions (scipy.special.expn) within 4 sigma + chip-edge allowance."""
    from scipy.special import expn

    from trackfit.simulate.gas import GasMixture

    config = load_preset("ardme-3atm-3cm")
    config = dataclasses.replace(config, source=dataclasses.replace(config.source, field_size_mm=(2.0, 2.0)))
    t = run(config, 40_000, rng=55).truth
    emitted = (t["absorber_atomic_number"] == 18) & (t["fluorescence_energy_kev"] > 0)
    escaped = np.isin(t["fluorescence_fate"][emitted], (2, 3)).mean()
    mu = GasMixture.from_config(config.gas).absorption_per_cm(t["fluorescence_energy_kev"][emitted].astype(float))
    z = t["conversion_z_mm"][emitted].astype(float) / 10.0
    slab = np.mean(0.5 * expn(2, mu * z) + 0.5 * expn(2, mu * (3.0 - z)))
    assert 0.15 <= escaped <= 0.30
    assert escaped == pytest.approx(slab, abs=4 * np.sqrt(slab * (1 - slab) / emitted.sum()) + 0.005)


def test_cross_section_tables_differ_by_a_few_percent():
    """docs/simulator.md states the Elam-Chantler spread of the gap absorption: 3-7 % for DME gases at 2-8 keV,
    Chantler lower (both tables from xraydb)."""
    from trackfit.simulate.gas import GasMixture

    gas = load_preset("hedme-1atm-1cm").gas
    energies = np.array([2.0, 2.7, 3.7, 5.9, 8.0])
    elam = GasMixture.from_config(gas).absorption_probability(energies)
    chantler = GasMixture.from_config(dataclasses.replace(gas, cross_sections="chantler")).absorption_probability(
        energies)
    spread = 1 - chantler / elam
    assert np.all((spread > 0.03) & (spread < 0.07))


@pytest.mark.slow
def test_docs_table_script_runs(capsys):
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parents[2] / "docs" / "simulator_tables.py"
    spec = importlib.util.spec_from_file_location("simulator_tables", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    module.main(["--events", "300"])
    out = capsys.readouterr().out
    for heading in ("## 1. Validation", "## 2. Fe-55", "## 3. Argon", "## 4. Sensitivity", "## 5. Gap absorption"):
        assert heading in out
