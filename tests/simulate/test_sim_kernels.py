"""Numba kernels against their plain-Python twins (same generator state -> same events) and against HexGrid."""

import dataclasses

import numpy as np
import pytest
from sim_helpers import small_chip

from trackfit import HexGrid
from trackfit.simulate import _kernels, _reference, load_preset
from trackfit.simulate.engine import _gain_drift, _Simulator, pixel_gain_map
from trackfit.simulate.gas import GasMixture


@pytest.mark.parametrize("shifted_rows", ["odd", "even"])
def test_nearest_pixel_matches_hexgrid(shifted_rows):
    grid = HexGrid(n_columns=40, n_rows=30, shifted_rows=shifted_rows)
    rng = np.random.default_rng(5)
    x = rng.uniform(-1.2, 1.2, 5000)
    y = rng.uniform(-0.8, 0.8, 5000)
    expected = grid.nearest_pixel(x, y)
    x0, y0 = -grid.extent_mm[0], -grid.extent_mm[2]
    unshifted = 0 if shifted_rows == "odd" else 1
    got = np.array([_kernels.nearest_pixel(a, b, x0, y0, grid.pitch_mm, grid.row_pitch_mm, unshifted)
                    for a, b in zip(x, y, strict=True)]).T
    np.testing.assert_array_equal(got[0], expected[0])
    np.testing.assert_array_equal(got[1], expected[1])


def test_stopping_power_and_cross_section_match_twin(hedme):
    mixture = GasMixture.from_config(hedme.gas)
    z, _, rho_z_over_a, mean_excitation = mixture.stopping_constants()
    energies = np.geomspace(0.05, 50.0, 40)
    kernel = [_kernels.stopping_power_kev_cm(e, rho_z_over_a, mean_excitation) for e in energies]
    np.testing.assert_allclose(kernel, _reference.stopping_power_kev_cm(energies, rho_z_over_a, mean_excitation),
                               rtol=1e-13)
    for zz in z:
        kernel = [_kernels.elastic_cross_section_cm2(e, zz) for e in energies]
        np.testing.assert_allclose(kernel, _reference.elastic_cross_section_cm2(energies, zz), rtol=1e-13)


def _compare(config, n, seed):
    """Run the event kernel and its twin from the same generator state on the same photons."""
    sim = _Simulator(config, np.random.default_rng(seed))
    photons = sim.photons.sample(n, sim.rng)
    gain_factor = _gain_drift(config, photons.time_s)
    state = sim.rng.bit_generator.state
    twin_rng = np.random.default_rng()
    twin_rng.bit_generator.state = state
    expected = _reference.simulate_events(twin_rng, photons, gain_factor, sim.mixture, config, sim.pixel_gain)
    triggered, roi, n_signal, signal, path, n_ion = sim.events(photons, gain_factor)
    offsets = np.concatenate([[0], np.cumsum(n_signal)])
    for i, ref in enumerate(expected):
        assert triggered[i] == ref["triggered"], i
        assert n_ion[i] == ref["n_ionization"], i
        assert path[i] == pytest.approx(ref["path_mm"], rel=1e-12, abs=1e-15), i
        if ref["triggered"]:
            np.testing.assert_array_equal(roi[i], ref["roi"])
            np.testing.assert_array_equal(signal[offsets[i]:offsets[i + 1]], ref["signal"])
    return triggered, photons


def test_event_kernel_matches_twin_hedme(hedme_6kev_pencil):
    triggered, _ = _compare(hedme_6kev_pencil, 12, seed=3)
    assert triggered.sum() >= 10


def test_event_kernel_matches_twin_with_gain_map_drift_and_zero_suppression(hedme):
    config = small_chip(hedme, zero_suppression_electrons=150.0, trigger_min_pixels=3)
    config = dataclasses.replace(config, multiplier=dataclasses.replace(
        config.multiplier, gain_map_rms=0.2, gain_map_scale_mm=0.5, gain_drift_fraction=0.3, gain_drift_time_s=0.01),
        source=dataclasses.replace(config.source, field_size_mm=(4.0, 4.0)))
    _compare(config, 10, seed=4)


def test_event_kernel_matches_twin_argon_with_fluorescence_and_l_shells():
    config = small_chip(load_preset("ardme-3atm-3cm")).with_monochromatic(energy_kev=8.0)
    config = dataclasses.replace(config, source=dataclasses.replace(config.source, field_size_mm=(3.0, 3.0)))
    _compare(config, 8, seed=5)


def test_event_kernel_matches_twin_with_reabsorbed_fluorescence():
    """Argon K photons re-absorbed in the gas make a second deposit; kernel and twin agree on those events."""
    config = load_preset("ardme-3atm-3cm").with_monochromatic(energy_kev=4.0)
    config = dataclasses.replace(config, source=dataclasses.replace(config.source, field_size_mm=(2.0, 2.0)),
                                 readout=dataclasses.replace(config.readout, n_columns=240, n_rows=240))
    _, photons = _compare(config, 60, seed=7)
    assert np.any(photons.fluorescence.deposit_kev > 0)


def test_gain_map_has_requested_rms(hedme):
    config = dataclasses.replace(hedme, multiplier=dataclasses.replace(hedme.multiplier, gain_map_rms=0.1))
    gain = pixel_gain_map(config, np.random.default_rng(1))
    assert gain.shape == config.grid.shape
    assert gain.mean() == pytest.approx(1.0, abs=1e-9)
    assert gain.std() == pytest.approx(0.1, rel=1e-6)


@pytest.mark.slow
@pytest.mark.parametrize("preset, energy_kev", [("hedme-1atm-1cm", 2.7), ("dme-0.8atm-1cm", 8.0),
                                                ("ardme-3atm-3cm", 25.0)])
def test_event_kernel_matches_twin_many_events(preset, energy_kev):
    config = small_chip(load_preset(preset)).with_monochromatic(energy_kev=energy_kev)
    config = dataclasses.replace(config, source=dataclasses.replace(config.source, field_size_mm=(3.0, 3.0)))
    _compare(config, 150, seed=6)
