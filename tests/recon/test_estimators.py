"""The emission-angle estimates beyond the two-stage analysis (``trackfit.recon.estimators``, docs/methods.md §11):
the adaptive kernel against its plain-numpy twin, the main-cluster mask against the cluster labels of
``scipy.ndimage.label`` (``trackfit.recon.clusters``), both estimates against toy tracks of known start and
direction, the lattice symmetries of the hexagonal grid, and the table columns."""

import math
import sys

import numpy as np
import pytest
from recon_helpers import angle_diff, batch_from_pixels, pixels_of, rotate60, transform_pixels

from trackfit import EventBatch, HexGrid, ReconConfig, reconstruct
from trackfit.recon._synthetic import toy_tracks
from trackfit.recon.clusters import event_clusters
from trackfit.recon.estimators import ESTIMATE_COLUMNS, SIZE_RULE, SizeRule, columns_of
from trackfit.recon.estimators._reference import adaptive_event
from trackfit.recon.estimators.adaptive import HEAD_DENSITY_WEIGHT
from trackfit.recon.estimators.skeleton import skeleton_event
from trackfit.recon.pipeline import _Prepared
from trackfit.recon.status import Status

ADAPTIVE = ReconConfig(emission_estimator="adaptive")


def kernel_estimates(batch, config=ADAPTIVE):
    """The two-stage outputs and the estimator columns of a batch, and the main-cluster mask."""
    prepared = _Prepared(config, batch.grid)
    estimates = {}
    out_f, out_i = prepared.run(batch, estimates=estimates)
    return out_f, out_i, estimates


def twin_estimates(batch, config=ADAPTIVE):
    """:func:`adaptive_event` on the main cluster of every event (labels from ``event_clusters``)."""
    nodes, inner, outer, length = SIZE_RULE.arrays()
    rows = []
    for i in range(len(batch)):
        ev = batch.event(i)
        main = event_clusters(ev, config).in_main
        rows.append(adaptive_event(ev.x_mm[main], ev.y_mm[main], ev.signal[main], pitch_mm=batch.grid.pitch_mm,
                                   log2_size_nodes=nodes, inner_rms=inner, outer_rms=outer, length_pitch=length,
                                   density_weight=HEAD_DENSITY_WEIGHT))
    return {name: np.array([r[name] for r in rows]) for name in rows[0]}


def _mixed_batch(make_batch):
    short = toy_tracks(600, 31, length_mm=0.1, diffusion_mm=0.05, noise_adc=6)
    long_ = toy_tracks(600, 32, length_mm=0.8, diffusion_mm=0.03, roi_shape=(40, 40))
    even = toy_tracks(400, 33, grid=HexGrid(shifted_rows="even"), length_mm=0.3, noise_adc=10, roi_shape=(16, 15))
    junk = make_batch(600, 34, grid=HexGrid(), max_side=9)
    return [short, long_, even, junk]


def test_adaptive_kernel_matches_its_numpy_twin(make_batch):
    for batch in _mixed_batch(make_batch):
        _, out_i, kernel = kernel_estimates(batch)
        twin = twin_estimates(batch)
        with_angle = (out_i[:, 0] & int(Status.NO_EMISSION)) == 0
        for name in ("adaptive_emission_rad", "adaptive_conv_x_mm", "adaptive_conv_y_mm", "adaptive_head_score"):
            a, b = kernel[name], twin[name]
            assert np.array_equal(np.isnan(a), np.isnan(b) | ~with_angle), name
            finite = ~np.isnan(a)
            diff = np.abs(a[finite] - b[finite])
            if name == "adaptive_emission_rad":
                diff = np.minimum(diff, 2 * np.pi - diff)  # -pi and pi are one direction
            assert diff.max(initial=0) < 1e-9, (name, np.flatnonzero(finite)[np.argmax(diff)], diff.max())
        assert np.array_equal(kernel["adaptive_status"][with_angle], twin["adaptive_status"][with_angle])


def test_the_main_cluster_mask_is_the_cluster_of_the_labels(make_batch):
    # outside reference: scipy.ndimage.label on the sheared ROI (trackfit.recon.clusters)
    for batch in _mixed_batch(make_batch):
        prepared = _Prepared(ADAPTIVE, batch.grid)
        mask = np.zeros(batch.signal.size, np.uint8)
        from trackfit.recon._kernels import reconstruct_range

        out_f = np.empty((len(batch), 11))
        out_i = np.empty((len(batch), 5), np.int64)
        reconstruct_range(0, len(batch), batch.roi, batch.start, batch.signal, batch.bad, *prepared.args, mask,
                          out_f, out_i)
        for i in range(len(batch)):
            lo, hi = batch.start[i], batch.start[i + 1]
            expected = event_clusters(batch.event(i)).in_main
            assert np.array_equal(mask[lo:hi] == 1, expected), i


def test_adaptive_estimate_follows_the_true_direction_and_start():
    # toy tracks with a Bragg-like rising charge (trackfit.recon._synthetic): their start and direction are the
    # outside truth; the adaptive estimate must find the start side as well as the two-stage third moment does
    batch = toy_tracks(2000, 41, length_mm=0.5, diffusion_mm=0.03)
    table = reconstruct(batch, ADAPTIVE)
    truth = batch.truth["angle_rad"]
    error = np.abs(angle_diff(table["adaptive_emission_rad"], truth))
    classic = np.abs(angle_diff(table["emission_rad"], truth))
    assert np.quantile(error, 0.99) < 0.3
    assert np.mean(error > np.pi / 2) <= max(np.mean(classic > np.pi / 2), 0.002)
    to_start = np.hypot(table["adaptive_conv_x_mm"] - batch.truth["start_x_mm"],
                        table["adaptive_conv_y_mm"] - batch.truth["start_y_mm"])
    to_centroid = np.hypot(table["centroid_x_mm"] - batch.truth["start_x_mm"],
                           table["centroid_y_mm"] - batch.truth["start_y_mm"])
    assert np.median(to_start) < 0.5 * np.median(to_centroid)
    assert np.all(np.isfinite(table["adaptive_head_score"]))


def test_adaptive_estimate_rotates_with_the_lattice():
    # a rotation by 60 degrees maps the hexagonal lattice onto itself: the estimate must follow exactly
    batch = toy_tracks(60, 5)
    original = [pixels_of(batch, i, threshold=ReconConfig().threshold_adc) for i in range(len(batch))]
    before = kernel_estimates(batch_from_pixels(original))[2]
    after = kernel_estimates(batch_from_pixels([transform_pixels(p, rotate60) for p in original]))[2]
    assert np.allclose(angle_diff(after["adaptive_emission_rad"], before["adaptive_emission_rad"] + np.pi / 3), 0,
                       atol=1e-9)
    # the score's sign follows the orientation of the first-pass axis, which may wrap at +-pi/2 under the rotation
    assert np.allclose(np.abs(after["adaptive_head_score"]), np.abs(before["adaptive_head_score"]), atol=1e-9)


def test_estimate_columns_and_nan_pattern_follow_the_two_stage_status(make_batch):
    tracks = toy_tracks(200, 51)
    junk = make_batch(300, 52, grid=HexGrid(), max_side=6)
    batch = EventBatch.concatenate([EventBatch(roi=b.roi, start=b.start, signal=b.signal, grid=b.grid)
                                    for b in (tracks, junk)])
    two_stage = reconstruct(batch, ReconConfig(emission_estimator="two-stage"))
    adaptive = reconstruct(batch, ADAPTIVE)
    assert set(adaptive.columns) - set(two_stage.columns) == set(columns_of("adaptive"))
    for name in two_stage.columns:  # the two-stage columns are unchanged
        assert np.array_equal(np.asarray(two_stage[name]), np.asarray(adaptive[name]), equal_nan=True), name
    no_angle = np.isnan(adaptive["emission_rad"])
    assert np.array_equal(np.isnan(adaptive["adaptive_emission_rad"]), no_angle)
    assert adaptive["adaptive_status"].dtype == np.uint16
    assert set(np.unique(adaptive["adaptive_status"])) <= {0, int(Status.NO_SKEWNESS),
                                                            int(Status.NO_CONVERSION_PIXELS),
                                                            int(Status.SECOND_PASS_FALLBACK)}
    assert ESTIMATE_COLUMNS["adaptive"]["emission_rad"] in adaptive.columns


def test_size_rule_is_validated_and_interpolates_in_log_size():
    with pytest.raises(ValueError, match="increasing"):
        SizeRule(size_pitch=(2.0, 1.0), inner_rms=(1, 1), outer_rms=(3, 3), length_pitch=(1, 1))
    with pytest.raises(ValueError, match="one value per node"):
        SizeRule(size_pitch=(1.0, 2.0), inner_rms=(1,), outer_rms=(3, 3), length_pitch=(1, 1))
    with pytest.raises(ValueError, match="inner_rms < outer_rms"):
        SizeRule(size_pitch=(1.0,), inner_rms=(3,), outer_rms=(2,), length_pitch=(1,))
    # half-way in log2 between the nodes at 2 and 4 pitches (2.83 pitches): the mean of their settings
    at = SIZE_RULE.at([2 * math.sqrt(2), 0.1, 100.0])
    assert at["length_pitch"][0] == pytest.approx(0.5 * (SIZE_RULE.length_pitch[1] + SIZE_RULE.length_pitch[2]))
    assert at["inner_rms"][1] == SIZE_RULE.inner_rms[0] and at["inner_rms"][2] == SIZE_RULE.inner_rms[-1]
    with pytest.raises(ValueError, match="emission_estimator"):
        ReconConfig(emission_estimator="neural")


def _arc_track(rng, *, radius_mm, arc_rad, start_angle_rad, n_electrons=4000, diffusion_mm=0.03):
    """Pixels of a circular-arc track from (0, 0) with a charge rising towards its end (a curled long track; the
    Bragg-like profile 0.3 + t^2 of trackfit.recon._synthetic along the arc)."""
    grid = HexGrid()
    u = rng.random(n_electrons)
    t = np.where(rng.random(n_electrons) < 0.3 / (0.3 + 1 / 3), u, np.cbrt(u))
    phi = start_angle_rad - np.pi / 2 + arc_rad * t
    centre = radius_mm * np.array([np.cos(start_angle_rad + np.pi / 2), np.sin(start_angle_rad + np.pi / 2)])
    x = centre[0] + radius_mm * np.cos(phi) + rng.normal(0, diffusion_mm, n_electrons)
    y = centre[1] + radius_mm * np.sin(phi) + rng.normal(0, diffusion_mm, n_electrons)
    col, row = grid.nearest_pixel(x, y)
    pixels = {}
    for c, r in zip(col.tolist(), row.tolist(), strict=True):
        pixels[(c, r)] = pixels.get((c, r), 0) + 3
    return grid, pixels


def test_skeleton_finds_the_start_and_first_direction_of_a_curled_track():
    pytest.importorskip("skimage")
    rng = np.random.default_rng(61)
    radius, arc = 1.5, 1.5
    for start_angle in (0.3, 2.0, -2.5):
        grid, pixels = _arc_track(rng, radius_mm=radius, arc_rad=arc, start_angle_rad=start_angle)
        batch = batch_from_pixels([pixels], grid=grid)
        ev = batch.event(0)
        result = skeleton_event(ev.x_mm, ev.y_mm, ev.signal, pitch_mm=grid.pitch_mm)
        # outside truth, the geometry of the arc: it starts at (0, 0) heading along start_angle and is radius x arc
        # long. The centre line stops about a track half-width short of the end and the conversion point lies one
        # pitch further in: within 4 pitches of the start; the second pass sees the tangent ~0.2 mm along the arc,
        # turned by 0.2 / radius
        assert math.hypot(result["skeleton_conv_x_mm"], result["skeleton_conv_y_mm"]) < 0.2
        assert abs(angle_diff(result["skeleton_emission_rad"], start_angle)) < 0.2 / radius + 0.15
        assert result["skeleton_path_mm"] == pytest.approx(radius * arc, rel=0.15)
        # the two-stage axis follows the chord, half the arc away from the first direction
        two_stage = reconstruct(batch)
        assert abs(angle_diff(two_stage["axis_rad"][0], start_angle, period=np.pi)) > 0.5
    assert skeleton_event([0.0], [0.0], [10.0], pitch_mm=0.05) is None


def test_skeleton_estimate_keeps_the_adaptive_one_for_short_tracks():
    pytest.importorskip("skimage")
    batch = toy_tracks(50, 71, length_mm=0.2)
    table = reconstruct(batch, ReconConfig(emission_estimator="skeleton"))
    assert set(columns_of("skeleton")) <= set(table.columns)
    assert np.all(table["skeleton_path_mm"] == 0)
    assert np.array_equal(table["skeleton_emission_rad"], table["adaptive_emission_rad"], equal_nan=True)


def test_skeleton_estimate_names_the_extra_when_scikit_image_is_missing(monkeypatch):
    monkeypatch.setitem(sys.modules, "skimage.morphology", None)
    with pytest.raises(ImportError, match=r'pip install "trackfit\[image\]"'):
        reconstruct(toy_tracks(2, 1), ReconConfig(emission_estimator="skeleton"))
