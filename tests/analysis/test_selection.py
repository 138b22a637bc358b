"""Selections on event tables."""

import numpy as np
import pytest

from trackfit.analysis import (
    CircleRegion,
    ElongationCut,
    EnergyWindow,
    HexagonRegion,
    PixelCountCut,
    RectangleRegion,
    SelectionError,
    StatusCut,
    read_selection,
    selection_from_dict,
)
from trackfit.recon.status import Status


@pytest.fixture
def table():
    rng = np.random.default_rng(30)
    n = 20_000
    return {
        "status": np.where(rng.random(n) < 0.1, int(Status.ROI_BORDER), 0).astype(np.uint16)
        | np.where(rng.random(n) < 0.05, int(Status.TOO_FEW_PIXELS), 0).astype(np.uint16),
        "energy_kev": rng.uniform(1, 10, n).astype(np.float32),
        "n_pixels": rng.integers(1, 500, n).astype(np.int32),
        "m2_major_mm2": rng.uniform(0.001, 0.02, n),
        "m2_minor_mm2": rng.uniform(0.0, 0.01, n),
        "conv_x_mm": rng.uniform(-8, 8, n),
        "conv_y_mm": rng.uniform(-8, 8, n),
        "centroid_x_mm": rng.uniform(-8, 8, n),
        "centroid_y_mm": rng.uniform(-8, 8, n),
    }


def test_masks_match_numpy(table):
    t = table
    assert np.array_equal(StatusCut().mask(t), t["status"] == 0)
    allowed = StatusCut(allowed_bits=Status.ROI_BORDER).mask(t)
    assert np.array_equal(allowed, (t["status"] & ~np.uint16(Status.ROI_BORDER)) == 0)
    assert np.array_equal(EnergyWindow(low_kev=2, high_kev=8).mask(t), (t["energy_kev"] >= 2) & (t["energy_kev"] < 8))
    assert np.array_equal(PixelCountCut(low=20).mask(t), t["n_pixels"] >= 20)
    with np.errstate(divide="ignore"):
        ratio = t["m2_major_mm2"] / t["m2_minor_mm2"]
    assert np.array_equal(ElongationCut(low=1.5).mask(t), ratio >= 1.5)
    circle = CircleRegion(x_mm=1, y_mm=-2, radius_mm=3).mask(t)
    assert np.array_equal(circle, np.hypot(t["conv_x_mm"] - 1, t["conv_y_mm"] + 2) <= 3)
    rect = RectangleRegion(x_min_mm=-1, x_max_mm=2, y_min_mm=0, y_max_mm=5, position="centroid").mask(t)
    assert np.array_equal(rect, (t["centroid_x_mm"] >= -1) & (t["centroid_x_mm"] < 2) & (t["centroid_y_mm"] >= 0)
                          & (t["centroid_y_mm"] < 5))


def test_hexagon_area(table):
    # area of a regular hexagon of circumradius r is 3 sqrt(3) / 2 r^2 (elementary geometry); uniform points
    r = 5.0
    inside = HexagonRegion(radius_mm=r).mask(table)
    fraction = inside.mean()
    expected = 1.5 * np.sqrt(3) * r**2 / 16**2
    assert fraction == pytest.approx(expected, abs=4 * np.sqrt(expected * (1 - expected) / inside.size))
    # vertices at the stated rotation: (r, 0) is a vertex for rotation 0, not for pi/6
    point = {"conv_x_mm": np.array([0.99 * r, 0.0]), "conv_y_mm": np.array([0.0, 0.99 * r])}
    assert HexagonRegion(radius_mm=r).mask(point).tolist() == [True, False]
    assert HexagonRegion(radius_mm=r, rotation_rad=np.pi / 6).mask(point).tolist() == [False, True]


def test_combinations_and_cut_flow(table):
    a, b, c = StatusCut(), EnergyWindow(low_kev=2, high_kev=8), CircleRegion(radius_mm=6)
    sel = a & b & c
    assert np.array_equal(sel.mask(table), a.mask(table) & b.mask(table) & c.mask(table))
    assert np.array_equal((a | b).mask(table), a.mask(table) | b.mask(table))
    assert np.array_equal((~a).mask(table), ~a.mask(table))
    flow = sel.cut_flow(table)
    assert len(flow.rows) == 3  # a conjunction reports each step
    kept = [k for _, k, _ in flow.rows]
    removed = [r for _, _, r in flow.rows]
    assert kept[-1] == sel.mask(table).sum() == flow.n_kept
    assert flow.n_input - sum(removed) == kept[-1]
    assert removed[0] == (~a.mask(table)).sum()
    assert "removed" in str(flow) and "<table>" in flow._repr_html_()
    assert len(sel.apply(table)["energy_kev"]) == kept[-1]


def test_nan_never_passes():
    t = {"energy_kev": np.array([np.nan, 5.0]), "conv_x_mm": np.array([np.nan, 0.0]),
         "conv_y_mm": np.array([0.0, 0.0])}
    assert EnergyWindow(low_kev=1).mask(t).tolist() == [False, True]
    assert CircleRegion(radius_mm=1).mask(t).tolist() == [False, True]
    assert HexagonRegion(radius_mm=1).mask(t).tolist() == [False, True]


def test_errors_name_the_problem(table):
    with pytest.raises(SelectionError, match="'radius_mm' must be > 0"):
        CircleRegion(radius_mm=-1)
    with pytest.raises(SelectionError, match="low < high"):
        EnergyWindow(low_kev=5, high_kev=2)
    with pytest.raises(SelectionError, match="column 'peak_adc'"):
        PixelCountCut(column="peak_adc", low=1).mask(table)


def test_toml_selection(tmp_path, table):
    path = tmp_path / "cuts.toml"
    path.write_text('status = true\nallowed_status = ["ROI_BORDER"]\nenergy_kev = [2.0, 8.0]\n'
                    'elongation = [1.2, inf]\n[region]\nshape = "hexagon"\nradius_mm = 6.0\nrotation_deg = 30\n'
                    '[range]\nn_pixels = [10, 400]\n')
    sel = read_selection(path)
    expected = (StatusCut(allowed_bits=Status.ROI_BORDER) & EnergyWindow(low_kev=2, high_kev=8)
                & ElongationCut(low=1.2) & HexagonRegion(radius_mm=6, rotation_rad=np.pi / 6)
                & PixelCountCut(low=10, high=400))
    assert np.array_equal(sel.mask(table), expected.mask(table))
    assert len(sel.steps()) == 5


def test_toml_unknown_keys_listed():
    with pytest.raises(SelectionError, match="unknown key.*'energy'.*valid keys"):
        selection_from_dict({"energy": [1, 2]})
    with pytest.raises(SelectionError, match="unknown key.*'r'.*valid keys"):
        selection_from_dict({"region": {"shape": "circle", "r": 1}})
    with pytest.raises(SelectionError, match="unknown status bit"):
        selection_from_dict({"allowed_status": ["NOPE"]})


def test_selection_file_round_trip(tmp_path, table):
    from trackfit.analysis.selection import write_selection

    sel = (StatusCut(allowed_bits=Status.ROI_BORDER) & EnergyWindow(low_kev=2, high_kev=8) & ElongationCut(low=1.2)
           & HexagonRegion(radius_mm=6, rotation_rad=np.pi / 6) & PixelCountCut(high=400))
    path = tmp_path / "sel.toml"
    write_selection(sel, path)
    again = read_selection(path)
    assert np.array_equal(again.mask(table), sel.mask(table))
    with pytest.raises(SelectionError, match="cannot express"):
        write_selection(StatusCut() | EnergyWindow(low_kev=1), path)
