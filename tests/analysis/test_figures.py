"""Figures: each one draws what it says (labels in degrees at the user's edge) and saves a PNG."""

import numpy as np
import pytest

from trackfit.analysis import (
    cell_edges,
    figures,
    fit_fe55,
    fit_gain_drift,
    fit_gain_map,
    fit_modulation_factor_curve,
    measure_spurious_map,
    modulation_curve,
    stokes_parameters,
)
from trackfit.analysis.modfactor import ModulationFactorPoint

from .test_spectrum import fe55_pulse_heights
from .toys import modulated_angles


def test_all_figures(tmp_path):
    import matplotlib.pyplot as plt

    rng = np.random.default_rng(90)
    ph = fe55_pulse_heights(rng, 20_000)
    fit = fit_fe55(ph, range=(2900, 8800))
    fig = figures.plot_spectrum_fit(fit)
    assert fig.axes[0].get_xlabel().startswith("pulse height")
    figures.save_figure(fig, tmp_path / "spectrum.png")

    phi = modulated_angles(rng, 50_000, 0.3, 0.5)
    fig = figures.plot_modulation_curve(modulation_curve(phi))
    assert "deg" in fig.axes[0].get_xlabel() and fig.axes[0].get_xlim() == (-180, 180)
    figures.save_figure(fig, tmp_path / "modulation.png")

    result = stokes_parameters(phi, modulation_factor=0.5)
    fig = figures.plot_stokes_plane(result)
    mdp_line = [line for line in fig.axes[0].lines if line.get_label() == "MDP99"][0]
    assert np.hypot(*mdp_line.get_data()) == pytest.approx(result.mdp99)
    figures.save_figure(fig, tmp_path / "stokes.png")

    t = np.sort(rng.uniform(0, 100, ph.size))
    figures.save_figure(figures.plot_gain_drift(fit_gain_drift(t, ph, n_slices=6, model="spline")),
                        tmp_path / "drift.png")
    curve = fit_modulation_factor_curve([ModulationFactorPoint(energy_kev=e, value=v, error=0.01, n_events=1000)
                                         for e, v in ((2.7, 0.25), (3.7, 0.32), (5.9, 0.47))])
    figures.save_figure(figures.plot_modulation_factor(curve), tmp_path / "mu.png")
    run = {"emission_rad": phi[:20_000], "energy_kev": np.full(20_000, 5.9),
           "conv_x_mm": rng.uniform(-2, 2, 20_000), "conv_y_mm": rng.uniform(-2, 2, 20_000)}
    spurious = measure_spurious_map([run], x_edges_mm=cell_edges(-6, 6, 1.0), y_edges_mm=cell_edges(-6, 6, 1.0))
    fig = figures.plot_spurious_map(spurious)
    assert len(fig.axes) == 5  # Q_sp, U_sp, significance and two colour bars
    assert fig.axes[0].get_xlim() == pytest.approx((-2.2, 2.2))  # zoomed on the cells with data, not -6..6
    assert "significance" in fig.axes[4].get_ylabel() and "χ²" in fig.axes[2].get_title()
    figures.save_figure(fig, tmp_path / "spurious.png")
    x, y = rng.uniform(-2, 2, ph.size), rng.uniform(-2, 2, ph.size)
    gain = fit_gain_map(x, y, ph, x_edges_mm=cell_edges(-2, 2, 2.0), y_edges_mm=cell_edges(-2, 2, 2.0))
    fig = figures.plot_gain_map(gain)
    assert fig.axes[0].get_xlabel() == "centroid x [mm]"
    # a uniform gain measured with errors: the colour scale spans at least 5 median errors around 1, so the
    # statistical scatter does not fill it
    low, high = fig.axes[0].collections[0].get_clim()
    error = np.median(gain.relative_gain_err)
    assert high - 1 == pytest.approx(1 - low) and high - 1 >= 5 * error
    assert np.max(np.abs(gain.relative_gain - 1)) < 0.5 * (high - 1)
    figures.save_figure(fig, tmp_path / "gain.png")
    assert len(list(tmp_path.glob("*.png"))) == 7
    assert plt.get_fignums() == []  # save_figure closes
