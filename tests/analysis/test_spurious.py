"""Spurious modulation: calibration map, per-event subtraction, 0/90 degree separation (docs/methods.md section 5)."""

import numpy as np
import pytest

from trackfit.analysis import cell_edges, measure_spurious_map, separate_spurious, stokes_parameters

from .toys import modulated_angles


def injected_spurious(energy_kev, x_mm, y_mm):
    """An energy- and position-dependent spurious modulation (Q_sp, U_sp), larger at low energy."""
    scale = 0.04 * (3.0 / energy_kev)
    return scale * (0.5 + 0.5 * np.tanh(x_mm / 3.0)), scale * 0.4 * np.cos(y_mm / 3.0)


def events_with_spurious(rng, n, energy_kev, *, mu=0.0, p=0.0, psi=0.0):
    """Angles whose E[cos 2phi] = mu p/2 cos 2psi + Q_sp, E[sin 2phi] = mu p/2 sin 2psi + U_sp (Rankin et al.
    2022: spurious modulation is additive in Stokes space)."""
    x, y = rng.uniform(-6, 6, n), rng.uniform(-6, 6, n)
    energy = np.full(n, float(energy_kev)) if np.ndim(energy_kev) == 0 else energy_kev
    q_sp, u_sp = injected_spurious(energy, x, y)
    c = mu * p / 2 * np.cos(2 * psi) + q_sp
    s = mu * p / 2 * np.sin(2 * psi) + u_sp
    # pdf (1 + 2c cos 2phi + 2s sin 2phi)/2pi = (1 + m cos 2(phi - phi0))/2pi with m = 2 sqrt(c^2 + s^2)
    phi = modulated_angles(rng, n, 2 * np.hypot(c, s), 0.5 * np.arctan2(s, c))
    return {"emission_rad": phi, "energy_kev": energy, "conv_x_mm": x, "conv_y_mm": y}


@pytest.fixture(scope="module")
def spurious_map():
    rng = np.random.default_rng(60)
    runs = [events_with_spurious(rng, 400_000, e) for e in (3.0, 6.0)]
    edges = cell_edges(-6, 6, 3.0)
    return measure_spurious_map(runs, x_edges_mm=edges, y_edges_mm=edges)


def test_map_recovers_injected_spurious(spurious_map):
    # toy study: the measured Q_sp, U_sp per cell match the cell average of the injected map within
    # their errors; errors ~ 1/sqrt(2N) (docs/methods.md section 5 [derived])
    sm = spurious_map
    centres = 0.5 * (sm.x_edges_mm[1:] + sm.x_edges_mm[:-1])
    fine = np.linspace(-1.45, 1.45, 30)
    for k, energy in enumerate(sm.energy_kev):
        cx, cy = np.meshgrid(centres, centres, indexing="ij")
        truth = [np.mean([injected_spurious(energy, cx + dx, cy + dy)[i] for dx in fine for dy in fine], axis=0)
                 for i in (0, 1)]
        for measured, err, true in ((sm.q[k], sm.q_err[k], truth[0]), (sm.u[k], sm.u_err[k], truth[1])):
            pulls = (measured - true) / err
            assert abs(pulls.mean()) < 4 / np.sqrt(pulls.size) and 0.5 < pulls.std() < 1.6
            assert np.median(err) == pytest.approx(np.median(1 / np.sqrt(2 * sm.counts[k])), rel=0.05)
    assert sm.energy_kev == pytest.approx([3.0, 6.0])


def test_interpolation_is_linear_in_energy(spurious_map):
    # Rankin et al. 2022: per-event subtraction with linear interpolation in energy between calibration lines
    x, y = np.array([2.0, -4.0]), np.array([1.0, 5.0])
    q3, u3 = spurious_map.at(np.full(2, 3.0), x, y)
    q6, u6 = spurious_map.at(np.full(2, 6.0), x, y)
    q45, u45 = spurious_map.at(np.full(2, 4.5), x, y)
    assert q45 == pytest.approx(0.5 * (q3 + q6)) and u45 == pytest.approx(0.5 * (u3 + u6))
    q_low, _ = spurious_map.at(np.full(2, 2.0), x, y)  # constant beyond the nodes
    assert q_low == pytest.approx(q3)
    q_nan, _ = spurious_map.at(np.array([np.nan, 4.0]), np.array([0.0, np.nan]), y)
    assert q_nan.tolist() == [0.0, 0.0]


def test_subtraction_removes_spurious_from_polarized_measurement(spurious_map):
    # toy study: a polarized source with spurious modulation; without subtraction the Stokes estimate is
    # biased, with per-event subtraction it recovers the injected (p, psi) within errors
    rng = np.random.default_rng(61)
    mu, p, psi = 0.3, 0.10, np.deg2rad(70.0)
    energy = rng.uniform(3.0, 6.0, 400_000)
    events = events_with_spurious(rng, energy.size, energy, mu=mu, p=p, psi=psi)
    q_sp, u_sp = spurious_map.at(events["energy_kev"], events["conv_x_mm"], events["conv_y_mm"])
    raw = stokes_parameters(events["emission_rad"], modulation_factor=mu)
    corrected = stokes_parameters(events["emission_rad"], modulation_factor=mu, spurious_q=q_sp, spurious_u=u_sp)
    q_true, u_true = p * np.cos(2 * psi), p * np.sin(2 * psi)
    assert np.hypot(raw.q - q_true, raw.u - u_true) > 5 * raw.q_err  # the spurious term matters here
    assert abs(corrected.q - q_true) < 4 * corrected.q_err
    assert abs(corrected.u - u_true) < 4 * corrected.u_err


def test_separation_with_runs_90_degrees_apart():
    # docs/methods.md section 5 [derived]: rotating the detector by 90 deg flips the genuine modulation in the detector
    # frame but not the spurious one: S_sp = (S_0 + S_90)/2, S_gen = (S_0 - S_90)/2
    rng = np.random.default_rng(62)
    mu, p, psi, n = 0.3, 0.2, np.deg2rad(20.0), 400_000
    run0 = events_with_spurious(rng, n, 4.0, mu=mu, p=p, psi=psi)
    run90 = events_with_spurious(rng, n, 4.0, mu=mu, p=p, psi=psi + np.pi / 2)
    r0, r90 = (stokes_parameters(r["emission_rad"]) for r in (run0, run90))  # mu = 1: <cos 2phi> units x 2
    sep = separate_spurious(r0.q / 2, r0.u / 2, r90.q / 2, r90.u / 2, q_0_err=r0.q_err / 2, u_0_err=r0.u_err / 2,
                            q_90_err=r90.q_err / 2, u_90_err=r90.u_err / 2)
    q_sp, u_sp = injected_spurious(4.0, run0["conv_x_mm"], run0["conv_y_mm"])
    assert abs(sep.spurious_q - q_sp.mean()) < 4 * sep.spurious_q_err
    assert abs(sep.spurious_u - u_sp.mean()) < 4 * sep.spurious_u_err
    assert abs(sep.genuine_q - mu * p / 2 * np.cos(2 * psi)) < 4 * sep.genuine_q_err
    assert abs(sep.genuine_u - mu * p / 2 * np.sin(2 * psi)) < 4 * sep.genuine_u_err
    assert "spurious Q" in repr(sep)


def test_map_input_checks():
    with pytest.raises(ValueError, match="at least one unpolarized run"):
        measure_spurious_map([], x_edges_mm=[0, 1], y_edges_mm=[0, 1])
    run = {"emission_rad": np.zeros(3), "energy_kev": np.ones(3), "conv_x_mm": np.full(3, 9.0),
           "conv_y_mm": np.zeros(3)}
    with pytest.raises(ValueError, match="no usable event inside the map"):
        measure_spurious_map([run], x_edges_mm=[0, 1], y_edges_mm=[0, 1])


def test_map_errors_propagate_into_stokes_errors():
    # the subtracted map has statistical errors shared by all events of a cell: over independent calibrations the
    # corrected Q scatters by sqrt(SpuriousMap.sum_variance) / I (same events, different maps); 60 maps
    from trackfit.analysis import stokes_sums

    rng = np.random.default_rng(63)
    edges = cell_edges(-6, 6, 6.0)
    science = events_with_spurious(rng, 20_000, 5.0, mu=0.4, p=0.3)
    mu = 0.4
    qs, predicted = [], []
    for _ in range(60):
        sm = measure_spurious_map([events_with_spurious(rng, 8000, 5.0)], x_edges_mm=edges, y_edges_mm=edges)
        q_sp, u_sp = sm.at(science["energy_kev"], science["conv_x_mm"], science["conv_y_mm"])
        sums = stokes_sums(science["emission_rad"], modulation_factor=mu, spurious_q=q_sp, spurious_u=u_sp)
        var_q, _ = sm.sum_variance(science["energy_kev"], science["conv_x_mm"], science["conv_y_mm"],
                                   np.full(20_000, 2 / mu))
        qs.append(sums.q / sums.i)
        predicted.append(np.sqrt(var_q) / sums.i)
    # 60 realisations: relative error of the spread 9 %
    assert np.std(qs, ddof=1) == pytest.approx(np.mean(predicted), rel=0.3)


def test_energy_bins_of_broad_band_data():
    # one broad-band unpolarized run split into energy bins gives one node per bin at the bin's mean energy,
    # each matching the injected (energy-dependent) spurious modulation of the whole chip within errors
    rng = np.random.default_rng(64)
    energy = rng.uniform(2.0, 8.0, 600_000)
    run = events_with_spurious(rng, energy.size, energy)
    sm = measure_spurious_map([run], x_edges_mm=[-6, 6], y_edges_mm=[-6, 6], energy_edges_kev=[2, 4, 6, 8])
    assert sm.energy_kev == pytest.approx([3.0, 5.0, 7.0], abs=0.02)
    for k, lo in enumerate((2, 4, 6)):
        inside = (energy >= lo) & (energy < lo + 2)
        q_true, u_true = injected_spurious(energy[inside], run["conv_x_mm"][inside], run["conv_y_mm"][inside])
        assert abs(sm.q[k, 0, 0] - q_true.mean()) < 4 * sm.q_err[k, 0, 0]
        assert abs(sm.u[k, 0, 0] - u_true.mean()) < 4 * sm.u_err[k, 0, 0]
