"""Absorption in the gas gap and the window against Beer-Lambert with xraydb coefficients (docs/methods.md §7, §9)."""

import sys

import numpy as np
import pytest
import xraydb

from trackfit.simulate import GasConfig, window_transmission
from trackfit.simulate.gas import LOSCHMIDT_CM3, GasMixture, element_photo_cm2_g, require_xraydb

DME_08 = GasConfig(molecules=("C2H6O",), fractions=(1.0,), pressure_atm=0.8, temperature_k=293.15, gap_cm=1.0)


def test_ideal_gas_density_of_dme():
    # docs/methods.md §7 [derived]: n = 2.504e19 cm^-3 at 20 °C, 1 atm; rho(DME) = 1.915e-3 g/cm³
    assert LOSCHMIDT_CM3 == pytest.approx(2.504e19, rel=1e-3)
    dme = GasMixture.from_config(GasConfig(molecules=("C2H6O",), fractions=(1.0,), pressure_atm=1.0))
    assert dme.density_g_cm3 == pytest.approx(1.915e-3, rel=1e-3)


@pytest.mark.parametrize("energy_kev, expected", [(2.7, 0.2249), (5.9, 0.0238)])
def test_dme_absorption_check_values(energy_kev, expected):
    # docs/methods.md §9 [xraydb]: absorption in 1 cm DME, 0.8 atm, 20 °C; tolerance 3 % relative
    mixture = GasMixture.from_config(DME_08)
    assert mixture.absorption_probability(energy_kev) == pytest.approx(expected, rel=0.03)


@pytest.mark.parametrize("energy_kev", [2.0, 2.7, 3.7, 5.9, 8.0, 15.0, 30.0])
def test_gap_absorption_is_beer_lambert_with_xraydb(energy_kev):
    # reference: 1 - exp(-sum_j rho_j mu_j L) with xraydb.mu_elam(kind='photo') called directly
    config = GasConfig(molecules=("Ar", "C2H6O"), fractions=(0.5, 0.5), pressure_atm=3.0, gap_cm=3.0)
    mixture = GasMixture.from_config(config)
    n = 3.0 * 101325.0 / (1.380649e-23 * 293.15) * 1e-6
    atoms = {"Ar": 0.5 * n, "C": 0.5 * 2 * n, "H": 0.5 * 6 * n, "O": 0.5 * n}
    mu = sum(count * xraydb.atomic_mass(s) / 6.02214076e23 * xraydb.mu_elam(s, energy_kev * 1000.0, kind="photo")
             for s, count in atoms.items())
    expected = 1.0 - np.exp(-mu * 3.0)
    assert mixture.absorption_probability(energy_kev) == pytest.approx(expected, rel=2e-3)


def test_tabulated_cross_sections_match_xraydb_across_edges():
    energies = np.array([0.25, 0.2840, 0.2844, 0.5429, 0.5433, 3.2057, 3.2061, 5.9, 25.0])  # >= 0.15 eV off edges
    for symbol in ("C", "O", "Ar"):
        expected = xraydb.mu_elam(symbol, energies * 1000.0, kind="photo")
        np.testing.assert_allclose(element_photo_cm2_g(symbol, energies), expected, rtol=5e-3)


def test_hedme_absorbs_like_dme_at_08_atm():
    # docs/methods.md §7 [derived]: He/DME 20/80 at 1 atm absorbs like pure DME at 0.8 atm (He adds little)
    hedme = GasMixture.from_config(GasConfig(molecules=("He", "C2H6O"), fractions=(0.2, 0.8)))
    dme = GasMixture.from_config(DME_08)
    for energy in (2.7, 3.7, 5.9):
        assert hedme.absorption_probability(energy) == pytest.approx(dme.absorption_probability(energy), rel=0.01)


@pytest.mark.parametrize("energy_kev, expected, tolerance", [(2.7, 0.761, 0.02), (5.9, 0.976, 0.02)])
def test_beryllium_window_check_values(energy_kev, expected, tolerance):
    # docs/methods.md §7, §9 [xraydb]: 50 µm Be transmits 0.761 at 2.7 keV, 0.976 at 5.9 keV
    assert window_transmission("Be", 1.848, 50.0, energy_kev) == pytest.approx(expected, rel=tolerance)


def test_window_is_beer_lambert_with_xraydb_total_attenuation():
    energies = np.array([2.0, 4.0, 8.0, 20.0])
    expected = np.exp(-xraydb.material_mu("Be", energies * 1000.0, density=1.848, kind="total") * 100e-4)
    np.testing.assert_allclose(window_transmission("Be", 1.848, 100.0, energies), expected, rtol=1e-3)
    assert np.all(window_transmission("none", 1.0, 50.0, energies) == 1.0)


def test_k_shell_fraction_just_above_edges():
    # docs/methods.md §7 [xraydb]: K-shell fraction just above the edge = 1 - 1/jump (C 0.947, O 0.935)
    dme = GasMixture.from_config(DME_08)
    for symbol, expected in (("C", 0.947), ("O", 0.935)):
        j = dme.elements.index(symbol)
        codes, _, probs = dme.shell_probabilities(j, 1.0)
        assert probs[list(codes).index(0)] == pytest.approx(expected, abs=1e-3)
        assert probs.sum() == pytest.approx(1.0)


def test_dme_absorptions_are_on_carbon_or_oxygen():
    # docs/methods.md §7 [xraydb]: in DME >= 99.9 % of absorptions are on C or O
    dme = GasMixture.from_config(DME_08)
    partial = dme.element_absorption_per_cm(np.array([2.7, 5.9]))
    share = partial[[dme.elements.index("C"), dme.elements.index("O")]].sum(axis=0) / partial.sum(axis=0)
    assert np.all(share >= 0.999)


def test_k_edges_from_xraydb():
    # docs/methods.md §9 [xraydb]: C / O K edges 284.2 / 543.1 eV
    dme = GasMixture.from_config(DME_08)
    for symbol, edge_kev in (("C", 0.2842), ("O", 0.5431)):
        codes, edges, _ = dme.shell_probabilities(dme.elements.index(symbol), 1.0)
        assert edges[list(codes).index(0)] == pytest.approx(edge_kev, abs=1e-4)


def test_bad_formula_is_reported():
    with pytest.raises(ValueError, match="'gas.molecules' entry 'Xx9'"):
        GasMixture.from_config(GasConfig(molecules=("Xx9",), fractions=(1.0,)))


def test_missing_xraydb_says_how_to_install(monkeypatch):
    monkeypatch.setitem(sys.modules, "xraydb", None)
    with pytest.raises(ImportError, match=r'pip install "trackfit\[xray\]"'):
        require_xraydb()
