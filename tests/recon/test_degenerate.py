"""Degenerate events never crash; each gets its documented status bit, the best available values and no NaN
without a flag."""

import numpy as np
import pytest
from recon_helpers import GRID, assert_nan_explained, batch_from_pixels, kernel_columns

from trackfit import EventBatch, HexGrid, ReconConfig, reconstruct
from trackfit.recon.status import Status

C, R = 150, 176  # a pixel near the chip centre (row 176 is not shifted on the default chip)


def _run(pixels, config=None, margin=2):
    batch = batch_from_pixels([pixels], margin=margin)
    table = reconstruct(batch, config)
    assert len(table) == 1
    assert_nan_explained(table)
    return table.row(0), kernel_columns(batch, config)


def _has(row, *bits):
    return all(row["status"] & int(b) for b in bits)


def test_nothing_above_threshold():
    row, _ = _run({(C, R): 10, (C + 1, R): 5, (C + 2, R): -7})  # threshold_adc = 10: a pixel needs > 10
    assert row["status"] == Status.NO_SIGNAL
    assert row["n_pixels"] == 0 and row["n_clusters"] == 0 and row["pulse_height"] == 0 and row["energy_kev"] == 0
    assert np.isnan(row["centroid_x_mm"]) and np.isnan(row["emission_rad"])


def test_empty_roi_and_all_negative_roi():
    batch = EventBatch.from_images([np.zeros((0, 0), np.int16), np.full((6, 7), -300, np.int16)],
                                   [(10, 10), (20, 20)])
    table = reconstruct(batch)
    assert list(table["status"]) == [Status.NO_SIGNAL, Status.NO_SIGNAL]
    assert_nan_explained(table)


def test_single_pixel():
    row, cols = _run({(C, R): 500})
    assert _has(row, Status.SINGLE_PIXEL, Status.TOO_FEW_PIXELS)
    x, y = GRID.pixel_centre_mm(C, R)
    assert np.isclose(cols["centroid_x_mm"][0], x, atol=1e-12) and np.isclose(cols["centroid_y_mm"][0], y, atol=1e-12)
    assert (cols["conv_x_mm"][0], cols["conv_y_mm"][0]) == (cols["centroid_x_mm"][0], cols["centroid_y_mm"][0])
    assert row["m2_major_mm2"] == 0 and row["m2_minor_mm2"] == 0
    assert np.isnan(row["axis_rad"]) and np.isnan(row["emission_rad"])
    assert row["pulse_height"] == 500 and row["peak_adc"] == 500 and row["n_pixels"] == 1


def test_two_unequal_pixels_point_from_the_light_to_the_heavy_one():
    # the light pixel is the start: its distance from the centroid is sqrt(3) sqrt(m2_major_mm2), inside [1.5, 3.5]
    row, cols = _run({(C, R): 100, (C + 1, R): 300})
    assert _has(row, Status.COLLINEAR, Status.TOO_FEW_PIXELS)
    assert not row["status"] & int(Status.NO_EMISSION)
    assert abs(cols["axis_rad"][0]) < 1e-12
    assert abs(cols["emission_rad"][0]) < 1e-12  # along +x, from (C, R) to (C + 1, R)
    x, y = GRID.pixel_centre_mm(C, R)
    assert np.isclose(cols["conv_x_mm"][0], x) and np.isclose(cols["conv_y_mm"][0], y)
    row, cols = _run({(C, R): 300, (C + 1, R): 100})
    assert np.isclose(abs(cols["emission_rad"][0]), np.pi)


def test_two_equal_pixels_have_no_skewness():
    row, cols = _run({(C, R): 200, (C, R + 1): 200})  # rows R and R + 1: a 60 or 120 degree lattice step
    assert _has(row, Status.NO_SKEWNESS, Status.COLLINEAR, Status.TOO_FEW_PIXELS)
    x0, y0 = GRID.pixel_centre_mm(C, R)
    x1, y1 = GRID.pixel_centre_mm(C, R + 1)
    expected = np.arctan2(y1 - y0, x1 - x0)
    assert np.isclose(cols["axis_rad"][0], expected, atol=1e-12)
    assert cols["emission_rad"][0] == cols["axis_rad"][0]  # best available: the axis, orientation unknown
    assert (cols["conv_x_mm"][0], cols["conv_y_mm"][0]) == (cols["centroid_x_mm"][0], cols["centroid_y_mm"][0])


def test_three_equal_pixels_in_a_triangle_are_round():
    # (C, R), (C + 1, R) and their common neighbour in row R + 1 (row R is not shifted: columns C - 1, C)
    row, cols = _run({(C, R): 150, (C + 1, R): 150, (C, R + 1): 150})
    assert _has(row, Status.ROUND, Status.TOO_FEW_PIXELS)
    assert np.isnan(row["axis_rad"]) and np.isnan(row["emission_rad"]) and np.isnan(row["m3_major_mm3"])
    assert np.isclose(row["m2_major_mm2"], row["m2_minor_mm2"])
    assert row["conv_x_mm"] == row["centroid_x_mm"]


def test_hexagon_of_equal_charges_is_round():
    ring = GRID.neighbours(C, R)
    pixels = {(C, R): 100, **{(int(c), int(r)): 100 for c, r in zip(*ring, strict=True)}}
    row, _ = _run(pixels)
    assert _has(row, Status.ROUND) and row["n_pixels"] == 7 and row["n_clusters"] == 1


def test_three_collinear_pixels_and_a_longer_line_with_rising_charge():
    row, cols = _run({(C, R): 50, (C + 1, R): 100, (C + 2, R): 300})
    assert _has(row, Status.COLLINEAR)
    pixels = {(C + k, R): 30 + 40 * k * k for k in range(8)}
    row, cols = _run(pixels)
    assert row["status"] == Status.COLLINEAR  # eight pixels: enough, everything defined
    assert abs(cols["axis_rad"][0]) < 1e-12 and abs(cols["emission_rad"][0]) < 1e-12
    assert cols["m3_major_mm3"][0] < 0  # the low-charge start lies at -x (docs/methods.md §2: start side = sign(M3))


def test_line_with_all_equal_charges():
    row, _ = _run({(C + k, R): 100 for k in range(7)})
    assert _has(row, Status.COLLINEAR, Status.NO_SKEWNESS)
    assert row["emission_rad"] == row["axis_rad"]


def test_negative_neighbours_are_ignored():
    line = {(C + k, R): 30 + 40 * k * k for k in range(8)}
    _, clean = _run(line)
    _, noisy = _run({**line, (C, R + 1): -500, (C + 3, R - 1): -32768})
    for name in ("centroid_x_mm", "emission_rad", "m2_major_mm2", "pulse_height"):
        assert clean[name][0] == noisy[name][0]


def test_saturated_pixels():
    line = {(C + k, R): 30 + 40 * k * k for k in range(8)}
    row, _ = _run({**line, (C + 7, R): 32767})
    assert _has(row, Status.SATURATED) and row["peak_adc"] == 32767
    row, _ = _run(line, ReconConfig(saturation_adc=1990))  # the largest pixel is 30 + 40 * 49 = 1990
    assert _has(row, Status.SATURATED)
    row, _ = _run(line)
    assert not row["status"] & int(Status.SATURATED)


def test_all_masked_roi():
    pixels = {(C + k, R): 30 + 40 * k * k for k in range(8)}
    row, _ = _run(pixels, ReconConfig(bad_pixels=list(pixels)))
    assert row["status"] == Status.NO_SIGNAL
    chip_map = np.zeros(GRID.shape, bool)
    chip_map[R - 5:R + 5, C - 5:C + 12] = True
    row, _ = _run(pixels, ReconConfig(bad_pixels=chip_map))
    assert row["status"] == Status.NO_SIGNAL


def test_masked_hot_pixel_splits_nothing_else():
    line = {(C + k, R): 30 + 40 * k * k for k in range(8)}
    _, clean = _run(line)
    row, masked = _run({**line, (C + 12, R + 3): 30000}, ReconConfig(bad_pixels=[(C + 12, R + 3)]))
    assert row["n_clusters"] == 1 and row["peak_adc"] == max(line.values())
    assert masked["emission_rad"][0] == clean["emission_rad"][0]


def test_largest_charge_wins_and_clusters_are_counted():
    line = {(C + k, R): 30 + 40 * k * k for k in range(8)}
    # more charge (6000 > 5840 ADC of the line), fewer pixels, not touching the line
    blob = {(C + 3, R + 6): 3000, (C + 4, R + 6): 3000}
    row, _ = _run({**line, **blob})
    assert row["n_clusters"] == 2 and row["n_pixels"] == 2 and row["pulse_height"] == 6000


def test_empty_conversion_selection_falls_back_to_the_centroid():
    pixels = {(C + k, R): 30 + 40 * k * k for k in range(8)}
    row, cols = _run(pixels, ReconConfig(start_search_inner_rms=3.0, start_search_outer_rms=3.01))
    assert _has(row, Status.NO_CONVERSION_PIXELS)
    assert row["n_conv_pixels"] == 0
    assert (row["conv_x_mm"], row["conv_y_mm"]) == (row["centroid_x_mm"], row["centroid_y_mm"])
    assert abs(cols["emission_rad"][0]) < 1e-12  # first-pass axis, pointing away from the start side (-x)


def test_second_pass_fallback_when_weights_vanish():
    pixels = {(C + k, R + (k // 3)): 30 + 40 * k * k for k in range(9)}
    row, cols = _run(pixels, ReconConfig(second_pass_length_mm=1e-7))
    assert _has(row, Status.SECOND_PASS_FALLBACK)
    axis = cols["axis_rad"][0]
    assert np.isclose(abs(np.cos(cols["emission_rad"][0] - axis)), 1.0)  # the first-pass axis, oriented
    assert np.cos(cols["emission_rad"][0]) > 0  # from the start (-x) along the track


def test_track_touching_the_roi_border():
    pixels = {(C + k, R): 30 + 40 * k * k for k in range(8)}
    row, _ = _run(pixels, margin=0)
    assert _has(row, Status.ROI_BORDER)
    row, _ = _run(pixels, margin=1)
    assert not row["status"] & int(Status.ROI_BORDER)


def test_malformed_placeholders_get_bit_0():
    good = batch_from_pixels([{(C + k, R): 30 + 40 * k * k for k in range(8)}])
    placeholder = EventBatch(roi=np.zeros((1, 4)), start=[0, 0], signal=np.zeros(0), bad=[True], index=[1])
    batch = EventBatch.concatenate([good, placeholder])
    table = reconstruct(batch)
    assert Status.MALFORMED_INPUT == 1
    assert table["status"][1] == Status.MALFORMED_INPUT and table["status"][0] != Status.MALFORMED_INPUT
    assert table["n_pixels"][1] == 0 and np.isnan(table["emission_rad"][1])
    assert_nan_explained(table)


def test_inconsistent_roi_in_an_unvalidated_batch_is_flagged_not_read():
    # EventBatch(validate=False) trusts its caller; the kernel still never reads outside an event's pixels
    batch = EventBatch(roi=[[10, 10, 3, 3], [10, 10, 4, 4], [299, 10, 5, 1]], start=[0, 9, 18, 23],
                       signal=np.full(23, 100), validate=False)
    table = reconstruct(batch, ReconConfig(bad_pixels=[(0, 0)]))
    assert list(table["status"] & Status.MALFORMED_INPUT) == [0, 1, 1]  # area 16 != 9 pixels; ROI off the chip
    assert_nan_explained(table)
    beyond = EventBatch(roi=[[10, 10, 3, 3]], start=[20, 29], signal=np.full(23, 100), validate=False)
    assert reconstruct(beyond)["status"][0] == Status.MALFORMED_INPUT  # pixels past the end of the signal array


@pytest.mark.parametrize("shifted", ["odd", "even"])
def test_degenerate_mix_on_both_row_parities(shifted, make_batch):
    grid = HexGrid(n_columns=64, n_rows=48, shifted_rows=shifted)
    batch = make_batch(400, 3, grid=grid, max_side=6)
    for config in (ReconConfig(), ReconConfig(threshold_adc=350), ReconConfig(threshold_adc=0, min_pixels=1)):
        table = reconstruct(batch, config)
        assert len(table) == len(batch)
        assert_nan_explained(table)
