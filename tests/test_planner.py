"""The observation planner: counts against calculus, MDP99 against the published formula, exposure scaling, data volume,
interstellar absorption, tables and the Observation config."""

import math

import numpy as np
import pytest

from trackfit.planner import Observation, plan_observation, read_two_column_csv
from trackfit.response import PER_ENERGY_COLUMNS, DetectorResponse
from trackfit.simulate import load_preset

#: MDP99 constant sqrt(-2 ln 0.01) sqrt(2) [Weisskopf, Elsner & O'Dell 2010; docs/methods.md §4]
MDP_CONSTANT = math.sqrt(-2.0 * math.log(0.01)) * math.sqrt(2.0)


def flat_response(*, efficiency=0.25, mu=0.3, bytes_per_event=400.0, trigger=0.8, selected=0.5, lo=1.0, hi=20.0,
                  name="flat"):
    """A made-up response with constant values, so every planner number has a closed form."""
    energies = np.geomspace(lo, hi, 6)
    per_energy = {name: np.full(energies.shape, np.nan) for name in PER_ENERGY_COLUMNS}
    window_gas = efficiency / (trigger * selected)
    per_energy.update(energy_kev=energies, window_transmission=np.ones_like(energies),
                      gas_absorption=np.full(energies.shape, window_gas), trigger_fraction=np.full(energies.shape,
                                                                                                     trigger),
                      selected_fraction=np.full(energies.shape, selected),
                      detection_efficiency=np.full(energies.shape, efficiency),
                      modulation_factor=np.full(energies.shape, mu),
                      modulation_factor_err=np.full(energies.shape, 0.01),
                      bytes_per_event=np.full(energies.shape, bytes_per_event))
    fine = np.geomspace(lo, hi, 50)
    absorption = {"energy_kev": fine, "window_transmission": np.ones_like(fine),
                  "gas_absorption": np.full(fine.shape, window_gas)}
    return DetectorResponse(name=name, design=load_preset("hedme-1atm-1cm"), per_energy=per_energy,
                            absorption=absorption, chip_area_cm2=2.0)


def test_counts_follow_the_power_law_integral():
    response = flat_response()
    obs = Observation(flux_at_1kev=2.0, photon_index=1.7, area_cm2=50.0, band_kev=(2.0, 10.0), exposure_s=1e4)
    plan = plan_observation([response], obs)["flat"]
    # ∫ F0 E^-Γ dE from 2 to 10 keV = F0 (10^(1-Γ) - 2^(1-Γ)) / (1 - Γ)  (calculus)
    integral = 2.0 * (10.0 ** -0.7 - 2.0 ** -0.7) / -0.7
    assert plan.source_counts == pytest.approx(1e4 * 50.0 * 0.25 * integral, rel=1e-5)
    assert plan.source_rate_hz == pytest.approx(plan.source_counts / 1e4, rel=1e-12)
    assert plan.effective_modulation_factor == pytest.approx(0.3, rel=1e-12)  # a constant μ is its own mean
    assert plan.background_counts == 0.0


def test_mdp_is_the_published_formula_for_the_reported_counts():
    response = flat_response(mu=0.27)
    obs = Observation(flux_at_1kev=0.05, area_cm2=300.0, band_kev=(2.0, 8.0), exposure_s=2e5,
                      background_per_cm2_s_kev=5e-3, background_region_cm2=0.5, target_mdp=0.03)
    data = plan_observation([response], obs).to_dict()["designs"]["flat"]
    S, B, mu = data["source_counts"], data["background_counts"], data["effective_modulation_factor"]
    # MDP99 = 4.29 / (μ R_S) sqrt((R_S + R_B) / T) = 4.29 sqrt(S + B) / (μ S)   [Weisskopf et al. 2010]
    assert data["mdp99"] == pytest.approx(MDP_CONSTANT * math.sqrt(S + B) / (mu * S), rel=1e-9)
    assert B == pytest.approx(5e-3 * 0.5 * 6.0 * 2e5, rel=1e-12)  # rate x region x band width x exposure
    # the exposure for the target: the same formula solved for T, with S and B growing as T
    t = data["exposure_for_target_s"]
    s_t, b_t = S * t / 2e5, B * t / 2e5
    assert MDP_CONSTANT * math.sqrt(s_t + b_t) / (mu * s_t) == pytest.approx(0.03, rel=1e-9)


def test_doubling_the_exposure_lowers_the_mdp_by_sqrt2_without_background():
    response = flat_response()
    one = plan_observation([response], Observation(flux_at_1kev=0.3, area_cm2=10.0, band_kev=(2.0, 8.0),
                                                   exposure_s=1e5))["flat"]
    two = plan_observation([response], Observation(flux_at_1kev=0.3, area_cm2=10.0, band_kev=(2.0, 8.0),
                                                   exposure_s=2e5))["flat"]
    # MDP99 ∝ 1/sqrt(N) without background [Weisskopf et al. 2010]
    assert one.mdp99 / two.mdp99 == pytest.approx(math.sqrt(2.0), rel=1e-9)
    assert one.mdp99_at(2e5) == pytest.approx(two.mdp99, rel=1e-12)


def test_mdp_of_a_simulated_response_is_the_formula(tmp_path):
    pytest.importorskip("xraydb")
    from trackfit.response_builder import ResponseSettings, build_response

    response = build_response(load_preset("hedme-1atm-1cm"), name="hedme", workers=1, cache_dir=tmp_path,
                              settings=ResponseSettings(energies_kev=(2.0, 3.0, 5.0, 8.0), events_per_energy=400),
                              progress=False)
    obs = Observation(flux_at_1kev=1.0, photon_index=2.0, area_cm2=100.0, band_kev=(2.0, 8.0), exposure_s=5e4,
                      background_per_cm2_s_kev=1e-3)
    data = plan_observation([response], obs).to_dict()["designs"]["hedme"]
    S, B, mu = data["source_counts"], data["background_counts"], data["effective_modulation_factor"]
    # Weisskopf et al. 2010 with the reported counts and μ
    assert data["mdp99"] == pytest.approx(MDP_CONSTANT * math.sqrt(S + B) / (mu * S), rel=1e-9)
    # μ_eff lies between the smallest and largest μ measured in the band; counts are a trapezoid sum of F A ε
    assert response["modulation_factor"].min() < mu < response["modulation_factor"].max()
    e = np.geomspace(2.0, 8.0, 20001)
    expected = 5e4 * np.sum(np.diff(e) * 0.5 * (e[1:] ** -2 * response.efficiency(e[1:])
                                                + e[:-1] ** -2 * response.efficiency(e[:-1]))) * 100.0
    assert S == pytest.approx(expected, rel=1e-4)
    for key in ("mdp99", "effective_modulation_factor", "source_counts", "background_counts", "bytes_per_day"):
        assert data[key] > 0


def test_error_of_the_effective_modulation_factor_is_the_spread_of_resampled_responses():
    rng = np.random.default_rng(5)
    base = flat_response(mu=0.3)
    grid_mu = np.array([0.05, 0.12, 0.25, 0.38, 0.5, 0.6])
    errors = np.array([0.03, 0.03, 0.02, 0.02, 0.02, 0.04])
    obs = Observation(flux_at_1kev=1.0, photon_index=2.0, area_cm2=10.0, band_kev=(2.0, 8.0), exposure_s=1e4)
    response = base.replace(per_energy={**base.per_energy, "modulation_factor": grid_mu,
                                        "modulation_factor_err": errors})
    plan = plan_observation([response], obs)["flat"]
    # Monte Carlo propagation (numpy): draw the grid's μ within their errors and re-plan
    draws = [plan_observation([base.replace(per_energy={**base.per_energy, "modulation_factor":
                                                        grid_mu + errors * rng.standard_normal(6)})], obs)
             ["flat"].effective_modulation_factor for _ in range(300)]
    assert plan.effective_modulation_factor_err == pytest.approx(np.std(draws), rel=0.12)
    assert np.mean(draws) == pytest.approx(plan.effective_modulation_factor, abs=3 * np.std(draws) / np.sqrt(300))


def test_data_volume_counts_every_triggered_event_over_the_response_range():
    response = flat_response(efficiency=0.2, trigger=0.8, selected=0.5, bytes_per_event=500.0, lo=1.0, hi=20.0)
    obs = Observation(flux_at_1kev=1.0, photon_index=2.0, area_cm2=10.0, band_kev=(2.0, 8.0), exposure_s=1e3,
                      background_per_cm2_s_kev=0.01, background_region_cm2=1.0, compressed_fraction=0.5)
    plan = plan_observation([response], obs)["flat"]
    # triggered (not only selected) events from 1 to 20 keV: ∫ E^-2 dE = 1 - 1/20; window x gas x trigger = 0.2/0.5
    source_events = 1.0 * 10.0 * (0.2 / 0.5) * (1.0 - 1.0 / 20.0)
    background_events = 0.01 * 1.0 * 19.0
    assert plan.events_per_s == pytest.approx(source_events + background_events, rel=1e-5)
    assert plan.bytes_per_s == pytest.approx(500.0 * plan.events_per_s, rel=1e-9)
    assert plan.bytes_per_day == pytest.approx(plan.bytes_per_s * 86400.0, rel=1e-12)
    assert plan.gb_per_day == pytest.approx(plan.bytes_per_day / 1e9, rel=1e-12)
    assert plan.bytes_per_day_compressed == pytest.approx(0.5 * plan.bytes_per_day, rel=1e-12)
    assert plan.data_range_kev == (1.0, 20.0)


def test_sub_bands_and_their_mdp():
    response = flat_response()
    obs = Observation(flux_at_1kev=1.0, area_cm2=10.0, band_kev=(2.0, 8.0), exposure_s=1e4,
                      band_edges_kev=(2.0, 4.0, 8.0))
    plan = plan_observation([response], obs)["flat"]
    assert [(b.low_kev, b.high_kev) for b in plan.bands] == [(2.0, 4.0), (4.0, 8.0)]
    assert sum(b.source_counts for b in plan.bands) == pytest.approx(plan.source_counts, rel=1e-4)
    for band in plan.bands:  # without background, MDP99 = 4.29 / (μ sqrt(N)) per band [Weisskopf et al. 2010]
        assert band.mdp99 == pytest.approx(MDP_CONSTANT / (0.3 * math.sqrt(band.source_counts)), rel=1e-9)
    default = plan_observation([response], Observation(flux_at_1kev=1.0, area_cm2=10.0, band_kev=(2.0, 8.0),
                                                       exposure_s=1e4))["flat"]
    edges = [b.low_kev for b in default.bands] + [default.bands[-1].high_kev]
    assert edges == pytest.approx(np.geomspace(2.0, 8.0, 5).tolist())


def test_tabulated_spectrum_and_area_agree_with_the_power_law(tmp_path):
    response = flat_response()
    energies = np.geomspace(1.5, 12.0, 400)
    spectrum = tmp_path / "spectrum.csv"
    spectrum.write_text("# invented source\nenergy_kev,photons_per_cm2_s_kev\n" +
                        "".join(f"{float(e)!r},{0.7 * float(e) ** -2.2!r}\n" for e in energies))
    area = tmp_path / "area.csv"
    area.write_text("energy_kev area_cm2\n1.0 80\n20.0 80\n")
    e, f = read_two_column_csv(spectrum)
    a_e, a = read_two_column_csv(area)
    table = Observation(spectrum_energies_kev=tuple(e), spectrum_flux=tuple(f), area_energies_kev=tuple(a_e),
                        area_values_cm2=tuple(a), band_kev=(2.0, 8.0), exposure_s=1e4)
    law = Observation(flux_at_1kev=0.7, photon_index=2.2, area_cm2=80.0, band_kev=(2.0, 8.0), exposure_s=1e4)
    counts_table = plan_observation([response], table)["flat"].source_counts
    assert counts_table == pytest.approx(plan_observation([response], law)["flat"].source_counts, rel=1e-4)
    with pytest.raises(ValueError, match=r"not inside the 1.5-12 keV of the spectrum table"):
        plan_observation([response], Observation(spectrum_energies_kev=tuple(e), spectrum_flux=tuple(f),
                                                 area_cm2=80.0, band_kev=(1.2, 8.0), exposure_s=1e4))


def test_csv_errors_name_the_file_and_line(tmp_path):
    bad = tmp_path / "area.csv"
    bad.write_text("energy_kev,area\n2.0,10\n3.0\n")
    with pytest.raises(ValueError, match=r"area.csv', line 3: expected two columns"):
        read_two_column_csv(bad, what="area")
    bad.write_text("2.0,10\n1.0,10\n")
    with pytest.raises(ValueError, match=r"line 2: energies must increase"):
        read_two_column_csv(bad)
    bad.write_text("2.0,10\n3.0,-1\n")
    with pytest.raises(ValueError, match=r"line 2: expected an energy > 0 and a value >= 0"):
        read_two_column_csv(bad)
    bad.write_text("2.0,10\nthree,11\n")
    with pytest.raises(ValueError, match=r"line 2: expected two numbers"):
        read_two_column_csv(bad)


def test_a_band_outside_the_response_is_refused():
    response = flat_response(lo=2.0, hi=8.0, name="narrow")
    obs = Observation(flux_at_1kev=1.0, area_cm2=10.0, band_kev=(1.0, 8.0), exposure_s=1e4)
    with pytest.raises(ValueError, match=r"band 1-8 keV is not inside the 2-8 keV that response 'narrow' covers"):
        plan_observation([response], obs)


def test_interstellar_absorption():
    pytest.importorskip("xraydb")
    from trackfit.interstellar import absorbed_fraction_transmitted, cross_section_per_hydrogen_cm2

    # per H atom at 1 keV: about 2.4e-22 cm² for solar abundances [memory: Morrison & McCammon 1983]
    assert cross_section_per_hydrogen_cm2(1.0) == pytest.approx(2.4e-22, rel=0.2)
    # between edges the cross section falls roughly as E^-8/3 (photoabsorption, [memory]): E^3 σ varies slowly
    ratio = cross_section_per_hydrogen_cm2(2.0) / cross_section_per_hydrogen_cm2(1.5)
    assert (1.5 / 2.0) ** 3.2 < ratio < (1.5 / 2.0) ** 2.3
    sigma = cross_section_per_hydrogen_cm2(1.0)
    assert absorbed_fraction_transmitted(1.0, 1e22) == pytest.approx(np.exp(-1e22 * sigma))  # Beer-Lambert
    response = flat_response()
    obs = Observation(flux_at_1kev=1.0, area_cm2=10.0, band_kev=(2.0, 8.0), exposure_s=1e4)
    absorbed = Observation(flux_at_1kev=1.0, area_cm2=10.0, band_kev=(2.0, 8.0), exposure_s=1e4,
                           absorption_column_cm2=1e22)
    clear, dimmed = (plan_observation([response], o)["flat"] for o in (obs, absorbed))
    assert 0.5 * clear.source_counts < dimmed.source_counts < clear.source_counts
    with pytest.raises(ValueError, match="tabulated for 0.1-200 keV"):
        cross_section_per_hydrogen_cm2(0.05)


def test_observation_config(tmp_path):
    obs = Observation(flux_at_1kev=0.2, photon_index=1.9, area_cm2=120.0, band_kev=(2.0, 8.0), exposure_s=3e5,
                      target_mdp=0.05, background_per_cm2_s_kev=2e-3)
    path = tmp_path / "obs.toml"
    path.write_text(obs.to_toml())
    assert Observation.read_toml(path) == obs
    path.write_text("[observation]\nband_kev = [2.0, 8.0]\nexposure_s = 1e4\nflux = 1.0\narea_cm2 = 10.0\n")
    with pytest.raises(ValueError, match=r"unknown key\(s\) \['flux'\]; valid keys are \['band_kev', 'exposure_s'"):
        Observation.read_toml(path)
    with pytest.raises(ValueError, match="either as a power law .* or as a table"):
        Observation(area_cm2=10.0, band_kev=(2.0, 8.0), exposure_s=1e4)
    with pytest.raises(ValueError, match="'target_mdp' must be a fraction in"):
        Observation(flux_at_1kev=1.0, area_cm2=10.0, band_kev=(2.0, 8.0), exposure_s=1e4, target_mdp=5.0)
    with pytest.raises(ValueError, match="'band_kev' must be two energies 0 < low < high"):
        Observation(flux_at_1kev=1.0, area_cm2=10.0, band_kev=(8.0, 2.0), exposure_s=1e4)


def test_plan_prints_a_table_and_names_repeated_designs():
    plan = plan_observation([flat_response(), flat_response()], Observation(
        flux_at_1kev=1.0, area_cm2=10.0, band_kev=(2.0, 8.0), exposure_s=1e4, target_mdp=0.1))
    assert [p.name for p in plan.designs] == ["flat", "flat-2"]
    text = repr(plan)
    assert "| design | source counts |" in text and "exposure for MDP99 10 %" in text and "| flat-2 |" in text


@pytest.mark.parametrize("name", ["planner", "response", "interstellar"])
def test_docstring_examples(name):
    import doctest
    import importlib

    if name == "interstellar":
        pytest.importorskip("xraydb")
    module = importlib.import_module(f"trackfit.{name}")
    result = doctest.testmod(module, optionflags=doctest.NORMALIZE_WHITESPACE)
    assert result.failed == 0 and result.attempted > 0
