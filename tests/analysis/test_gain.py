"""Gain map and gain versus time (docs/methods.md section 6)."""

import numpy as np
import pytest

from trackfit.analysis import cell_edges, fit_gain_drift, fit_gain_map

from .test_spectrum import fe55_pulse_heights


def injected_gain(x, y):
    return 1.0 + 0.12 * np.sin(x / 2.5) + 0.06 * y / 4.0


def test_gain_map_recovers_injected_pattern():
    # toy study: cells of 2 mm over 8 x 8 mm, 16 cells of ~3000 events; pulls of the fitted relative
    # gain about the injected pattern (normalised to the same reference) are standard normal
    rng = np.random.default_rng(50)
    n = 48_000
    x, y = rng.uniform(-4, 4, n), rng.uniform(-4, 4, n)
    ph = fe55_pulse_heights(rng, n) * injected_gain(x, y)
    edges = cell_edges(-4, 4, 2.0)
    gain = fit_gain_map(x, y, ph, x_edges_mm=edges, y_edges_mm=edges, min_counts=500)
    assert gain.n_measured == 16
    centres = 0.5 * (edges[1:] + edges[:-1])
    cx, cy = np.meshgrid(centres, centres, indexing="ij")
    # the mean of the injected gain over each cell (fine grid average)
    fine = np.linspace(-0.9375, 0.9375, 16)
    truth = np.mean([injected_gain(cx + dx, cy + dy) for dx in fine for dy in fine], axis=0)
    ratio = gain.relative_gain / truth
    pulls = (ratio / np.average(ratio, weights=gain.relative_gain_err**-2) - 1) / gain.relative_gain_err
    assert abs(pulls.mean()) < 4 / np.sqrt(16)
    assert 0.5 < pulls.std() < 1.6
    # precision per cell (docs/methods.md section 6 [derived]): 0.0764 / sqrt(N) for 18 % FWHM, +blend and background
    assert np.median(gain.relative_gain_err) == pytest.approx(0.0764 / np.sqrt(3000), rel=0.3)
    # the correction removes most of the event-by-event gain variation (what remains is inside the cells)
    residual = gain.correct(ph, x, y) / ph * injected_gain(x, y)
    assert np.std(residual) < 0.4 * np.std(injected_gain(x, y))


def test_gain_map_minimum_counts_and_outside():
    rng = np.random.default_rng(51)
    n = 6000
    x = np.concatenate([rng.uniform(0, 1, n), rng.uniform(1, 2, 100)])
    y = rng.uniform(0, 1, x.size)
    ph = fe55_pulse_heights(rng, x.size)
    gain = fit_gain_map(x, y, ph, x_edges_mm=[0, 1, 2], y_edges_mm=[0, 1], min_counts=300)
    assert np.isfinite(gain.relative_gain[0, 0]) and np.isnan(gain.relative_gain[1, 0])
    assert gain.counts[1, 0] == 100
    # unmeasured cells, positions outside the map and NaN positions are applied as gain 1
    assert gain.gain_at([1.5, 5.0, np.nan], [0.5, 0.5, 0.5]).tolist() == [1.0, 1.0, 1.0]
    assert "GainMap" in repr(gain)
    with pytest.raises(ValueError, match="min_counts"):
        fit_gain_map(x, y, ph, x_edges_mm=[0, 1, 2], y_edges_mm=[0, 1], min_counts=10**6)


@pytest.mark.parametrize("model", ["charging", "spline"])
def test_gain_drift_recovers_charging_curve(model):
    # charging-up of the multiplier (Kumar et al. 2020; model form of docs/methods.md section 6):
    # G(t) = 1 - 0.08 (1 - exp(-t / 300 s)); the fitted relative gain follows the injected one to < 0.5 %
    rng = np.random.default_rng(52)
    n = 60_000
    t = np.sort(rng.uniform(0, 2000, n))
    truth = 1 - 0.08 * (1 - np.exp(-t / 300))
    ph = fe55_pulse_heights(rng, n) * truth
    drift = fit_gain_drift(t, ph, n_slices=15, model=model)
    ratio = drift.gain_at(t) / (truth / truth.mean())
    assert np.max(np.abs(ratio - 1)) < 0.005
    if model == "charging":
        assert drift.parameters["tau_s"] == pytest.approx(300, rel=0.3)
        assert drift.parameters["depth"] == pytest.approx(0.08, abs=0.015)
    corrected = drift.correct(ph, t)
    early, late = corrected[t < 200], corrected[t > 1500]
    assert abs(np.median(early) / np.median(late) - 1) < 0.01  # uncorrected: 6 %


def test_gain_drift_input_checks():
    with pytest.raises(ValueError, match="n_slices"):
        fit_gain_drift(np.arange(10.0), np.ones(10), n_slices=2)
    with pytest.raises(ValueError, match="50 events per slice"):
        fit_gain_drift(np.arange(100.0), np.ones(100), n_slices=10)
