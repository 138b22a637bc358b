"""The measuring kernels against their plain-numpy twin (``trackfit.pixels._reference``: scipy.ndimage on the ROI
sheared into axial coordinates), and the clearance around tracks against ``HexGrid.hex_distance``."""

import numpy as np
import pytest

from trackfit import EventBatch, HexGrid
from trackfit.pixels import _kernels
from trackfit.pixels._reference import accumulate_samples_reference, collect_reference_samples_reference
from trackfit.recon._synthetic import toy_tracks


def _accumulators(grid, n_bins=40):
    return (np.zeros((grid.n_pixels, n_bins), np.uint32), np.full(grid.n_pixels, 2**31 - 1, np.int32),
            np.full(grid.n_pixels, -(2**31 - 1), np.int32), np.zeros(grid.n_pixels, np.int64))


def _batches(make_batch):
    grid = HexGrid(n_columns=60, n_rows=50, shifted_rows="even")
    tracks = toy_tracks(300, 7, grid=grid, noise_adc=3.0, roi_shape=(20, 18), centre_region_mm=1.0)
    junk = make_batch(300, 8, grid=grid, max_side=9)
    bad = EventBatch(roi=junk.roi, start=junk.start, signal=junk.signal, grid=grid,
                     bad=np.arange(len(junk)) % 7 == 0)
    return [tracks, bad, toy_tracks(200, 9, noise_adc=2.0, roi_shape=(25, 25))]


@pytest.mark.parametrize("clearance", [-1, 0, 1, 3])
@pytest.mark.parametrize("bin_width", [1, 3])
def test_accumulate_matches_reference(make_batch, clearance, bin_width):
    for batch in _batches(make_batch):
        grid = batch.grid
        reference = np.random.default_rng(1).integers(-3, 4, grid.n_pixels).astype(np.int32)
        parity = 1 if grid.shifted_rows == "odd" else 0
        kernel, twin = _accumulators(grid), _accumulators(grid)
        first_edge = -19 * bin_width
        _kernels.accumulate_samples(0, len(batch), batch.roi, batch.start, batch.signal, batch.bad, reference,
                                    grid.n_columns, grid.n_rows, parity, 9, clearance, first_edge, bin_width, *kernel)
        accumulate_samples_reference(batch, reference, 9, clearance, first_edge, bin_width, *twin)
        for a, b in zip(kernel, twin, strict=True):
            np.testing.assert_array_equal(a, b)
        assert kernel[0].sum() + kernel[3].sum() == sum(batch.n_pixels[i] for i in range(len(batch))
                                                        if not batch.bad[i])


def test_collect_matches_reference(make_batch):
    for batch in _batches(make_batch):
        grid = batch.grid
        store_k, count_k = np.zeros((grid.n_pixels, 5), np.int16), np.zeros(grid.n_pixels, np.int64)
        store_r, count_r = store_k.copy(), count_k.copy()
        _kernels.collect_reference_samples(0, len(batch), batch.roi, batch.start, batch.signal, batch.bad,
                                           grid.n_columns, grid.n_rows, store_k, count_k)
        collect_reference_samples_reference(batch, store_r, count_r)
        np.testing.assert_array_equal(count_k, count_r)
        np.testing.assert_array_equal(store_k, store_r)


@pytest.mark.parametrize("clearance", [0, 1, 2, 4])
@pytest.mark.parametrize("shifted", ["odd", "even"])
def test_clearance_is_the_hexagonal_distance_to_the_track(clearance, shifted):
    # two adjacent seed pixels (a track) in the middle of a large ROI; the skipped pixels are those within
    # `clearance` steps of either (HexGrid.hex_distance on the lattice), and an isolated spike is no track
    grid = HexGrid(n_columns=40, n_rows=40, shifted_rows=shifted)
    image = np.zeros((31, 31), np.int16)
    image[15, 15] = image[15, 16] = 100
    image[3, 3] = 100  # isolated: a hot pixel's spike, sampled like any other value
    batch = EventBatch.from_images([image], [(4, 5)], grid=grid)
    hist, low, high, near = _accumulators(grid)
    parity = 1 if shifted == "odd" else 0
    _kernels.accumulate_samples(0, 1, batch.roi, batch.start, batch.signal, batch.bad, np.zeros(grid.n_pixels,
                                np.int32), grid.n_columns, grid.n_rows, parity, 50, clearance, -19, 1, hist, low,
                                high, near)
    ev = batch.event(0)
    distance = np.minimum(grid.hex_distance(ev.columns, ev.rows, 4 + 15, 5 + 15),
                          grid.hex_distance(ev.columns, ev.rows, 4 + 16, 5 + 15))
    skipped = near.reshape(grid.shape)[ev.rows, ev.columns] == 1
    np.testing.assert_array_equal(skipped, distance <= clearance)
    assert high.reshape(grid.shape)[5 + 3, 4 + 3] == 100
