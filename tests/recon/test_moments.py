"""First-pass moments against numpy: ``numpy.average`` / ``numpy.cov(..., aweights=charge)`` / ``numpy.linalg.eigh``
on the pixel centres given by ``HexGrid.pixel_centre_mm`` (outside references: numpy's weighted covariance and
symmetric eigensolver; formulas of docs/methods.md §2, Bellazzini et al. 2003)."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from recon_helpers import kernel_columns

from trackfit import EventBatch, HexGrid, ReconConfig, reconstruct
from trackfit.recon.status import Status

CONFIG = ReconConfig(threshold_adc=0, min_pixels=1)


@st.composite
def blocks(draw):
    """A rectangular ROI fully above threshold (one connected cluster) with random charges and position."""
    shifted = draw(st.sampled_from(["odd", "even"]))
    grid = HexGrid(n_columns=40, n_rows=40, shifted_rows=shifted, pitch_mm=draw(st.sampled_from([0.05, 0.06])))
    nc = draw(st.integers(1, 9))
    nr = draw(st.integers(1, 9))
    c0 = draw(st.integers(0, grid.n_columns - nc))
    r0 = draw(st.integers(0, grid.n_rows - nr))
    values = draw(st.lists(st.integers(1, 2000), min_size=nc * nr, max_size=nc * nr))
    image = np.array(values, dtype=np.int16).reshape(nr, nc)
    return EventBatch.from_images([image], [(c0, r0)], grid=grid)


@settings(max_examples=150, deadline=None)
@given(blocks())
def test_moments_match_numpy_cov_and_eigh(batch):
    cols = kernel_columns(batch, CONFIG)
    ev = batch.event(0)
    q = ev.signal.astype(np.float64)
    x, y = ev.x_mm, ev.y_mm
    assert cols["n_pixels"][0] == len(q)
    assert cols["pulse_height"][0] == q.sum()
    # centroid: numpy.average with weights
    assert np.isclose(cols["centroid_x_mm"][0], np.average(x, weights=q), rtol=0, atol=1e-12)
    assert np.isclose(cols["centroid_y_mm"][0], np.average(y, weights=q), rtol=0, atol=1e-12)
    if len(q) == 1:
        assert cols["status"][0] & Status.SINGLE_PIXEL
        return
    # second moments: eigenvalues of numpy's weighted covariance
    # (bias=True normalises by sum(q), as Mxx = sum q dx^2 / Q)
    cov = np.cov(np.vstack([x, y]), aweights=q, bias=True)
    eigval, eigvec = np.linalg.eigh(cov)
    scale = eigval.sum()
    assert np.isclose(cols["m2_major_mm2"][0], eigval[1], rtol=1e-10, atol=1e-14 * scale)
    assert np.isclose(cols["m2_minor_mm2"][0], max(eigval[0], 0.0), rtol=1e-10, atol=1e-12 * scale)
    if eigval[1] - eigval[0] <= 1e-6 * scale:  # round: no axis to compare
        return
    assert not cols["status"][0] & Status.ROUND
    vx, vy = eigvec[:, 1]
    axis = cols["axis_rad"][0]
    assert -np.pi / 2 < axis <= np.pi / 2
    # the principal axis is the eigenvector of the largest eigenvalue (up to sign)
    assert abs(np.sin(axis) * vx - np.cos(axis) * vy) < 1e-7
    # third moment along the axis, with the axis orientation of the table
    if np.cos(axis) * vx + np.sin(axis) * vy < 0:
        vx, vy = -vx, -vy
    u = (x - np.average(x, weights=q)) * vx + (y - np.average(y, weights=q)) * vy
    m3 = np.average(u**3, weights=q)
    assert np.isclose(cols["m3_major_mm3"][0], m3, rtol=1e-6, atol=1e-9 * scale**1.5)


def test_public_table_holds_the_same_moments_in_float32():
    image = np.array([[0, 5, 30, 0], [10, 80, 200, 40], [0, 20, 60, 0]], np.int16)
    batch = EventBatch.from_images([image], [(100, 100)])
    table = reconstruct(batch, CONFIG)
    cols = kernel_columns(batch, CONFIG)
    for name in ("centroid_x_mm", "m2_major_mm2", "m2_minor_mm2", "m3_major_mm3", "axis_rad", "emission_rad"):
        assert table[name].dtype == np.float32
        assert np.isclose(table[name][0], cols[name][0], rtol=1e-6, atol=1e-7)
