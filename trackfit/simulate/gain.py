"""Gain model of the multiplier: where on the chip and when the avalanche gain differs from its nominal value.

The relative gain of an electron collected at pixel p at time t is ``g_map[p] * g_drift(t)``:

* :func:`pixel_gain_map` - a per-pixel map of mean 1: a smooth large-scale variation (white noise low-pass
  filtered with a Gaussian of ``gain_map_scale_mm``, scaled to the relative RMS ``gain_map_rms``) times an
  optional cell structure (independent relative deviations of RMS ``gain_cell_rms`` on square cells of
  ``gain_cell_mm``, as a multiplier made of separately powered or separately manufactured patches would show).
* :func:`gain_drift_factor` - the slow fall of the gain while the multiplier's dielectric charges up towards an
  equilibrium, ``1 - δ (1 - exp(-t / τ))`` (``gain_drift_fraction`` δ, ``gain_drift_time_s`` τ).

The single-electron avalanche spread (Polya law, ``polya_theta``) is applied per pixel in the event kernel on
top of these. Both the map (``/simulation/pixel_gain`` of the output file) and the value at each event
(``gain_relative`` truth column) are recorded, so gain-map and gain-drift calibrations can be checked against
the truth.

References
----------
Alkhazov 1970, NIM 89, 155 (Polya avalanche statistics). Charging of the multiplier: docs/methods.md §6.
"""

from __future__ import annotations

import functools

import numpy as np

__all__ = ["pixel_gain_map", "gain_drift_factor", "MIN_RELATIVE_GAIN"]

#: the map is clipped at this relative gain (a pixel never loses all gain in the model)
MIN_RELATIVE_GAIN = 0.05


def _smooth_field(grid, scale_mm: float, rng) -> np.ndarray:
    """White noise low-pass filtered with a Gaussian of ``scale_mm`` (periodic, in Fourier space), mean 0, RMS 1."""
    from scipy.ndimage import fourier_gaussian

    noise = rng.standard_normal(grid.shape)
    sigma = (scale_mm / grid.row_pitch_mm, scale_mm / grid.pitch_mm)
    spectrum = fourier_gaussian(np.fft.rfft2(noise), sigma=sigma, n=noise.shape[1])
    field_ = np.fft.irfft2(spectrum, s=noise.shape)
    return (field_ - field_.mean()) / field_.std()


def _cell_field(grid, cell_mm: float, rng) -> np.ndarray:
    """Independent standard-normal values on square cells of ``cell_mm``, sampled at the pixel centres."""
    columns, rows = np.meshgrid(np.arange(grid.n_columns), np.arange(grid.n_rows))
    x_mm, y_mm = grid.pixel_centre_mm(columns, rows)
    x0, _, y0, _ = grid.extent_mm
    ix = np.floor((x_mm - x0) / cell_mm).astype(np.int64)
    iy = np.floor((y_mm - y0) / cell_mm).astype(np.int64)
    values = rng.standard_normal((int(iy.max()) + 1, int(ix.max()) + 1))
    return values[iy, ix]


def pixel_gain_map(config, rng=None) -> np.ndarray | None:
    """Relative gain of every pixel, shape ``(n_rows, n_columns)``; ``None`` when the gain is uniform.

    The map is a property of the detector, not of a run: by default it is drawn from its own generator seeded
    with ``multiplier.gain_map_seed``, so every run of a config (whatever its seed) sees the same map, and a
    gain map calibrated on one run applies to the others.

    Parameters
    ----------
    config : SimConfig
        Uses ``config.multiplier`` (``gain_map_rms``, ``gain_map_scale_mm``, ``gain_cell_rms``,
        ``gain_cell_mm``, ``gain_map_seed``) and the chip of ``config.readout``.
    rng : numpy.random.Generator, optional
        Draw the map from this generator instead (studies of many detectors).

    Returns
    -------
    ndarray or None
        ``(1 + gain_map_rms * s) * (1 + gain_cell_rms * c)`` with ``s`` the smooth field and ``c`` the cell
        field (each of mean 0 and RMS 1 over the chip; the cell field has RMS 1 in expectation), clipped at
        :data:`MIN_RELATIVE_GAIN`. The smooth part is drawn first, so adding cells does not change it. The
        detector's own map (no ``rng``) is computed once per process and returned read-only.
    """
    m = config.multiplier
    if m.gain_map_rms == 0 and m.gain_cell_rms == 0:
        return None
    if rng is None:              # the detector's own map: the same for every run, computed once per process
        return _detector_map(config.grid, m.gain_map_rms, m.gain_map_scale_mm, m.gain_cell_rms, m.gain_cell_mm,
                             m.gain_map_seed)
    return _draw_map(config.grid, m.gain_map_rms, m.gain_map_scale_mm, m.gain_cell_rms, m.gain_cell_mm, rng)


@functools.lru_cache(maxsize=8)
def _detector_map(grid, rms, scale_mm, cell_rms, cell_mm, seed) -> np.ndarray:
    gain = _draw_map(grid, rms, scale_mm, cell_rms, cell_mm, np.random.default_rng(seed))
    gain.flags.writeable = False
    return gain


def _draw_map(grid, rms, scale_mm, cell_rms, cell_mm, rng) -> np.ndarray:
    gain = np.ones(grid.shape)
    if rms > 0:
        gain *= 1.0 + rms * _smooth_field(grid, scale_mm, rng)
    if cell_rms > 0:
        gain *= 1.0 + cell_rms * _cell_field(grid, cell_mm, rng)
    return np.clip(gain, MIN_RELATIVE_GAIN, None)


def gain_drift_factor(config, time_s) -> np.ndarray:
    """Relative gain at the event times: ``1 - gain_drift_fraction * (1 - exp(-t / gain_drift_time_s))``."""
    m = config.multiplier
    return 1.0 - m.gain_drift_fraction * -np.expm1(-np.asarray(time_s, dtype=np.float64) / m.gain_drift_time_s)
