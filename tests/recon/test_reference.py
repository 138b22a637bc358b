"""The numba kernel against its plain-numpy twin (``trackfit.recon._reference``, numpy + ``scipy.ndimage.label``
on the ROI sheared into axial coordinates), and the 6-neighbour clustering against ``HexGrid.neighbours`` with
``scipy.sparse.csgraph.connected_components`` (outside reference: scipy's graph components)."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from recon_helpers import kernel_columns
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from trackfit import EventBatch, HexGrid, ReconConfig
from trackfit.recon._kernels import FLOAT_COLUMNS, INT_COLUMNS
from trackfit.recon._reference import reconstruct_batch_reference
from trackfit.recon._synthetic import toy_tracks
from trackfit.recon.status import Status


def assert_same(kernel, reference, atol=1e-9):
    # an axis along y may come out as pi/2 on one side and -pi/2 + 1e-16 on the other (round-off at the wrap of
    # (-pi/2, pi/2]): the same axis, with the opposite orientation, so m3_major_mm3 changes sign with it
    flipped = np.abs(kernel["axis_rad"] - reference["axis_rad"]) > np.pi / 2
    for name in FLOAT_COLUMNS:
        a, b = kernel[name], reference[name]
        assert np.array_equal(np.isnan(a), np.isnan(b)), name
        if name == "m3_major_mm3":
            b = np.where(flipped, -b, b)
        finite = ~np.isnan(a)
        diff = np.abs(a[finite] - b[finite])
        if name == "emission_rad":  # -pi and pi are the same direction
            diff = np.minimum(diff, np.abs(diff - 2 * np.pi))
            # without skewness the emission angle is the axis, whose orientation is arbitrary (documented)
            arbitrary = (flipped & ((kernel["status"] & Status.NO_SKEWNESS) != 0))[finite]
            diff[arbitrary] = np.minimum(diff[arbitrary], np.abs(diff[arbitrary] - np.pi))
        if name == "axis_rad":
            diff = np.minimum(diff, np.abs(diff - np.pi))
            assert np.all(diff[flipped[finite]] < 1e-12), "a flip away from the wrap at +-pi/2"
        assert diff.max(initial=0) <= atol, (name, np.flatnonzero(finite)[np.argmax(diff)], diff.max())
    for name in INT_COLUMNS:
        assert np.array_equal(kernel[name], reference[name]), (name, np.flatnonzero(kernel[name] != reference[name]))


def _mixed_batch(make_batch):
    """Toy tracks (both row parities, noisy, with pile-up of two tracks) and random junk events."""
    tracks = toy_tracks(1500, 21, diffusion_mm=0.04, noise_adc=8)
    noisy = toy_tracks(800, 22, grid=HexGrid(shifted_rows="even"), length_mm=0.2, noise_adc=12, roi_shape=(16, 15))
    pile = toy_tracks(400, 23, roi_shape=(30, 30), centre_region_mm=0.2)
    pile2 = toy_tracks(400, 24, roi_shape=(30, 30), centre_region_mm=0.2)
    pile = EventBatch(roi=pile.roi, start=pile.start, signal=pile.signal + pile2.signal, grid=pile.grid)
    junk = make_batch(800, 25, grid=HexGrid(), max_side=10)
    return [tracks, noisy, pile, junk]


CONFIGS = [
    ReconConfig(),
    ReconConfig(second_pass_centre="weighted_centroid", start_search_inner_rms=1.0, start_search_outer_rms=4.0,
                second_pass_length_mm=0.08),
    ReconConfig(threshold_adc=35.5, min_pixels=10, saturation_adc=300, bad_pixels=[(150, 176), (151, 176)]),
    ReconConfig(threshold_adc=0, min_pixels=1, second_pass_length_mm=0.02),
]


@pytest.mark.parametrize("config", CONFIGS, ids=["default", "centroid-centre", "mask", "no-threshold"])
def test_kernel_matches_reference_on_thousands_of_events(config, make_batch):
    for batch in _mixed_batch(make_batch):
        assert_same(kernel_columns(batch, config), reconstruct_batch_reference(batch, config))


@st.composite
def patterns(draw):
    shifted = draw(st.sampled_from(["odd", "even"]))
    grid = HexGrid(n_columns=30, n_rows=30, shifted_rows=shifted)
    nc, nr = draw(st.integers(0, 8)), draw(st.integers(0, 8))
    c0, r0 = draw(st.integers(0, 30 - nc)), draw(st.integers(0, 30 - nr))
    values = draw(st.lists(st.sampled_from([-40, 0, 0, 0, 25, 60, 60, 200, 32767]), min_size=nc * nr,
                           max_size=nc * nr))
    batch = EventBatch.from_images([np.array(values, np.int16).reshape(nr, nc)], [(c0, r0)], grid=grid)
    return batch


@settings(max_examples=300, deadline=None)
@given(patterns(), st.sampled_from(CONFIGS[:2] + CONFIGS[3:]))
def test_kernel_matches_reference_on_random_pixel_patterns(batch, config):
    assert_same(kernel_columns(batch, config), reconstruct_batch_reference(batch, config))


@settings(max_examples=200, deadline=None)
@given(patterns())
def test_clusters_match_the_hexgrid_neighbour_graph(batch):
    ev = batch.event(0)
    hit = ev.signal > 0  # threshold_adc = 0
    cols, rows, q = ev.columns[hit], ev.rows[hit], ev.signal[hit].astype(float)
    kernel = kernel_columns(batch, ReconConfig(threshold_adc=0, min_pixels=1))
    if not hit.any():
        assert kernel["n_clusters"][0] == 0
        return
    # adjacency from HexGrid.neighbours, components from scipy.sparse.csgraph
    index = {(c, r): k for k, (c, r) in enumerate(zip(cols.tolist(), rows.tolist(), strict=True))}
    nc, nr = batch.grid.neighbours(cols, rows)
    pairs = [(k, index[(c, r)]) for k in range(len(cols)) for c, r in zip(nc[k].tolist(), nr[k].tolist(),
                                                                         strict=True) if (c, r) in index]
    a, b = np.array(pairs, dtype=int).reshape(-1, 2).T
    graph = coo_matrix((np.ones(len(a)), (a, b)), shape=(len(cols), len(cols)))
    n, labels = connected_components(graph, directed=False)
    assert kernel["n_clusters"][0] == n
    charge = np.bincount(labels, weights=q)
    assert kernel["pulse_height"][0] == charge.max()
    assert kernel["n_pixels"][0] in np.bincount(labels)[charge == charge.max()]
