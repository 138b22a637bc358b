"""Selections on event tables."""

import numpy as np
import pytest

from trackfit.analysis import (
    CircleRegion,
    ElongationCut,
    EnergyWindow,
    Everything,
    HexagonRegion,
    NoEventsLeftError,
    PixelCountCut,
    RectangleRegion,
    SelectionError,
    SelectionMismatchWarning,
    StatusCut,
    UsableEvents,
    cut_from_dict,
    default_selection,
    read_selection,
    selection_differences,
    selection_from_dict,
    with_default,
)
from trackfit.analysis.selection import warn_if_selections_differ
from trackfit.recon.status import Status


@pytest.fixture
def table():
    rng = np.random.default_rng(30)
    n = 20_000
    return {
        "status": np.where(rng.random(n) < 0.1, int(Status.ROI_BORDER), 0).astype(np.uint16)
        | np.where(rng.random(n) < 0.05, int(Status.TOO_FEW_PIXELS), 0).astype(np.uint16),
        "energy_kev": rng.uniform(1, 10, n).astype(np.float32),
        "emission_rad": np.where(rng.random(n) < 0.03, np.nan, rng.uniform(-np.pi, np.pi, n)),
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
    # a selection file always starts with the default selection, then adds its cuts
    assert np.array_equal(sel.mask(table), expected.mask(table) & UsableEvents().mask(table))
    assert len(sel.steps()) == 6 and sel.steps()[0] == UsableEvents()


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
    assert np.array_equal(again.mask(table), with_default(sel).mask(table))
    strict = with_default(EnergyWindow(low_kev=2), reject_warnings=True)
    write_selection(strict, path)
    assert read_selection(path) == strict  # reject_warnings survives the file
    with pytest.raises(SelectionError, match="cannot express"):
        write_selection(StatusCut() | EnergyWindow(low_kev=1), path)


# ------------------------------------------------------------------------------------------ the default selection
# The classification written in docs/table-format.md ("Status bits"): failures leave no emission angle or one the
# reconstruction declares meaningless; a track touching the ROI edge is a warning.
DOCUMENTED_FAILURES = ("MALFORMED_INPUT", "NO_SIGNAL", "TOO_FEW_PIXELS", "SINGLE_PIXEL", "ROUND", "NOT_FINITE")


def test_default_selection_is_angle_and_no_failure_bit(table):
    failures = 0
    for name in DOCUMENTED_FAILURES:
        failures |= int(Status[name])
    expected = np.isfinite(table["emission_rad"]) & ((table["status"].astype(int) & failures) == 0)
    assert np.array_equal(UsableEvents().mask(table), expected)
    assert np.array_equal(default_selection().mask(table), expected)
    # ROI_BORDER events pass by default; rejecting warnings keeps status == 0 only
    border = (table["status"] & int(Status.ROI_BORDER)) > 0
    assert UsableEvents().mask(table)[border & np.isfinite(table["emission_rad"]) & (table["status"] == 512)].all()
    strict = UsableEvents(reject_warnings=True).mask(table)
    assert np.array_equal(strict, np.isfinite(table["emission_rad"]) & (table["status"] == 0))


def test_every_bit_is_a_failure_or_a_warning_with_a_reason():
    from trackfit.recon.status import BIT_KIND, BIT_RATIONALE, FAILURE_BITS, WARNING_BITS

    assert int(FAILURE_BITS) & int(WARNING_BITS) == 0
    assert {bit.name for bit in Status if bit & FAILURE_BITS} == set(DOCUMENTED_FAILURES)
    assert int(FAILURE_BITS) | int(WARNING_BITS) == sum(int(bit) for bit in Status)
    assert int(Status.NO_EMISSION) & ~int(FAILURE_BITS) == 0  # no angle is always a failure
    assert BIT_KIND[Status.ROI_BORDER] == "warning"
    assert all(len(BIT_RATIONALE[bit]) > 20 for bit in Status)


def test_cuts_add_to_the_default(table):
    window = EnergyWindow(low_kev=2, high_kev=8)
    selection = with_default(window)
    assert selection.steps()[0] == UsableEvents() and selection.steps()[1] == window
    assert np.array_equal(selection.mask(table), UsableEvents().mask(table) & window.mask(table))
    flow = selection.cut_flow(table)
    assert flow.rows[0][0] == "default: emission angle, no failure bit"  # the first line of every cut flow
    # a selection that holds the default keeps its own (moved first), once
    strict = with_default(window & UsableEvents(reject_warnings=True))
    assert strict.steps() == (UsableEvents(reject_warnings=True), window)
    assert with_default(Everything()).steps() == (UsableEvents(),) == with_default(None).steps()
    assert with_default(None, reject_warnings=True).steps() == (UsableEvents(reject_warnings=True),)


def test_selection_file_reject_warnings_key():
    assert selection_from_dict({}).steps() == (UsableEvents(),)
    assert selection_from_dict({"reject_warnings": True}).steps() == (UsableEvents(reject_warnings=True),)
    with pytest.raises(SelectionError, match="reject_warnings must be true or false"):
        selection_from_dict({"reject_warnings": "yes"})


def test_cut_descriptions_read_back():
    selection = with_default(StatusCut(allowed_bits=Status.ROI_BORDER) & EnergyWindow(low_kev=2, high_kev=8)
                             & ElongationCut(low=1.2) & HexagonRegion(radius_mm=6, rotation_rad=0.5)
                             & (PixelCountCut(low=10) | ~CircleRegion(radius_mm=1))
                             & RectangleRegion(x_min_mm=0, x_max_mm=1, y_min_mm=0, y_max_mm=2))
    assert cut_from_dict(selection.to_dict()) == selection
    with pytest.raises(SelectionError, match="unknown cut"):
        cut_from_dict({"cut": "Nope"})


def test_differences_that_matter_for_a_calibration():
    base = with_default(EnergyWindow(low_kev=2, high_kev=8))
    # energy windows and regions choose which events are analysed: no difference
    assert selection_differences(with_default(CircleRegion(radius_mm=2)), base) == ([], [])
    # track-shape and status cuts change the modulation factor: reported on the side that has them
    mine, theirs = selection_differences(with_default(ElongationCut(low=1.5)), base)
    assert mine == ["elongation >= 1.5"] and theirs == []
    mine, theirs = selection_differences(base, with_default(None, reject_warnings=True))
    assert mine == ["default: emission angle, no failure bit"]
    assert theirs == ["default: emission angle, no failure or warning bit"]
    # an explicit status == 0 next to the default is the same as rejecting warnings (older calibration files)
    assert selection_differences(StatusCut(), with_default(None, reject_warnings=True)) == ([], [])
    with pytest.warns(SelectionMismatchWarning, match="only the calibration has 'elongation >= 1.5'"):
        assert warn_if_selections_differ(base, ElongationCut(low=1.5), what="this run",
                                         reference_name="the calibration")


def test_no_events_left_shows_the_cut_flow(table):
    selection = with_default(EnergyWindow(low_kev=50, high_kev=60))
    error = NoEventsLeftError("in the run", selection.cut_flow(table))
    text = str(error)
    assert "no events left in the run" in text and "50 <= energy_kev < 60 keV" in text and " 0 " in text
    assert "background" not in text


def test_documented_kinds_match_the_code():
    import re
    from pathlib import Path

    from trackfit.recon.status import BIT_KIND

    doc = (Path(__file__).resolve().parents[2] / "docs" / "table-format.md").read_text()
    kinds = dict(re.findall(r"^\| \d+ \| \d+ \| `([A-Z_]+)` \| (failure|warning) \|", doc, flags=re.M))
    assert kinds == {bit.name: kind for bit, kind in BIT_KIND.items()}
