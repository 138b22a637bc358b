"""Numba kernels of the pixel-map measurement (private: use :func:`trackfit.pixels.measure_pixel_map`).

Two passes over batches of raw events, each a kernel that walks the events of a batch once and adds to chip-sized
accumulators:

* :func:`collect_reference_samples` keeps the first samples of every pixel (a coarse pedestal is taken from them
  when the file is not pedestal-subtracted);
* :func:`accumulate_samples` finds the tracks of each event (pixels above a seed threshold with a neighbour above
  it too), skips every pixel within a clearance of them, and histograms the value of every other pixel relative to
  its reference, keeping the smallest and largest value seen.

Events that are flagged bad or whose ROI leaves the chip are skipped. The plain-numpy twin of both kernels is
:mod:`trackfit.pixels._reference`; tests compare them.
"""

from __future__ import annotations

import numpy as np

from .._jit import jit

__all__ = ["collect_reference_samples", "accumulate_samples", "FAR"]

#: distance written for pixels farther than the clearance from every track pixel
FAR = 1 << 30


@jit
def _on_chip(c0, r0, nc, nr, n_columns, n_rows):
    return c0 >= 0 and r0 >= 0 and nc >= 0 and nr >= 0 and c0 + nc <= n_columns and r0 + nr <= n_rows


@jit
def collect_reference_samples(lo, hi, roi, start, signal, bad, n_columns, n_rows, store, count):
    """Append the values of events ``lo <= i < hi`` to the per-pixel stores until each holds ``store.shape[1]``.

    Parameters
    ----------
    roi : int32 (N, 4); start : int64 (N + 1,); signal : int16 (M,); bad : bool (N,)
    n_columns, n_rows : int
    store : int16 (n_pixels, K)
        Row ``p`` receives the first K values of pixel ``p`` (pixel index ``row * n_columns + column``).
    count : int64 (n_pixels,)
        Values seen so far per pixel (also beyond K).
    """
    capacity = store.shape[1]
    for i in range(lo, hi):
        c0 = roi[i, 0]
        r0 = roi[i, 1]
        nc = roi[i, 2]
        nr = roi[i, 3]
        s0 = start[i]
        if bad[i] or not _on_chip(c0, r0, nc, nr, n_columns, n_rows) or nc * nr != start[i + 1] - s0:
            continue
        for rr in range(nr):
            base = (r0 + rr) * n_columns + c0
            for cc in range(nc):
                p = base + cc
                m = count[p]
                if m < capacity:
                    store[p, m] = signal[s0 + rr * nc + cc]
                count[p] = m + 1


@jit
def _neighbour(k, j, nc, nr, row0, parity):
    """ROI index of the j-th neighbour (0..5) of ROI pixel k, or -1 outside the ROI."""
    rr = k // nc
    cc = k - rr * nc
    if j == 0:
        return k - 1 if cc > 0 else -1
    if j == 1:
        return k + 1 if cc < nc - 1 else -1
    # rows above and below: columns (c, c + 1) seen from a shifted row, (c - 1, c) otherwise
    ca = cc if ((row0 + rr) & 1) == parity else cc - 1
    cn = ca if (j == 2 or j == 4) else ca + 1
    rn = rr - 1 if j < 4 else rr + 1
    if cn < 0 or cn >= nc or rn < 0 or rn >= nr:
        return -1
    return rn * nc + cn


@jit
def accumulate_samples(lo, hi, roi, start, signal, bad, reference, n_columns, n_rows, parity, seed_threshold,
                       clearance, first_edge, bin_width, hist, low, high, near_track):
    """Histogram the noise samples of events ``lo <= i < hi``.

    Parameters
    ----------
    roi : int32 (N, 4); start : int64 (N + 1,); signal : int16 (M,); bad : bool (N,)
    reference : int32 (n_pixels,)
        Per-pixel reference the values are taken relative to (0 for pedestal-subtracted files).
    n_columns, n_rows, parity : int
        Chip size; the row parity that is shifted by half a pitch (1: odd rows).
    seed_threshold : int
        A pixel whose value minus reference is > this is a seed candidate.
    clearance : int
        Pixels within this many steps of a track pixel (a seed candidate with a seed-candidate neighbour) are not
        sampled; a negative value samples every pixel (random-trigger runs).
    first_edge, bin_width : int
        Regular bin ``j`` (1 <= j <= n_bins - 2) holds relative values ``first_edge + (j - 1) * bin_width`` to
        ``first_edge + j * bin_width - 1``; bin 0 the values below, bin ``n_bins - 1`` those above.
    hist : uint32 (n_pixels, n_bins)
    low, high : int32 (n_pixels,)
        Smallest and largest raw value sampled (initialise to +/- large).
    near_track : int64 (n_pixels,)
        Values skipped because they were within the clearance of a track.
    """
    n_bins = hist.shape[1]
    max_area = 1
    for i in range(lo, hi):
        area = start[i + 1] - start[i]
        if area > max_area:
            max_area = area
    rel = np.empty(max_area, np.int32)
    above = np.empty(max_area, np.uint8)
    dist = np.empty(max_area, np.int32)
    queue = np.empty(max_area, np.int32)
    for i in range(lo, hi):
        c0 = roi[i, 0]
        r0 = roi[i, 1]
        nc = roi[i, 2]
        nr = roi[i, 3]
        s0 = start[i]
        area = nc * nr
        if bad[i] or not _on_chip(c0, r0, nc, nr, n_columns, n_rows) or area != start[i + 1] - s0:
            continue
        for rr in range(nr):
            base = (r0 + rr) * n_columns + c0
            for cc in range(nc):
                k = rr * nc + cc
                rel[k] = np.int32(signal[s0 + k]) - reference[base + cc]
        if clearance >= 0:
            for k in range(area):
                above[k] = 1 if rel[k] > seed_threshold else 0
                dist[k] = FAR
            tail = 0
            for k in range(area):
                if above[k]:
                    for j in range(6):
                        q = _neighbour(k, j, nc, nr, r0, parity)
                        if q >= 0 and above[q]:
                            dist[k] = 0
                            queue[tail] = k
                            tail += 1
                            break
            head = 0
            while head < tail:
                k = queue[head]
                head += 1
                d = dist[k] + 1
                if d > clearance:
                    continue
                for j in range(6):
                    q = _neighbour(k, j, nc, nr, r0, parity)
                    if q >= 0 and dist[q] == FAR:
                        dist[q] = d
                        queue[tail] = q
                        tail += 1
        for rr in range(nr):
            base = (r0 + rr) * n_columns + c0
            for cc in range(nc):
                k = rr * nc + cc
                p = base + cc
                if clearance >= 0 and dist[k] <= clearance:
                    near_track[p] += 1
                    continue
                r = rel[k]
                if r < first_edge:
                    b = 0
                else:
                    b = (r - first_edge) // bin_width + 1
                    if b > n_bins - 1:
                        b = n_bins - 1
                hist[p, b] += 1
                v = signal[s0 + k]
                if v < low[p]:
                    low[p] = v
                if v > high[p]:
                    high[p] = v
