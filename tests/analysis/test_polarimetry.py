"""measure_polarization: selection + background + bands + weights on one table."""

import numpy as np
import pytest

from trackfit.analysis import CircleRegion, StatusCut, measure_polarization

from .toys import modulated_angles


@pytest.fixture(scope="module")
def table():
    # a polarized source in a spot at the centre on top of a uniform, differently polarized background
    rng = np.random.default_rng(120)
    n_src, n_bkg = 80_000, 200_000
    mu = 0.4
    x = np.concatenate([rng.normal(0, 0.5, n_src), rng.uniform(-8, 8, n_bkg)])
    y = np.concatenate([rng.normal(0, 0.5, n_src), rng.uniform(-8, 8, n_bkg)])
    energy = rng.uniform(2, 8, x.size)
    phi = np.concatenate([modulated_angles(rng, n_src, mu * 0.5, np.deg2rad(20.0)),
                          modulated_angles(rng, n_bkg, mu * 0.4, np.deg2rad(-60.0))])
    return {"emission_rad": phi, "energy_kev": energy, "conv_x_mm": x, "conv_y_mm": y,
            "status": np.zeros(x.size, np.uint16), "m2_major_mm2": np.full(x.size, 2.0),
            "m2_minor_mm2": np.full(x.size, 1.0)}


def test_background_subtraction_per_band(table):
    # Kislat et al. 2015: Q_src = Q_on - r Q_off with r the area ratio (circle of 2.5 mm vs a ring-free square
    # region of the same background density)
    source = StatusCut() & CircleRegion(radius_mm=2.5)
    off = StatusCut() & CircleRegion(x_mm=5.0, y_mm=5.0, radius_mm=2.5)
    m = measure_polarization(table, selection=source, modulation_factor=0.4, background_selection=off,
                             background_scale=1.0, energy_bands_kev=[2, 5, 8])
    s = m.stokes
    assert abs(s.degree - 0.5) < 4 * s.degree_err and abs(s.angle_deg - 20) < 4 * s.angle_err_deg
    for band in m.bands.results:
        assert abs(band.degree - 0.5) < 4 * band.degree_err
        assert band.n_background > 0
    raw = measure_polarization(table, selection=source, modulation_factor=0.4)
    assert abs(raw.stokes.degree - 0.5) > 4 * raw.stokes.degree_err  # the background matters here
    assert "Background cut flow" in repr(m)


def test_user_weights_follow_the_rows(table):
    # weights given per table row are selected together with the rows: doubling every weight changes nothing
    # but N_eff; zero weight outside the spot equals the circle cut (Di Marco et al. 2022 weighted sums)
    inside = np.hypot(table["conv_x_mm"], table["conv_y_mm"]) < 2.5
    weighted = measure_polarization(table, modulation_factor=0.4, weighting=inside.astype(float))
    cut = measure_polarization(table, selection=CircleRegion(radius_mm=2.5), modulation_factor=0.4)
    assert weighted.stokes.q == pytest.approx(cut.stokes.q, rel=1e-9)
    assert weighted.stokes.q_err == pytest.approx(cut.stokes.q_err, rel=1e-9)
    with pytest.raises(ValueError, match="one value per table row"):
        measure_polarization(table, modulation_factor=0.4, weighting=np.ones(3))


def test_share_of_the_spurious_map_error_is_reported():
    # one map cell of error sigma_q holding every event, one modulation factor mu, no weights: the map adds
    # 2 sigma_q / mu to the error of Q (each event contributes 2 (cos 2phi - Q_sp) / mu, Rankin et al. 2022; the
    # map value is shared, so its error does not average out)
    from trackfit.analysis import Calibration, ModulationFactorCurve, SpuriousMap

    rng = np.random.default_rng(121)
    n = 40_000
    table = {"emission_rad": modulated_angles(rng, n, 0.2), "energy_kev": np.full(n, 5.0),
             "conv_x_mm": rng.uniform(-1, 1, n), "conv_y_mm": rng.uniform(-1, 1, n),
             "status": np.zeros(n, np.uint16)}
    edges = np.array([-2.0, 2.0])
    sigma = 0.004
    spurious = SpuriousMap(energy_kev=np.array([5.0]), x_edges_mm=edges, y_edges_mm=edges, q=np.zeros((1, 1, 1)),
                           u=np.zeros((1, 1, 1)), q_err=np.full((1, 1, 1), sigma), u_err=np.full((1, 1, 1), sigma),
                           counts=np.full((1, 1, 1), 1e5))
    curve = ModulationFactorCurve(coefficients=(0.4,), energy_range_kev=(5.0, 5.0))
    m = measure_polarization(table, calibration=Calibration(spurious_modulation=spurious, modulation_factor=curve))
    assert m.spurious_map_q_err == pytest.approx(2 * sigma / 0.4, rel=1e-6)
    share_q, _ = m.spurious_map_variance_share
    assert share_q == pytest.approx((2 * sigma / 0.4) ** 2 / m.stokes.q_err**2, rel=1e-6)
    text = repr(m)
    assert "of which spurious map" in text and f"{100 * share_q:.1f} %" in text
