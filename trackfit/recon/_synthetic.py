"""Toy tracks for the tests and benchmarks of the reconstruction (private; not physics: use ``trackfit.simulate``).

A track is a straight segment from a start point at a given angle; its ionisation density rises towards the end
(a Bragg-like profile ``0.3 + t**2`` for ``t`` from 0 at the start to 1 at the end). Electrons are drawn along the
segment, spread by a Gaussian diffusion, collected by the hexagonal pixel containing them, and pixel noise is added.
Everything is vectorised over events.
"""

from __future__ import annotations

import numpy as np

from ..events import EventBatch
from ..hexgrid import HexGrid

__all__ = ["toy_tracks"]


def toy_tracks(n, rng, *, grid=None, length_mm=0.5, diffusion_mm=0.02, n_electrons=600, adc_per_electron=3.0,
               noise_adc=2.0, roi_shape=(28, 27), angle_rad=None, start_mm=None, centre_region_mm=3.0):
    """Draw ``n`` toy tracks.

    Parameters
    ----------
    n : int
    rng : numpy.random.Generator or seed
    grid : HexGrid, optional
    length_mm, diffusion_mm : float
        Segment length and Gaussian spread of each electron.
    n_electrons : int
        Electrons per track (a fixed number; the rising profile decides where they go).
    adc_per_electron, noise_adc : float
        Signal per electron and the standard deviation of the pixel noise, ADC counts (default noise 2: 50
        electrons at 25 electrons per count, the simulator's readout defaults).
    roi_shape : (n_columns, n_rows)
        Size of the rectangular ROI, centred on the middle of the segment.
    angle_rad : float or array, optional
        Direction from start to end (default uniform in (-pi, pi]).
    start_mm : (x, y) arrays, optional
        Start points (default uniform in a square of side ``centre_region_mm`` around the chip centre).

    Returns
    -------
    EventBatch
        With truth columns ``angle_rad``, ``start_x_mm``, ``start_y_mm``, ``end_x_mm``, ``end_y_mm``.
    """
    rng = np.random.default_rng(rng)
    grid = grid or HexGrid()
    nc, nr = (int(v) for v in roi_shape)
    if angle_rad is None:
        angle = -rng.uniform(-np.pi, np.pi, n)  # (-pi, pi]
    else:
        angle = np.broadcast_to(np.asarray(angle_rad, dtype=np.float64), (n,)).copy()
    if start_mm is None:
        half = centre_region_mm / 2
        sx, sy = rng.uniform(-half, half, n), rng.uniform(-half, half, n)
    else:
        sx = np.broadcast_to(np.asarray(start_mm[0], np.float64), (n,)).copy()
        sy = np.broadcast_to(np.asarray(start_mm[1], np.float64), (n,)).copy()
    ux, uy = np.cos(angle), np.sin(angle)
    ex, ey = sx + length_mm * ux, sy + length_mm * uy

    # position along the track: density 0.3 + t^2 on [0, 1] (mixture of uniform and 3 t^2)
    p_uniform = 0.3 / (0.3 + 1.0 / 3.0)
    u = rng.random((n, n_electrons))
    t = np.where(rng.random((n, n_electrons)) < p_uniform, u, np.cbrt(u))
    x = sx[:, None] + length_mm * t * ux[:, None] + rng.normal(0, diffusion_mm, (n, n_electrons))
    y = sy[:, None] + length_mm * t * uy[:, None] + rng.normal(0, diffusion_mm, (n, n_electrons))
    col, row = grid.nearest_pixel(x, y)

    mid_col, mid_row = grid.nearest_pixel((sx + ex) / 2, (sy + ey) / 2)
    c0 = np.clip(mid_col - nc // 2, 0, grid.n_columns - nc)
    r0 = np.clip(mid_row - nr // 2, 0, grid.n_rows - nr)
    lc, lr = col - c0[:, None], row - r0[:, None]
    inside = (lc >= 0) & (lc < nc) & (lr >= 0) & (lr < nr)
    area = nc * nr
    flat = (np.arange(n)[:, None] * area + lr * nc + lc)[inside]
    counts = np.bincount(flat, minlength=n * area).astype(np.float64)
    signal = counts * adc_per_electron + rng.normal(0, noise_adc, n * area)
    signal = np.clip(np.rint(signal), -32768, 32767).astype(np.int16)
    roi = np.column_stack([c0, r0, np.full(n, nc), np.full(n, nr)]).astype(np.int32)
    start = np.arange(n + 1, dtype=np.int64) * area
    truth = {"angle_rad": angle, "start_x_mm": sx, "start_y_mm": sy, "end_x_mm": ex, "end_y_mm": ey}
    return EventBatch(roi=roi, start=start, signal=signal, time_s=np.arange(n) * 1e-3, grid=grid, truth=truth)
