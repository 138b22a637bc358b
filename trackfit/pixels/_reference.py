"""Plain-numpy twin of the pixel-map kernels, one event at a time (private; for tests).

Written the way a user would by hand: the ROI is sheared into axial coordinates, where the hexagonal 6-neighbour
graph is an ordinary image graph with the structure :data:`HEX_STRUCTURE`; ``scipy.ndimage`` finds the pixels with
a neighbour above the seed threshold (a convolution with the ring of six) and widens the tracks by the clearance
(``binary_dilation``). It follows the rules of :mod:`trackfit.pixels._kernels` but shares no code with it.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__ = ["collect_reference_samples_reference", "accumulate_samples_reference", "HEX_STRUCTURE"]

#: 6-neighbour structure in axial coordinates, indexed [dr + 1, dq + 1]
HEX_STRUCTURE = np.array([[0, 1, 1], [1, 1, 1], [1, 1, 0]], dtype=bool)
_RING = HEX_STRUCTURE & ~np.array([[0, 0, 0], [0, 1, 0], [0, 0, 0]], dtype=bool)


def _usable(batch, i):
    c0, r0, nc, nr = (int(v) for v in batch.roi[i])
    grid = batch.grid
    return (not batch.bad[i] and c0 >= 0 and r0 >= 0 and c0 + nc <= grid.n_columns and r0 + nr <= grid.n_rows
            and nc * nr == batch.start[i + 1] - batch.start[i])


def _pixel_index(batch, i):
    c0, r0, nc, nr = (int(v) for v in batch.roi[i])
    rows, columns = np.divmod(np.arange(nc * nr), max(nc, 1))
    return (rows + r0) * batch.grid.n_columns + columns + c0


def collect_reference_samples_reference(batch, store, count):
    """Same contract as :func:`trackfit.pixels._kernels.collect_reference_samples` over the whole batch."""
    capacity = store.shape[1]
    for i in range(len(batch)):
        if not _usable(batch, i):
            continue
        pixels = _pixel_index(batch, i)
        values = batch.signal[batch.start[i]:batch.start[i + 1]]
        slot = count[pixels]
        keep = slot < capacity
        store[pixels[keep], slot[keep]] = values[keep]
        count[pixels] += 1


def _near_tracks(rel, batch, i, seed_threshold, clearance):
    """Boolean ROI image of the pixels within ``clearance`` steps of a track pixel."""
    c0, r0, nc, nr = (int(v) for v in batch.roi[i])
    grid = batch.grid
    rows = np.arange(r0, r0 + nr)
    q_first = grid.to_axial(np.full(nr, c0), rows)[0]
    shift = q_first - q_first.min()
    width = nc + int(shift.max(initial=0))
    rr, cc = np.divmod(np.arange(nc * nr), max(nc, 1))
    above = np.zeros((nr, width), dtype=bool)
    inside = np.zeros((nr, width), dtype=bool)
    above[rr, cc + shift[rr]] = rel > seed_threshold
    inside[rr, cc + shift[rr]] = True
    has_neighbour = ndimage.convolve(above.astype(np.int32), _RING.astype(np.int32), mode="constant") > 0
    near = above & has_neighbour
    if clearance > 0 and near.any():
        # widened one step at a time inside the ROI only (the kernel's search never leaves the ROI)
        near = ndimage.binary_dilation(near, structure=HEX_STRUCTURE, iterations=clearance, mask=inside)
    return near[rr, cc + shift[rr]]


def accumulate_samples_reference(batch, reference, seed_threshold, clearance, first_edge, bin_width, hist, low, high,
                                 near_track):
    """Same contract as :func:`trackfit.pixels._kernels.accumulate_samples` over the whole batch."""
    n_bins = hist.shape[1]
    for i in range(len(batch)):
        if not _usable(batch, i):
            continue
        pixels = _pixel_index(batch, i)
        values = batch.signal[batch.start[i]:batch.start[i + 1]].astype(np.int64)
        rel = values - reference[pixels]
        if clearance >= 0:
            skip = _near_tracks(rel, batch, i, seed_threshold, clearance)
            np.add.at(near_track, pixels[skip], 1)
            pixels, values, rel = pixels[~skip], values[~skip], rel[~skip]
        bins = np.clip(np.floor_divide(rel - first_edge, bin_width) + 1, 0, n_bins - 1)
        np.add.at(hist, (pixels, bins), 1)
        np.minimum.at(low, pixels, values)
        np.maximum.at(high, pixels, values)
