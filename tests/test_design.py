"""Design sweeps: performance of simulated designs versus one design value."""

import dataclasses

import numpy as np
import pytest

pytest.importorskip("xraydb")

from trackfit.design import simulate_performance, sweep_design, with_design_value  # noqa: E402
from trackfit.simulate import ConfigError, load_preset  # noqa: E402


def test_with_design_value_and_its_errors():
    config = load_preset("hedme-1atm-1cm")
    assert with_design_value(config, "gas.pressure_atm", 2.0).gas.pressure_atm == 2.0
    with pytest.raises(KeyError, match="valid names of \\[gas\\]: molecules"):
        with_design_value(config, "gas.presure_atm", 2.0)
    with pytest.raises(KeyError, match="table among source"):
        with_design_value(config, "detector.gap", 2.0)
    with pytest.raises(ConfigError, match="gas.gap_cm"):
        with_design_value(config, "gas.gap_cm", -1.0)


def test_sweep_of_the_gap_gives_beer_lambert_efficiency():
    import xraydb

    config = load_preset("hedme-1atm-1cm")
    sweep = sweep_design(config, "gas.gap_cm", [0.5, 2.0], energies_kev=[4.0], n_events=300, seed=2)
    rows = sweep.rows()
    assert [r["gas.gap_cm"] for r in rows] == [0.5, 2.0]
    # efficiency = window transmission × (1 − exp(−μ_photo L)) with xraydb (Be total; He/DME photo, ideal gas)
    be = np.exp(-xraydb.material_mu("Be", 4000.0, density=1.848, kind="total") * 50e-4)
    n = 101325.0 / (1.380649e-23 * 293.15) * 1e-6 / 6.02214076e23                  # mol/cm³
    mu = n * (0.2 * 4.0026 * xraydb.mu_elam("He", 4000.0, kind="photo")
              + 0.8 * (2 * 12.011 * xraydb.mu_elam("C", 4000.0, kind="photo")
                       + 6 * 1.008 * xraydb.mu_elam("H", 4000.0, kind="photo")
                       + 15.999 * xraydb.mu_elam("O", 4000.0, kind="photo")))
    for row in rows:
        assert row["detection_efficiency"] == pytest.approx(be * -np.expm1(-mu * row["gas.gap_cm"]), rel=0.01)
        assert row["n_events"] == 300
        assert row["modulation_factor_err"] == pytest.approx(np.sqrt(2 / (row["kept_fraction"] * 300)), rel=1e-6)
        assert 0 < row["modulation_factor"] < 1 and 0.05 < row["fwhm_frac"] < 0.5
    text = sweep.to_markdown()
    assert text.startswith("| gas.gap_cm | E (keV) |") and "0.5" in text and "2 |" in text


def test_performance_of_a_polarized_beam_is_modulated():
    config = load_preset("hedme-1atm-1cm")
    config = dataclasses.replace(config, readout=dataclasses.replace(config.readout, n_columns=120, n_rows=120))
    perf = simulate_performance(config, [6.0], n_events=1500, seed=3)
    point = perf.points[0]
    # a 100 %-polarized 6 keV beam is clearly modulated (μ ≈ 0.5 in docs/simulator.md), 7 sigma from zero
    assert point.modulation_factor > 7 * point.modulation_factor_err
    assert "DesignPerformance" in repr(perf) and "| 6 |" in perf.to_markdown()
