"""Geometry of the hexagonal pixel grid.

Outside references: the distances below follow from plane geometry of a regular hexagonal lattice (docs/methods.md §1,
[derived]); the nearest-pixel search is compared with a brute-force nearest-centre search by scipy.spatial.cKDTree
(a hexagonal pixel is the Voronoi cell of its centre, so both must agree).
"""

import dataclasses

import numpy as np
import pytest
from scipy.spatial import cKDTree

from trackfit import HexGrid

PARITIES = ["odd", "even"]


@pytest.fixture(params=PARITIES)
def grid(request):
    return HexGrid(shifted_rows=request.param)


def test_defaults_describe_the_standard_chip():
    grid = HexGrid()
    assert (grid.pitch_mm, grid.n_columns, grid.n_rows, grid.shifted_rows) == (0.050, 300, 352, "odd")
    assert grid.shape == (352, 300)


def test_row_pitch_and_pixel_area():
    # docs/methods.md §1 / §9 [derived]: row pitch = p*sqrt(3)/2 = 43.30 um for p = 50 um;
    # hexagon area = sqrt(3)/2 * p^2
    grid = HexGrid()
    assert grid.row_pitch_mm == pytest.approx(0.0433013, abs=1e-7)
    assert grid.pixel_area_mm2 == pytest.approx(np.sqrt(3) / 2 * 0.05**2, rel=1e-12)
    # the area of one pixel times the number of pixels equals the area of the lattice cell the chip tiles:
    # columns x pitch times rows x row pitch (independent check of the same number)
    assert grid.pixel_area_mm2 * grid.n_pixels == pytest.approx(
        grid.n_columns * grid.pitch_mm * grid.n_rows * grid.row_pitch_mm, rel=1e-12
    )


def test_hexagon_vertices_enclose_the_pixel_area(grid):
    # shoelace formula on the drawn polygon must give the analytic hexagon area
    verts = grid.hexagon_vertices_mm([0.0], [0.0])[0]
    x, y = verts[:, 0], verts[:, 1]
    area = 0.5 * abs(np.dot(x, np.roll(y, 1)) - np.dot(y, np.roll(x, 1)))
    assert area == pytest.approx(grid.pixel_area_mm2, rel=1e-12)


def test_chip_is_centred(grid):
    x, y = grid.pixel_centre_mm(*grid.all_pixels())
    assert (x.min() + x.max()) / 2 == pytest.approx(0.0, abs=1e-12)
    assert (y.min() + y.max()) / 2 == pytest.approx(0.0, abs=1e-12)
    assert grid.extent_mm == pytest.approx((x.min(), x.max(), y.min(), y.max()))


def test_shifted_rows_are_offset_by_half_a_pitch(grid):
    x0, _ = grid.pixel_centre_mm(0, 0)
    x1, _ = grid.pixel_centre_mm(0, 1)
    expected = 0.5 * grid.pitch_mm if grid.shifted_rows == "odd" else -0.5 * grid.pitch_mm
    assert x1 - x0 == pytest.approx(expected, abs=1e-12)


def test_round_trips_over_every_pixel(grid):
    columns, rows = grid.all_pixels()
    q, r = grid.to_axial(columns, rows)
    c2, r2 = grid.from_axial(q, r)
    assert np.array_equal(c2, columns) and np.array_equal(r2, rows)
    # axial -> mm agrees with offset -> mm
    xa, ya = grid.axial_to_xy(q, r)
    xo, yo = grid.pixel_centre_mm(columns, rows)
    assert np.allclose(xa, xo, atol=1e-12) and np.allclose(ya, yo, atol=1e-12)
    # mm -> nearest pixel gives the pixel back, also after a small displacement inside the hexagon
    c3, r3 = grid.nearest_pixel(xo, yo)
    assert np.array_equal(c3, columns) and np.array_equal(r3, rows)
    rng = np.random.default_rng(7)
    angle = rng.uniform(0, 2 * np.pi, columns.size)
    radius = rng.uniform(0, 0.49 * grid.pitch_mm, columns.size)  # inside the inscribed circle (radius p/2)
    c4, r4 = grid.nearest_pixel(xo + radius * np.cos(angle), yo + radius * np.sin(angle))
    assert np.array_equal(c4, columns) and np.array_equal(r4, rows)
    # cube coordinates sum to zero
    cq, cr, cs = grid.axial_to_cube(q, r)
    assert np.all(cq + cr + cs == 0)
    assert np.array_equal(grid.cube_to_axial(cq, cr, cs)[0], q)


def test_every_neighbour_is_one_pitch_away(grid):
    columns, rows = grid.all_pixels()
    nc, nr = grid.neighbours(columns, rows)
    assert nc.shape == (columns.size, 6)
    x, y = grid.pixel_centre_mm(columns, rows)
    nx, ny = grid.pixel_centre_mm(nc, nr)
    distance = np.hypot(nx - x[:, None], ny - y[:, None])
    # docs/methods.md §1 [derived]: nearest-neighbour distance on the hexagonal lattice = pitch
    assert np.allclose(distance, grid.pitch_mm, rtol=0, atol=1e-9)
    assert np.all(grid.hex_distance(columns[:, None], rows[:, None], nc, nr) == 1)
    # six distinct neighbours, counter-clockwise from +x every 60 degrees
    angles = np.degrees(np.arctan2(ny[0] - y[0], nx[0] - x[0])) % 360
    assert np.allclose(angles, [0, 60, 120, 180, 240, 300], atol=1e-9)


def test_column_row_step_distance_is_one_pitch(grid):
    # docs/methods.md §9: the (c, r)-(c, r+1) distance is 50.00 um; rows are 43.30 um apart
    for column, row in [(10, 10), (10, 11)]:
        x0, y0 = grid.pixel_centre_mm(column, row)
        x1, y1 = grid.pixel_centre_mm(column, row + 1)
        assert np.hypot(x1 - x0, y1 - y0) == pytest.approx(0.05, abs=1e-9)
        assert y1 - y0 == pytest.approx(0.0433013, abs=1e-7)


def test_nearest_pixel_matches_brute_force_search(grid):
    # Reference: scipy.spatial.cKDTree nearest-centre search over all pixel centres (Voronoi cells = hexagons).
    columns, rows = grid.all_pixels()
    x, y = grid.pixel_centre_mm(columns, rows)
    tree = cKDTree(np.column_stack([x, y]))
    rng = np.random.default_rng(20261202)
    x_min, x_max, y_min, y_max = grid.extent_mm
    points = rng.uniform([x_min, y_min], [x_max, y_max], size=(100_000, 2))
    distance, nearest = tree.query(points)
    c, r = grid.nearest_pixel(points[:, 0], points[:, 1])
    # exclude the measure-zero set of points on a shared edge (ties), where either answer is right
    second, _ = tree.query(points, k=2)
    clear = second[:, 1] - second[:, 0] > 1e-9
    assert clear.mean() > 0.999
    assert np.array_equal(c[clear], columns[nearest[clear]])
    assert np.array_equal(r[clear], rows[nearest[clear]])


def test_hex_distance_is_a_graph_distance(grid):
    # a pixel k steps along one lattice direction is at hex distance k; triangle inequality on random triples
    rng = np.random.default_rng(3)
    c = rng.integers(0, grid.n_columns, (3, 2000))
    r = rng.integers(0, grid.n_rows, (3, 2000))
    dab = grid.hex_distance(c[0], r[0], c[1], r[1])
    dbc = grid.hex_distance(c[1], r[1], c[2], r[2])
    dac = grid.hex_distance(c[0], r[0], c[2], r[2])
    assert np.all(dac <= dab + dbc)
    assert np.all(grid.hex_distance(c[0], r[0], c[0], r[0]) == 0)
    # walking k steps in +x gives distance k and distance k * pitch in mm
    k = np.arange(1, 20)
    assert np.array_equal(grid.hex_distance(50, 40, 50 + k, 40), k)


def test_contains():
    grid = HexGrid(n_columns=4, n_rows=3)
    assert grid.contains(0, 0) and grid.contains(3, 2)
    assert not grid.contains(4, 0) and not grid.contains(0, 3) and not grid.contains(-1, 1)
    inside = grid.contains(*np.meshgrid(np.arange(-2, 7), np.arange(-2, 6)))
    assert inside.sum() == grid.n_pixels


@pytest.mark.parametrize(
    "kwargs, message",
    [
        (dict(pitch_mm=-0.05), "'pitch_mm' must be a finite number of mm between 0.0001 and 10 (got -0.05)"),
        (dict(pitch_mm=1e300), "'pitch_mm' must be a finite number of mm between 0.0001 and 10 (got 1e+300)"),
        (dict(pitch_mm=float("nan")), "'pitch_mm' must be a finite number of mm between 0.0001 and 10 (got nan)"),
        (dict(pitch_mm="0.05"), "'pitch_mm' must be a number of mm (got '0.05')"),
        (dict(n_columns=0), "'n_columns' must be an integer between 1 and 32768 (got 0)"),
        (dict(n_columns=1e300), "'n_columns' must be an integer between 1 and 32768 (got 1e+300)"),
        (dict(n_columns=2**64), f"'n_columns' must be an integer between 1 and 32768 (got {2**64})"),
        (dict(n_columns=float("inf")), "'n_columns' must be an integer (got inf)"),
        (dict(n_columns="300"), "'n_columns' must be an integer (got '300')"),
        (dict(n_columns=True), "'n_columns' must be an integer (got True)"),
        (dict(n_rows=2.5), "'n_rows' must be an integer (got 2.5)"),
        (dict(shifted_rows=["odd"]), "'shifted_rows' must be 'odd' or 'even' (got ['odd'])"),
        (dict(shifted_rows="left"), "'shifted_rows' must be 'odd' or 'even' (got 'left')"),
    ],
)
def test_bad_parameters_are_named(kwargs, message):
    with pytest.raises(ValueError) as err:
        HexGrid(**kwargs)
    assert str(err.value) == message


def test_dict_round_trip_and_replace(grid):
    assert HexGrid.from_dict(grid.to_dict()) == grid
    small = dataclasses.replace(grid, n_columns=10, n_rows=8)
    assert small.extent_mm[1] < grid.extent_mm[1]
    x, y = small.pixel_centre_mm(*small.all_pixels())
    assert (x.min() + x.max()) / 2 == pytest.approx(0.0, abs=1e-12)
