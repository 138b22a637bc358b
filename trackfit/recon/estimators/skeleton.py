"""The skeleton emission-angle estimate for long tracks: the start and first direction from the track's centre line.

Long tracks (the argon design at 10-30 keV) curve and scatter; their first-pass axis follows the whole track, not
its first part. For such tracks this estimate (``docs/methods.md`` §11):

1. resamples the main cluster onto a square grid of half a pitch (each pixel's charge shared bilinearly between
   the four nearest grid nodes) and smooths it with a Gaussian of one pitch;
2. keeps the grid nodes above a small fraction of the maximum and thins them to a one-node-wide centre line with
   :func:`skimage.morphology.skeletonize`;
3. takes the longest path through the centre line (:func:`skimage.graph.pixel_graph` and two shortest-path
   searches of :mod:`scipy.sparse.csgraph`): its two ends are the candidates for the start;
4. the start is the end with the lower smoothed charge over the end quarter of the path (the other end holds the
   Bragg peak);
5. the conversion point is the path point one pitch inside the start; the emission angle is the second-pass axis
   of the hexagonal pixels about it (weights ``q exp(-D / length)``, ``length`` = 1.6 pitches), oriented along the
   path.

The centre line wins only for long, curled tracks: it is used when the path is at least :data:`MIN_PATH_PITCH`
pitches long and at least :data:`MIN_CURL` times the track's rms length ``sqrt(m2_major_mm2)`` (a straight track's
path is about 3.5 times its rms length). Every other track keeps the adaptive estimate
(:mod:`trackfit.recon.estimators.adaptive`), as do tracks with an rms length below :data:`MIN_SIZE_PITCH` pitches
(not searched) and tracks whose centre line has fewer than two nodes; ``skeleton_path_mm`` is 0 for them. The
estimate is Python and scikit-image per event: about a thousand times slower than the compiled estimates
(``benchmarks/bench_estimators.py``), hence opt-in. It needs the ``image`` extra (``pip install
"trackfit[image]"``).
"""

from __future__ import annotations

import math

import numpy as np

from ...events import EventBatch
from ..status import Status

__all__ = ["SkeletonEstimator", "skeleton_event", "SKELETON_COLUMNS", "MIN_SIZE_PITCH"]

#: tracks with an rms length sqrt(m2_major_mm2) below this many pitches are not searched
MIN_SIZE_PITCH = 3.0
#: the centre line is used for paths of at least this many pitches ...
MIN_PATH_PITCH = 20.0
#: ... that are at least this many times the rms length sqrt(m2_major_mm2) (curled tracks)
MIN_CURL = 3.9
#: grid step of the resampled image and Gaussian smoothing, in pitches
GRID_STEP_PITCH = 0.5
SMOOTHING_PITCH = 1.0
#: grid nodes above this fraction of the smoothed maximum form the track
SUPPORT_FRACTION = 0.03
#: the end segments compared to find the start: this fraction of the path, at least HEAD_MIN_PITCH
HEAD_FRACTION = 0.25
HEAD_MIN_PITCH = 2.0
#: conversion point: this far along the path from the start; second-pass length; orientation point
INSET_PITCH = 1.0
SECOND_PASS_PITCH = 1.6
ORIENTATION_PITCH = 6.0

SKELETON_COLUMNS = ("skeleton_emission_rad", "skeleton_conv_x_mm", "skeleton_conv_y_mm", "skeleton_path_mm",
                    "skeleton_status")


def _skimage():
    try:
        from skimage.graph import pixel_graph
        from skimage.morphology import skeletonize
    except ImportError:
        raise ImportError('the skeleton estimate needs scikit-image: pip install "trackfit[image]"') from None
    return skeletonize, pixel_graph


def _longest_path(graph):
    """Node indices of the longest shortest path of the largest connected part of a weighted graph."""
    from scipy.sparse.csgraph import connected_components, shortest_path

    n_parts, labels = connected_components(graph, directed=False)
    if n_parts > 1:
        keep = np.flatnonzero(labels == np.argmax(np.bincount(labels)))
        graph = graph[keep][:, keep]
    else:
        keep = np.arange(graph.shape[0])
    first = shortest_path(graph, directed=False, indices=0)
    a = int(np.argmax(np.where(np.isfinite(first), first, -1.0)))
    from_a, predecessors = shortest_path(graph, directed=False, indices=a, return_predecessors=True)
    b = int(np.argmax(np.where(np.isfinite(from_a), from_a, -1.0)))
    path = [b]
    while path[-1] != a:
        path.append(int(predecessors[path[-1]]))
    return keep[np.asarray(path[::-1])]


def skeleton_event(x_mm, y_mm, q, *, pitch_mm: float) -> dict | None:
    """Skeleton estimate of one track from the pixels of its main cluster.

    Parameters
    ----------
    x_mm, y_mm, q : array_like, shape (n,)
        Pixel centres (chip coordinates, mm) and signals of the main cluster.
    pitch_mm : float
        Pixel pitch.

    Returns
    -------
    dict or None
        ``skeleton_emission_rad`` (in (-pi, pi]), ``skeleton_conv_x_mm``, ``skeleton_conv_y_mm``,
        ``skeleton_path_mm`` (length of the centre line) and ``skeleton_status`` (0, or ``SECOND_PASS_FALLBACK``
        when the second pass is degenerate and the path direction is used); None when the centre line has fewer
        than two nodes.
    """
    from scipy import ndimage

    skeletonize, pixel_graph = _skimage()
    x, y, q = (np.asarray(v, dtype=np.float64) for v in (x_mm, y_mm, q))
    if x.size < 2 or not q.sum() > 0:
        return None
    step = GRID_STEP_PITCH * pitch_mm
    margin = 3.0 * pitch_mm
    x0, y0 = x.min() - margin, y.min() - margin
    nx = int(math.ceil((x.max() + margin - x0) / step)) + 2
    ny = int(math.ceil((y.max() + margin - y0) / step)) + 2
    image = np.zeros((ny, nx))
    fx, fy = (x - x0) / step, (y - y0) / step
    ix, iy = np.floor(fx).astype(np.int64), np.floor(fy).astype(np.int64)
    tx, ty = fx - ix, fy - iy
    for dx, wx in ((0, 1.0 - tx), (1, tx)):
        for dy, wy in ((0, 1.0 - ty), (1, ty)):
            np.add.at(image, (iy + dy, ix + dx), q * wx * wy)
    image = ndimage.gaussian_filter(image, SMOOTHING_PITCH / GRID_STEP_PITCH)
    centre_line = skeletonize(image > SUPPORT_FRACTION * image.max())
    if np.count_nonzero(centre_line) < 2:
        return None
    graph, nodes = pixel_graph(centre_line, connectivity=2, spacing=(step, step))
    order = _longest_path(graph)
    if order.size < 2:
        return None
    rows, columns = np.unravel_index(nodes[order], image.shape)
    path_x, path_y = x0 + columns * step, y0 + rows * step
    charge = image[rows, columns]
    arc = np.concatenate([[0.0], np.cumsum(np.hypot(np.diff(path_x), np.diff(path_y)))])
    length = float(arc[-1])
    segment = max(HEAD_FRACTION * length, HEAD_MIN_PITCH * pitch_mm)
    if charge[arc <= segment].mean() > charge[arc >= length - segment].mean():
        path_x, path_y = path_x[::-1], path_y[::-1]
        arc = length - arc[::-1]
    k_conv = min(int(np.searchsorted(arc, INSET_PITCH * pitch_mm)), arc.size - 1)
    k_orient = min(int(np.searchsorted(arc, ORIENTATION_PITCH * pitch_mm)), arc.size - 1)
    cx, cy = float(path_x[k_conv]), float(path_y[k_conv])
    ox, oy = float(path_x[k_orient] - path_x[0]), float(path_y[k_orient] - path_y[0])
    ex, ey = x - cx, y - cy
    w = q * np.exp(-np.hypot(ex, ey) / (SECOND_PASS_PITCH * pitch_mm))
    wsum = w.sum()
    status = int(Status.SECOND_PASS_FALLBACK)
    emission = math.atan2(oy, ox)
    if wsum > 0 and np.isfinite(wsum):
        sxx, syy, sxy = (w @ (ex * ex)) / wsum, (w @ (ey * ey)) / wsum, (w @ (ex * ey)) / wsum
        if math.hypot(0.5 * (sxx - syy), sxy) > 1e-9 * 0.5 * (sxx + syy):
            emission, status = 0.5 * math.atan2(2 * sxy, sxx - syy), 0
            if math.cos(emission) * ox + math.sin(emission) * oy < 0:
                emission += math.pi
    emission = math.atan2(math.sin(emission), math.cos(emission))
    if emission <= -math.pi:
        emission += 2 * math.pi
    return {"skeleton_emission_rad": emission, "skeleton_conv_x_mm": cx, "skeleton_conv_y_mm": cy,
            "skeleton_path_mm": length, "skeleton_status": status}


class SkeletonEstimator:
    """Runs :func:`skeleton_event` on the long tracks of a batch and keeps it for the long, curled ones.

    Parameters
    ----------
    grid : HexGrid
    min_size_pitch, min_path_pitch, min_curl : float
        See :data:`MIN_SIZE_PITCH`, :data:`MIN_PATH_PITCH`, :data:`MIN_CURL`.
    """

    name = "skeleton"

    def __init__(self, grid, *, min_size_pitch: float = MIN_SIZE_PITCH, min_path_pitch: float = MIN_PATH_PITCH,
                 min_curl: float = MIN_CURL):
        _skimage()  # fail early, naming the extra
        self.grid = grid
        self.min_size_pitch = float(min_size_pitch)
        self.min_path_pitch = float(min_path_pitch)
        self.min_curl = float(min_curl)

    def run(self, batch: EventBatch, signal: np.ndarray, main_mask: np.ndarray, status: np.ndarray,
            m2_major_mm2: np.ndarray, adaptive: dict) -> dict[str, np.ndarray]:
        """The skeleton columns of a batch (``adaptive``: the batch's adaptive columns)."""
        n = len(batch)
        out = {"skeleton_emission_rad": np.array(adaptive["adaptive_emission_rad"], dtype=np.float64),
               "skeleton_conv_x_mm": np.array(adaptive["adaptive_conv_x_mm"], dtype=np.float64),
               "skeleton_conv_y_mm": np.array(adaptive["adaptive_conv_y_mm"], dtype=np.float64),
               "skeleton_path_mm": np.zeros(n),
               "skeleton_status": np.array(adaptive["adaptive_status"], dtype=np.int64)}
        with np.errstate(invalid="ignore"):
            long_tracks = np.flatnonzero(((status & int(Status.NO_EMISSION)) == 0)
                                         & (np.sqrt(m2_major_mm2) >= self.min_size_pitch * self.grid.pitch_mm))
        for i in long_tracks:
            ev = batch.event(int(i))
            lo = int(batch.start[i])
            main = main_mask[lo:lo + len(ev.signal)] == 1
            result = skeleton_event(ev.x_mm[main], ev.y_mm[main], signal[lo:lo + len(ev.signal)][main],
                                    pitch_mm=self.grid.pitch_mm)
            if result is None:
                continue
            path = result["skeleton_path_mm"]
            if path >= self.min_path_pitch * self.grid.pitch_mm and path >= self.min_curl * math.sqrt(m2_major_mm2[i]):
                for name, value in result.items():
                    out[name][i] = value
        return out
