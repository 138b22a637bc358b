"""An independent recomputation of the first pass of the reconstruction, for the fuzz suite.

Written from the text of ``docs/methods.md`` §1 and §2 with numpy and scipy only; it shares no code with
``trackfit.recon`` (neither the kernel nor its plain-numpy twin) and does not use ``trackfit.HexGrid``:

* pixel centres: x = p·(c + ½·[row r is shifted]), y = (√3/2)·p·r, translated so that the centre of the chip is the
  origin (§1; the chip centre is taken as the centre of the bounding box of all pixel centres [derived]);
* a pixel takes part when its signal exceeds ``threshold_adc`` and it is not a listed bad pixel (§2 step 1);
* clusters are the connected components of the six-neighbour graph, neighbours being the pixels one pitch apart
  (§1: every pixel has six neighbours at distance p; the next ones are √3·p away [derived]), found here with
  ``scipy.spatial.cKDTree`` and ``scipy.sparse.csgraph.connected_components``;
* the main cluster is the one with the largest summed charge (§2 step 2); its summed signal is the pulse height
  (§2 step 7) and its charge-weighted centre the centroid (§2 step 3).

When several clusters tie for the largest charge the text does not say which is the track, so every tied cluster
is returned as a candidate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

__all__ = ["FirstPass", "first_pass", "chip_origin_mm", "check_first_pass"]


@dataclass(frozen=True)
class FirstPass:
    """First-pass values of one event; ``candidates`` holds one dict per main-cluster candidate."""

    n_hit: int
    n_clusters: int
    candidates: tuple


def _shifted(rows, shifted_rows: str):
    rows = np.asarray(rows, dtype=np.int64)
    return (rows % 2 == 1) if shifted_rows == "odd" else (rows % 2 == 0)


def chip_origin_mm(pitch_mm, n_columns, n_rows, shifted_rows):
    """Chip centre (centre of the bounding box of the pixel centres) before translation, mm."""
    rows_present = np.arange(min(int(n_rows), 2))
    half = 0.5 * _shifted(rows_present, shifted_rows)
    x_lo = pitch_mm * half.min()
    x_hi = pitch_mm * (n_columns - 1 + half.max())
    y_hi = math.sqrt(3.0) / 2.0 * pitch_mm * (n_rows - 1)
    return 0.5 * (x_lo + x_hi), 0.5 * y_hi


def _centres(columns, rows, pitch_mm, shifted_rows, origin):
    x = pitch_mm * (columns + 0.5 * _shifted(rows, shifted_rows)) - origin[0]
    y = math.sqrt(3.0) / 2.0 * pitch_mm * rows - origin[1]
    return x, y


def first_pass(signal, roi, *, pitch_mm, n_columns, n_rows, shifted_rows, threshold_adc, bad_pixels=()):
    """First pass of one event from its ROI pixels (row by row) - see the module docstring."""
    c0, r0, nc, nr = (int(v) for v in roi)
    image = np.asarray(signal, dtype=np.int64).reshape(nr, nc)
    rows, columns = np.meshgrid(np.arange(r0, r0 + nr), np.arange(c0, c0 + nc), indexing="ij")
    hit = image > threshold_adc
    for column, row in bad_pixels:
        if r0 <= row < r0 + nr and c0 <= column < c0 + nc:
            hit[row - r0, column - c0] = False
    q = image[hit].astype(np.float64)
    if not len(q):
        return FirstPass(0, 0, ())
    columns, rows = columns[hit], rows[hit]
    # the graph in units of the pitch (exact neighbours at distance 1, the next at sqrt(3))
    ux, uy = _centres(columns, rows, 1.0, shifted_rows, (0.0, 0.0))
    pairs = cKDTree(np.column_stack([ux, uy])).query_pairs(1.01, output_type="ndarray")
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(len(q), len(q)))
    n_clusters, labels = connected_components(graph, directed=False)
    charge = np.bincount(labels, weights=q, minlength=n_clusters)
    x, y = _centres(columns, rows, pitch_mm, shifted_rows,
                    chip_origin_mm(pitch_mm, n_columns, n_rows, shifted_rows))
    candidates = []
    for label in np.flatnonzero(charge == charge.max()):
        sel = labels == label
        total = q[sel].sum()
        candidates.append({"n_pixels": int(sel.sum()), "pulse_height": float(total), "peak_adc": int(q[sel].max()),
                           "centroid_x_mm": float((q[sel] * x[sel]).sum() / total),
                           "centroid_y_mm": float((q[sel] * y[sel]).sum() / total)})
    return FirstPass(int(len(q)), int(n_clusters), tuple(candidates))


def check_first_pass(rows, events, *, grid, threshold_adc, bad_pixels=(), no_signal_bit=2, malformed_bit=1):
    """Assert that the table rows of a batch hold the first pass this module recomputes.

    Parameters
    ----------
    rows : mapping of column name -> array
        The reconstruction's columns, one entry per event.
    events : sequence of (signal, roi, bad)
        The input events in order.
    grid : dict
        ``pitch_mm``, ``n_columns``, ``n_rows``, ``shifted_rows``.
    """
    assert len(rows["status"]) == len(events), f"{len(rows['status'])} rows for {len(events)} events"
    for i, (signal, roi, bad) in enumerate(events):
        status = int(rows["status"][i])
        if bad:
            assert status & malformed_bit, f"event {i}: a malformed input event without the MALFORMED_INPUT bit"
            continue
        assert not status & malformed_bit, f"event {i}: a well-formed event flagged MALFORMED_INPUT ({status})"
        expected = first_pass(signal, roi, threshold_adc=threshold_adc, bad_pixels=bad_pixels, **grid)
        assert int(rows["n_clusters"][i]) == expected.n_clusters, \
            f"event {i}: n_clusters {int(rows['n_clusters'][i])}, recomputed {expected.n_clusters}"
        if not expected.candidates:
            assert status & no_signal_bit, f"event {i}: nothing above threshold but no NO_SIGNAL bit ({status})"
            assert int(rows["n_pixels"][i]) == 0 and float(rows["pulse_height"][i]) == 0.0
            continue
        assert not status & (no_signal_bit | malformed_bit), f"event {i}: {status} for an event with signal"
        found = {name: rows[name][i] for name in ("n_pixels", "pulse_height", "peak_adc", "centroid_x_mm",
                                                  "centroid_y_mm")}
        assert any(_agrees(found, candidate, grid["pitch_mm"]) for candidate in expected.candidates), \
            f"event {i}: first pass {found}, recomputed {expected.candidates}"


def _agrees(found, expected, pitch_mm) -> bool:
    if int(found["n_pixels"]) != expected["n_pixels"] or int(found["peak_adc"]) != expected["peak_adc"]:
        return False
    # float32 columns: the sum of whole ADC counts is exact in float64, then rounded once to float32
    if float(found["pulse_height"]) != float(np.float32(expected["pulse_height"])):
        return False
    # a centroid rounded to float32 (relative 6e-8) of coordinates within the chip; tolerance 1e-6 pitch + 1e-6
    for axis in ("centroid_x_mm", "centroid_y_mm"):
        if not math.isclose(float(found[axis]), expected[axis], rel_tol=1e-6, abs_tol=1e-6 * pitch_mm):
            return False
    return True
