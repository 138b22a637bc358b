"""Helpers for the reconstruction tests: events built from explicit pixel lists, lattice transforms, checks."""

import numpy as np

from trackfit import EventBatch, HexGrid
from trackfit.recon.status import Status

GRID = HexGrid()

#: float columns and the status bits that may explain a NaN in them
NAN_EXPLAINED_BY = {
    "centroid_x_mm": Status.MALFORMED_INPUT | Status.NO_SIGNAL,
    "centroid_y_mm": Status.MALFORMED_INPUT | Status.NO_SIGNAL,
    "conv_x_mm": Status.MALFORMED_INPUT | Status.NO_SIGNAL,
    "conv_y_mm": Status.MALFORMED_INPUT | Status.NO_SIGNAL,
    "m2_major_mm2": Status.MALFORMED_INPUT | Status.NO_SIGNAL,
    "m2_minor_mm2": Status.MALFORMED_INPUT | Status.NO_SIGNAL,
    "axis_rad": Status.NO_EMISSION,
    "m3_major_mm3": Status.NO_EMISSION,
    "emission_rad": Status.NO_EMISSION,
    "pulse_height": Status(0),
    "energy_kev": Status(0),
}


def batch_from_pixels(events, grid=GRID, margin=2):
    """One event per item of ``events``: a dict ``{(column, row): signal}``; ROI = bounding box + margin."""
    images, origins = [], []
    for pixels in events:
        cols = np.array([c for c, _ in pixels] or [grid.n_columns // 2])
        rows = np.array([r for _, r in pixels] or [grid.n_rows // 2])
        c0, r0 = cols.min() - margin, rows.min() - margin
        image = np.zeros((rows.max() - r0 + 1 + margin, cols.max() - c0 + 1 + margin), np.int16)
        for (c, r), v in pixels.items():
            image[r - r0, c - c0] = v
        images.append(image)
        origins.append((c0, r0))
    return EventBatch.from_images(images, origins, grid=grid)


def pixels_of(batch, i, threshold=0):
    """The ``{(column, row): signal}`` dict of event ``i`` (pixels above ``threshold``)."""
    ev = batch.event(i)
    keep = ev.signal > threshold
    return {(int(c), int(r)): int(v) for c, r, v in zip(ev.columns[keep], ev.rows[keep], ev.signal[keep],
                                                         strict=True)}


def transform_pixels(pixels, transform, grid=GRID):
    """Apply a lattice map ``(q, r) -> (q', r')`` (axial, about the pixel nearest the chip centre)."""
    cc, rc = grid.nearest_pixel(0.0, 0.0)
    qc, rcx = grid.to_axial(cc, rc)
    out = {}
    for (c, r), v in pixels.items():
        q, rr = grid.to_axial(c, r)
        q2, r2 = transform(int(q - qc), int(rr - rcx))
        c2, rr2 = grid.from_axial(q2 + qc, r2 + rcx)
        out[(int(c2), int(rr2))] = v
    return out


def rotate60(q, r):
    """Rotation by +60 degrees in cube coordinates: (q, r, s) -> (-r, -s, -q)."""
    s = -q - r
    return -r, -s


def invert(q, r):
    """Point reflection through the centre pixel (rotation by 180 degrees)."""
    return -q, -r


def angle_diff(a, b, period=2 * np.pi):
    """Signed difference a - b folded into [-period/2, period/2)."""
    return (np.asarray(a) - np.asarray(b) + period / 2) % period - period / 2


def assert_nan_explained(table):
    """Every NaN of every float column comes with a status bit that documents it."""
    status = table["status"].astype(np.int64)
    for name, bits in NAN_EXPLAINED_BY.items():
        nan = np.isnan(table[name])
        unexplained = nan & ((status & int(bits)) == 0)
        assert not unexplained.any(), (name, np.flatnonzero(unexplained)[:5], status[unexplained][:5])


def kernel_columns(batch, config=None):
    """The kernel's float64/int64 outputs by column name (the table stores float32)."""
    from trackfit.recon import ReconConfig
    from trackfit.recon._kernels import FLOAT_COLUMNS, INT_COLUMNS
    from trackfit.recon.pipeline import _Prepared

    out_f, out_i = _Prepared(config or ReconConfig(), batch.grid).run(batch)
    cols = {name: out_f[:, k] for k, name in enumerate(FLOAT_COLUMNS)}
    cols.update({name: out_i[:, k] for k, name in enumerate(INT_COLUMNS)})
    return cols
