"""Whole simulation runs: truth, modulation of the true directions, files, reproducibility, bookkeeping."""

import dataclasses

import h5py
import numpy as np
import pytest
from scipy import stats
from sim_helpers import small_chip

from trackfit import open_raw
from trackfit.simulate import TRUTH_COLUMNS, SimConfig, run
from trackfit.simulate.gas import GasMixture


def _stokes(phi):
    """Normalized Stokes sums of emission angles: modulation m = 2 sqrt(<cos 2φ>² + <sin 2φ>²) (Kislat et al. 2015)."""
    q, u = np.mean(np.cos(2 * phi)), np.mean(np.sin(2 * phi))
    return q, u, 2 * np.hypot(q, u), 0.5 * np.arctan2(u, q)


def test_ideal_reconstruction_of_polarized_beam_gives_modulation_one(hedme_6kev_pencil):
    # docs/methods.md §7, §9 [derived]: the projected initial direction at normal incidence is modulated exactly by P;
    # tolerance 3·sqrt(2/N)
    psi = np.deg2rad(30.0)
    config = hedme_6kev_pencil.with_monochromatic(polarization_degree=1.0, polarization_angle_deg=30.0)
    result = run(config, 6000, rng=21)
    phi = result.truth["emission_azimuth_rad"].astype(np.float64)
    _, _, m, angle = _stokes(phi)
    n = len(phi)
    assert m == pytest.approx(1.0, abs=3 * np.sqrt(2 / n))
    assert angle == pytest.approx(psi, abs=3 * np.sqrt(2 / n) / 2)


def test_unpolarized_true_directions_show_no_modulation(hedme_6kev_pencil):
    # docs/methods.md §9 [derived]: |Q|/I, |U|/I consistent with 0 within 3·sqrt(1/(2N))
    result = run(hedme_6kev_pencil, 6000, rng=22)
    q, u, _, _ = _stokes(result.truth["emission_azimuth_rad"].astype(np.float64))
    n = len(result.batch)
    assert abs(q) < 3 * np.sqrt(1 / (2 * n)) and abs(u) < 3 * np.sqrt(1 / (2 * n))


def test_truth_columns_and_event_count(hedme_6kev_pencil):
    result = run(hedme_6kev_pencil, 700, rng=23)
    assert len(result.batch) == 700
    assert set(result.truth) == set(TRUTH_COLUMNS)
    t = result.truth
    assert np.all(t["photon_energy_kev"] == np.float32(6.0))
    k_shell = t["absorber_shell"] == 0
    # photoelectron energy = photon energy - binding energy (C 284.2 eV, O 543.1 eV K edges, xraydb)
    binding = np.where(t["absorber_atomic_number"] == 6, 0.2842, 0.5431)
    np.testing.assert_allclose(t["photoelectron_energy_kev"][k_shell], (6.0 - binding)[k_shell], rtol=1e-6)
    assert np.all((t["conversion_z_mm"] >= 0) & (t["conversion_z_mm"] <= 10.0))
    assert np.all(t["track_length_mm"] > 0)
    assert result.n_converted == 700 + result.n_not_triggered
    times = result.batch.time_s
    assert np.all(np.diff(times) > 0)


def test_conversion_depth_follows_truncated_beer_lambert(hedme):
    """At 2.7 keV the depth below the window is exponential with xraydb's μ, truncated to the gap (KS test)."""
    config = small_chip(hedme).with_monochromatic(energy_kev=2.7)
    result = run(config, 3000, rng=24)
    mu = GasMixture.from_config(config.gas).absorption_per_cm(2.7)
    depth_cm = (10.0 - result.truth["conversion_z_mm"].astype(np.float64)) / 10.0
    truncated = stats.truncexpon(b=mu * 1.0, scale=1 / mu)
    assert stats.kstest(depth_cm, truncated.cdf).pvalue > 0.001


def test_not_triggered_events_are_counted(hedme_6kev_pencil):
    config = small_chip(hedme_6kev_pencil, trigger_min_pixels=40)
    result = run(config, 200, rng=25)
    assert result.n_not_triggered > 0
    assert result.n_converted == len(result.batch) + result.n_not_triggered
    # every written event has at least 40 pixels above the trigger threshold (it is what the trigger asked)
    above = np.add.reduceat((result.batch.signal * config.readout.electrons_per_adc
                             > config.readout.trigger_threshold_electrons).astype(int), result.batch.start[:-1])
    assert np.all(above >= 40)


def test_pulse_height_scale(hedme_6kev_pencil):
    # mean pulse height = (E/W)·G / (electrons per ADC count) [derived], minus charge outside the ROI (< 2 %)
    config = hedme_6kev_pencil
    result = run(config, 800, rng=26)
    total = np.add.reduceat(result.batch.signal.astype(np.int64), result.batch.start[:-1])
    expected = 6000.0 / config.gas.w_value_ev * config.multiplier.gain / config.readout.electrons_per_adc
    assert np.median(total) == pytest.approx(expected, rel=0.03)


def test_gain_map_and_drift_are_recorded(tmp_path, hedme):
    config = small_chip(hedme)
    config = dataclasses.replace(config, multiplier=dataclasses.replace(
        config.multiplier, gain_map_rms=0.15, gain_map_scale_mm=0.5, gain_drift_fraction=0.2, gain_drift_time_s=5.0),
        source=dataclasses.replace(config.source, field_size_mm=(4.0, 4.0)))
    result = run(config, 400, rng=27)
    grid = config.grid
    col, row = grid.nearest_pixel(result.truth["conversion_x_mm"], result.truth["conversion_y_mm"])
    drift = 1 - 0.2 * (1 - np.exp(-result.batch.time_s / 5.0))
    np.testing.assert_allclose(result.truth["gain_relative"], result.pixel_gain[row, col] * drift, rtol=1e-6)
    path = result.write(tmp_path / "gain.h5")
    with h5py.File(path) as f:
        np.testing.assert_allclose(f["simulation/pixel_gain"][...], result.pixel_gain, rtol=1e-6)


def test_file_round_trip_and_run_attributes(tmp_path, hedme_6kev_pencil):
    result = run(hedme_6kev_pencil, 300, rng=28)
    path = result.write(tmp_path / "sim.h5")
    with open_raw(path) as reader:
        batch = reader.read_all()
        info = reader.run_info
    np.testing.assert_array_equal(batch.signal, result.batch.signal)
    np.testing.assert_array_equal(batch.roi, result.batch.roi)
    for key in TRUTH_COLUMNS:
        np.testing.assert_array_equal(batch.truth[key], result.truth[key])
    assert SimConfig.from_toml(info["config_toml"]) == hedme_6kev_pencil
    assert info["seed"] == 28 and info["n_triggered"] == 300
    assert info["n_converted"] == 300 + info["n_not_triggered"]
    assert info["shell_names"].split(",")[0] == "K"


def test_same_seed_gives_bit_identical_files(tmp_path, hedme_6kev_pencil):
    paths = [run(hedme_6kev_pencil, 250, rng=29).write(tmp_path / f"run{i}.h5") for i in range(2)]
    assert paths[0].read_bytes() == paths[1].read_bytes()
    other = run(hedme_6kev_pencil, 250, rng=30).write(tmp_path / "other.h5")
    assert other.read_bytes() != paths[0].read_bytes()


def test_events_do_not_depend_on_run_length(hedme_6kev_pencil):
    short = run(hedme_6kev_pencil, 100, rng=31).batch
    long = run(hedme_6kev_pencil, 5000, rng=31).batch
    np.testing.assert_array_equal(short.signal, long.signal[:len(short.signal)])


def test_argon_k_fluorescence_escapes(hedme):
    """Above the Ar K edge some K vacancies emit a K photon (xraydb fluorescence yield 0.109) that leaves the cell."""
    from trackfit.simulate import load_preset

    config = small_chip(load_preset("ardme-3atm-3cm")).with_monochromatic(energy_kev=8.0)
    result = run(config, 1500, rng=32)
    t = result.truth
    argon_k = (t["absorber_atomic_number"] == 18) & (t["absorber_shell"] == 0)
    fluorescent = argon_k & (t["fluorescence_energy_kev"] > 0)
    fraction = fluorescent.sum() / argon_k.sum()
    assert fraction == pytest.approx(0.109, abs=4 * np.sqrt(0.109 * 0.891 / argon_k.sum()))
    assert np.all((t["fluorescence_energy_kev"][fluorescent] > 2.8) & (t["fluorescence_energy_kev"][fluorescent] < 3.2))


def test_bad_arguments():
    with pytest.raises(TypeError, match="SimConfig"):
        run({"gas": {}}, 10)
    with pytest.raises(ValueError, match="'n_events' must be an integer >= 0"):
        run(SimConfig(), -1)
    assert len(run(SimConfig(), 0, rng=1).batch) == 0


def test_result_summaries(hedme_6kev_pencil):
    result = run(hedme_6kev_pencil, 20, rng=33)
    assert "20 events written" in repr(result) and "seed=33" in repr(result)
    html = result._repr_html_()
    assert "<table>" in html and "He/C2H6O 0.2/0.8, 1 atm, 1 cm" in html
