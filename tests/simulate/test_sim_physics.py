"""Samplers of the simulator against published laws (docs/methods.md §7, §9) and scipy."""

import dataclasses

import numpy as np
import pytest
from scipy import integrate, stats

from trackfit.simulate import GasConfig, _kernels
from trackfit.simulate.gas import GasMixture
from trackfit.simulate.physics import (
    diffusion_sigma_mm,
    electron_beta,
    emission_directions,
    ionization_electrons,
    isotropic_directions,
    polya_gain,
    sample_emission_azimuth,
    sample_sauter_cos_theta,
    stopping_power_kev_cm,
    thermal_diffusion_um,
    transport_electrons,
)

DME_1ATM = GasConfig(molecules=("C2H6O",), fractions=(1.0,), pressure_atm=1.0)


def test_sauter_moment_at_zero_speed():
    # docs/methods.md §9 [derived]: <cos²θ> = 0.2000 at β = 0 (sin²θ law), ±0.002 with 10⁶ draws
    mu = sample_sauter_cos_theta(np.zeros(1_000_000), np.random.default_rng(1))
    assert np.mean(mu**2) == pytest.approx(0.2000, abs=0.002)


def test_sauter_forward_shift_at_beta_0147():
    # docs/methods.md §9 [derived]: <cosθ> = 0.118 at β = 0.147, ±0.002 with 10⁶ draws
    mu = sample_sauter_cos_theta(np.full(1_000_000, 0.147), np.random.default_rng(2))
    assert np.mean(mu) == pytest.approx(0.118, abs=0.002)


def test_sauter_polar_distribution_ks():
    # Sauter / Fano, McVoy & Albers 1959: pdf(μ) ∝ (1 - μ²)/(1 - βμ)⁴; CDF by scipy quadrature on a fine grid
    beta = 0.2
    grid = np.linspace(-1, 1, 20001)
    pdf = (1 - grid**2) / (1 - beta * grid) ** 4
    cdf = integrate.cumulative_trapezoid(pdf, grid, initial=0.0)
    cdf /= cdf[-1]
    mu = sample_sauter_cos_theta(np.full(50_000, beta), np.random.default_rng(3))
    assert stats.kstest(mu, lambda x: np.interp(x, grid, cdf)).pvalue > 0.001


@pytest.mark.parametrize("degree, angle_rad", [(1.0, 0.5), (0.4, -1.1), (0.0, 0.0)])
def test_azimuth_law_ks(degree, angle_rad):
    # docs/methods.md §7: pdf(φ) ∝ 1 + P cos 2(φ - ψ) on [0, 2π); CDF = [φ + P/2 (sin 2(φ-ψ) + sin 2ψ)] / 2π [derived]
    phi = sample_emission_azimuth(40_000, degree, angle_rad, np.random.default_rng(4))

    def cdf(x):
        return (x + degree / 2 * (np.sin(2 * (x - angle_rad)) + np.sin(2 * angle_rad))) / (2 * np.pi)

    assert stats.kstest(phi, cdf).pvalue > 0.001


def test_emission_directions_frame():
    azimuth, polar, d = emission_directions(np.full(1000, 5.6), 1.0, 0.3, np.random.default_rng(5))
    np.testing.assert_allclose(np.linalg.norm(d, axis=1), 1.0, rtol=1e-12)
    np.testing.assert_allclose(np.arctan2(d[:, 1], d[:, 0]), azimuth)
    np.testing.assert_allclose(-d[:, 2], np.cos(polar))          # polar angle from the photon direction -z
    assert np.all((azimuth > -np.pi) & (azimuth <= np.pi))


def test_isotropic_directions_moments():
    d = isotropic_directions(200_000, np.random.default_rng(6))
    # uniform on the sphere: <u_i> = 0, <u_i²> = 1/3 [derived]
    np.testing.assert_allclose(d.mean(axis=0), 0.0, atol=0.005)
    np.testing.assert_allclose((d**2).mean(axis=0), 1 / 3, atol=0.003)


def test_electron_beta():
    # relativistic kinematics: γ = 1 + T/mc², β = sqrt(1 - 1/γ²); β = 0.147 near 5.6 keV (docs/methods.md §7)
    assert electron_beta(5.6) == pytest.approx(0.147, abs=0.001)


def test_ionization_mean_and_variance_follow_w_and_fano():
    # docs/methods.md §9 [ICRU 31]: 5.9 keV in He with W = 41.3 eV gives 142.86 pairs on average; variance F·N̄
    rng = np.random.default_rng(7)
    n = ionization_electrons(np.full(400_000, 5.9), 41.3, 0.2, rng)
    mean = 5900 / 41.3
    assert mean == pytest.approx(142.86, abs=0.005)
    assert n.mean() == pytest.approx(mean, abs=4 * np.sqrt(0.2 * mean / len(n)) + 0.01)
    # sample variance: relative standard error ≈ sqrt(2/(N-1)) for a near-Gaussian count
    assert n.var() == pytest.approx(0.2 * mean, rel=4 * np.sqrt(2 / len(n)) + 0.01)


def test_polya_gain_matches_scipy_gamma():
    # Alkhazov 1970: Polya P(G) ∝ (G/Ḡ)^θ exp(-(1+θ)G/Ḡ) = gamma(1+θ, Ḡ/(1+θ)); relative variance 1/(1+θ)
    theta, mean = 0.7, 3000.0
    g = polya_gain(300_000, mean, theta, np.random.default_rng(8))
    reference = stats.gamma(a=1 + theta, scale=mean / (1 + theta))
    assert reference.var() / reference.mean() ** 2 == pytest.approx(1 / (1 + theta))
    assert g.mean() == pytest.approx(mean, rel=4 * np.sqrt(1 / (1 + theta) / len(g)))
    assert g.var() / g.mean() ** 2 == pytest.approx(1 / (1 + theta), rel=0.02)
    assert stats.kstest(g[:50_000], reference.cdf).pvalue > 0.001


def test_thermal_diffusion_check_value():
    # docs/methods.md §9 [derived]: sqrt(2kTz/(eE)) = 50.3 µm for 1 cm at 2 kV/cm, 293.15 K
    assert thermal_diffusion_um(1.0, 2000.0, 293.15) == pytest.approx(50.3, abs=0.5)


def test_diffusion_sigma_scales_with_square_root_of_drift():
    # docs/methods.md §7: σ_T = D_T·sqrt(z)
    assert diffusion_sigma_mm(10.0, 100.0) == pytest.approx(0.100)
    assert diffusion_sigma_mm(2.5, 100.0) == pytest.approx(0.050)


@pytest.mark.parametrize("height_mm", [2.0, 8.0])
def test_kernel_diffusion_width(height_mm):
    """A point-like deposit of many electrons spreads as σ² = D_T² z + spread² (+ hexagon variance 5p²/72)."""
    from sim_helpers import small_chip

    from trackfit.simulate import load_preset
    from trackfit.simulate.engine import _Simulator
    from trackfit.simulate.fluorescence import FluorescencePaths
    from trackfit.simulate.photons import PhotonBatch

    config = small_chip(load_preset("hedme-1atm-1cm"), noise_electrons=0.0, trigger_threshold_electrons=1.0,
                        roi_margin_pixels=0, electrons_per_adc=1.0)
    config = dataclasses.replace(config, multiplier=dataclasses.replace(config.multiplier, gain=20.0,
                                                                        polya_theta=1e6, transfer_spread_um=0.0,
                                                                        gain_map_rms=0.0),
                                 drift=dataclasses.replace(config.drift, diffusion_um_per_sqrt_cm=90.0),
                                 gas=dataclasses.replace(config.gas, w_value_ev=24.0))
    sim = _Simulator(config, np.random.default_rng(9))
    grid = config.grid
    n_events, deposit_kev = 40, 60.0
    zeros, no_direction = np.zeros(n_events), np.zeros((n_events, 3))
    point_deposits = PhotonBatch(
        energy_kev=zeros, x_mm=zeros, y_mm=zeros, height_mm=np.full(n_events, height_mm), atomic_number=zeros,
        shell=zeros, photoelectron_kev=zeros, azimuth_rad=zeros, polar_rad=zeros, photoelectron_dir=no_direction,
        auger_kev=zeros, auger_dir=no_direction, fluorescence_kev=zeros,
        fluorescence=FluorescencePaths(fate=np.zeros(n_events, np.int8), x_mm=zeros + np.nan, y_mm=zeros + np.nan,
                                       z_mm=zeros + np.nan, deposit_kev=zeros),
        local_kev=np.full(n_events, deposit_kev), time_s=zeros)
    triggered, roi, n_signal, signal, _, n_ion = sim.events(point_deposits, np.ones(n_events))
    assert triggered.all()
    offsets = np.concatenate([[0], np.cumsum(n_signal)])
    var_x, var_y = [], []
    for i in range(n_events):
        c0, r0, nc, nr = roi[i]
        rows, cols = np.divmod(np.arange(nc * nr), nc)
        x, y = grid.pixel_centre_mm(cols + c0, rows + r0)
        q = signal[offsets[i]:offsets[i + 1]].astype(float)
        var_x.append(np.sum(q * x**2) / q.sum() - (np.sum(q * x) / q.sum()) ** 2)
        var_y.append(np.sum(q * y**2) / q.sum() - (np.sum(q * y) / q.sum()) ** 2)
    expected = (90e-3 * np.sqrt(height_mm / 10.0)) ** 2 + 5 * grid.pitch_mm**2 / 72
    # each event has ~2500 electrons: the variance estimate of 40 events is good to ~1 % (4 sigma band)
    assert np.mean(var_x) == pytest.approx(expected, rel=0.05)
    assert np.mean(var_y) == pytest.approx(expected, rel=0.05)
    assert n_ion.mean() == pytest.approx(deposit_kev / 0.024, rel=0.01)


def test_stopping_power_is_joy_luo_formula():
    # Joy & Luo 1989 (docs/methods.md §7): dE/ds = 78500 ρ Σ w_j Z_j/A_j ln(1.166 (E + 0.8 J_j)/J_j)/E keV/cm,
    # with mass fractions of DME and J(H, C, O) = 19.2, 78, 95 eV [memory: ICRU 37]
    dme = GasMixture.from_config(DME_1ATM)
    rho = 1.915e-3
    parts = {"H": (6 * 1.008, 1, 1.008, 0.0192), "C": (2 * 12.011, 6, 12.011, 0.078), "O": (15.999, 8, 15.999, 0.095)}
    total = sum(p[0] for p in parts.values())
    for e in (0.5, 2.0, 5.6):
        expected = 78500 * rho / e * sum(m / total * z / a * np.log(1.166 * (e + 0.8 * j) / j)
                                         for m, z, a, j in parts.values())
        assert stopping_power_kev_cm(e, dme)[0] == pytest.approx(expected, rel=2e-3)


def test_elastic_mean_free_path_in_dme():
    # docs/methods.md §7 [memory: Joy 1995]: mean free path ≈ 10 µm at 5 keV in DME at 1 atm; wide tolerance (memory)
    dme = GasMixture.from_config(DME_1ATM)
    mu_per_cm = sum(n * _kernels.elastic_cross_section_cm2(5.0, z) for z, n in zip(dme.atomic_number.astype(float),
                                                                                   dme.atom_density_cm3, strict=True))
    assert 1e4 / mu_per_cm == pytest.approx(10.0, rel=0.5)


def test_track_range_vs_kanaya_okayama():
    """Mean path length of 5.6 keV electrons in DME at 1 atm vs the Kanaya-Okayama range.

    Kanaya & Okayama 1972 [memory, docs/methods.md §7]: R = 0.0276 A E^1.67 / (Z^0.889 ρ) µm with mass-weighted
    A and Z of DME, ≈ 620 µm at 5.6 keV. Tolerance 35 %: the formula is from memory and is an empirical
    fit, while our path is the CSDA length of Bethe/Joy-Luo stopping (we find ≈ 0.73 × R_KO).
    """
    dme = GasMixture.from_config(DME_1ATM)
    w = dme.mass_density_g_cm3 / dme.density_g_cm3
    a_eff, z_eff = np.sum(w * dme.atomic_mass), np.sum(w * dme.atomic_number)
    rng = np.random.default_rng(10)

    def ko_um(e):
        return 0.0276 * a_eff * e**1.67 / (z_eff**0.889 * 1.915e-3)

    assert ko_um(5.6) == pytest.approx(620, rel=0.02)
    path, _, _ = transport_electrons(np.full(400, 5.6), isotropic_directions(400, rng), dme, rng)
    assert path.mean() * 1000 == pytest.approx(ko_um(5.6), rel=0.35)
    # and the energy dependence follows E^1.67 between 3 and 10 keV (exponent within ±0.15, memory)
    low, _, _ = transport_electrons(np.full(400, 3.0), isotropic_directions(400, rng), dme, rng)
    high, _, _ = transport_electrons(np.full(200, 10.0), isotropic_directions(200, rng), dme, rng)
    exponent = np.log(high.mean() / low.mean()) / np.log(10.0 / 3.0)
    assert exponent == pytest.approx(1.67, abs=0.15)


def test_transport_stops_at_gap_boundaries():
    dme = GasMixture.from_config(DME_1ATM)
    rng = np.random.default_rng(11)
    # straight down from 0.05 mm above the multiplier: electrons hit it and stop there
    _, end, _ = transport_electrons(np.full(50, 5.0), np.tile([0.0, 0.0, -1.0], (50, 1)), dme, rng,
                                    start_height_mm=0.05)
    assert np.all(end[:, 2] >= -0.05 - 1e-12)
    assert np.any(np.isclose(end[:, 2], -0.05))
