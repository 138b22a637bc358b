"""Numbers at and beyond the limits of the reconstruction: the chip geometry, the settings, cluster counts that
used to wrap, and values the float arithmetic cannot hold (the NOT_FINITE status bit, kernel against its twin)."""

import math

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from recon_helpers import kernel_columns
from scipy import ndimage

from trackfit import EventBatch, HexGrid, ReconConfig, reconstruct
from trackfit.analysis import UsableEvents
from trackfit.io.table import read_table, write_table
from trackfit.recon._reference import reconstruct_batch_reference
from trackfit.recon.config import SETTING_RANGES
from trackfit.recon.status import FAILURE_BITS, Status

#: numbers of every kind a damaged file, a TOML typo or a notebook can hand over
ANY_NUMBER = st.one_of(
    st.floats(), st.integers(-2**80, 2**80), st.booleans(), st.none(), st.text(max_size=3),
    st.sampled_from([0, 1, -1, 0.5, 1e-300, 1e20, 1e300, 2**31, 2**63, 2**64, 10**400, math.inf, -math.inf, math.nan,
                     np.float16(32768), np.float32(1e30), np.int64(-1), np.uint64(2**64 - 1), np.float64(2.0**63),
                     "300", b"300", [300], np.array([300])]),
)


@settings(max_examples=300, deadline=None, derandomize=True)
@given(pitch=ANY_NUMBER, n_columns=ANY_NUMBER, n_rows=ANY_NUMBER)
def test_hexgrid_accepts_a_usable_chip_or_names_the_parameter(pitch, n_columns, n_rows):
    try:
        grid = HexGrid(pitch_mm=pitch, n_columns=n_columns, n_rows=n_rows)
    except ValueError as err:
        assert str(err).split(" ")[0] in ("'pitch_mm'", "'n_columns'", "'n_rows'"), str(err)
        return
    # accepted: everything derived from the geometry is finite and every pixel index fits int32 (numpy.iinfo)
    assert isinstance(grid.n_columns, int) and isinstance(grid.n_rows, int) and isinstance(grid.pitch_mm, float)
    assert grid.n_pixels - 1 <= np.iinfo(np.int32).max
    assert all(math.isfinite(v) for v in grid.extent_mm) and grid.pixel_area_mm2 > 0
    x, y = grid.pixel_centre_mm(grid.n_columns - 1, grid.n_rows - 1)
    assert math.isfinite(float(x)) and math.isfinite(float(y))
    assert grid.contains(*grid.nearest_pixel(x, y))


def test_hexgrid_from_file_attributes_refuses_text_and_arrays():
    good = HexGrid().to_dict()
    assert HexGrid.from_dict({**good, "n_columns": np.int32(300), "shifted_rows": b"odd"}) == HexGrid()
    for key, value in (("n_columns", "300"), ("n_columns", np.array([300])), ("pitch_mm", b"0.05"),
                       ("n_rows", np.float64(1e300)), ("n_rows", np.float64(math.inf)), ("shifted_rows", b"\xff")):
        with pytest.raises(ValueError, match=f"'{key}' must be"):
            HexGrid.from_dict({**good, key: value})


NUMERIC_SETTINGS = sorted(SETTING_RANGES)


def _small_batch():
    image = np.zeros((6, 7), np.int16)
    image[2, 1:6] = [40, 60, 90, 200, 120]
    image[3, 2:4] = [30, 15]
    return EventBatch.from_images([image, image[::-1]], [(3, 3), (10, 12)], grid=HexGrid(n_columns=30, n_rows=30))


@settings(max_examples=200, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow])
@given(name=st.sampled_from(NUMERIC_SETTINGS), value=ANY_NUMBER)
def test_recon_config_accepts_what_the_kernel_can_run_or_names_the_setting(name, value):
    changes = {name: value}
    if name == "threshold_noise_rms":
        changes["pixel_map"] = "map.h5"
    if name == "start_search_inner_rms":
        changes["start_search_outer_rms"] = 100.0
    try:
        config = ReconConfig(emission_estimator="two-stage", **changes)
    except ValueError as err:
        assert str(err).startswith(f"'{name}' must be") or str(err).startswith("'start_search_outer_rms' must be >")
        return
    if name == "threshold_noise_rms":
        return  # needs a pixel map to run
    # accepted: the compiled kernel takes it (no typing or overflow error) and its result matches the numpy twin
    batch = _small_batch()
    kernel = kernel_columns(batch, config)
    reference = reconstruct_batch_reference(batch, config)
    assert np.array_equal(kernel["status"], reference["status"])
    assert np.array_equal(kernel["n_pixels"], reference["n_pixels"])


@pytest.mark.parametrize("text", ["threshold_adc = 1e20", "saturation_adc = 99999999999999999999",
                                  "min_pixels = inf", "counts_per_kev = -0.0", "second_pass_length_mm = nan",
                                  "threshold_adc = true", 'min_pixels = "6"'])
def test_settings_file_values_are_refused_naming_the_file_and_key(tmp_path, text):
    path = tmp_path / "recon.toml"
    path.write_text(f"[recon]\n{text}\n")
    with pytest.raises(ValueError) as err:
        ReconConfig.read_toml(path)
    key = text.split(" ")[0]
    assert str(path) in str(err.value) and f"'{key}' must be" in str(err.value)


def test_threshold_of_1e20_is_refused_before_the_kernel():
    with pytest.raises(ValueError, match=r"^'threshold_adc' must be a number between 0 and 32767 ADC counts "
                                         r"\(got 1e\+20\)$"):
        ReconConfig(threshold_adc=1e20)


def test_tens_of_thousands_of_clusters_are_counted_without_wrapping(tmp_path):
    # every other pixel of every other row: no two hits are 6-neighbours, so each hit is a cluster of its own
    grid = HexGrid(n_columns=400, n_rows=352)
    image = np.zeros(grid.shape, np.int16)
    image[::2, ::2] = 100
    n_hits = int(np.count_nonzero(image))
    assert n_hits == 35_200 > np.iinfo(np.int16).max
    # outside count: scipy.ndimage.label with the 6-neighbour structure of a hexagonal grid in axial coordinates,
    # built here from HexGrid.neighbours (each pixel's neighbour offsets in the sheared image)
    rows, cols = np.nonzero(image)
    q, r = grid.to_axial(cols, rows)
    sheared = np.zeros((grid.n_rows, int(q.max() - q.min()) + 1), bool)
    sheared[r, q - q.min()] = True
    nq, nr = grid.to_axial(*grid.neighbours(200, 100))
    q0, r0 = grid.to_axial(200, 100)
    structure = np.zeros((3, 3), bool)
    structure[1, 1] = True
    structure[nr - r0 + 1, nq - q0 + 1] = True
    _, n_components = ndimage.label(sheared, structure=structure)
    assert n_components == n_hits

    batch = EventBatch.from_images([image], [(0, 0)], grid=grid)
    table = reconstruct(batch, ReconConfig(emission_estimator="two-stage"))
    assert table["n_clusters"].dtype == np.int32 and int(table["n_clusters"][0]) == n_components
    path = write_table(tmp_path / "many.h5", table)
    assert int(read_table(path)["n_clusters"][0]) == n_components


def test_tables_with_the_older_int16_cluster_count_still_read(tmp_path):
    table = reconstruct(_small_batch(), ReconConfig(emission_estimator="two-stage"))
    path = write_table(tmp_path / "old.h5", table)
    with h5py.File(path, "r+") as f:
        events = f["events"]
        attrs = dict(events["n_clusters"].attrs)
        del events["n_clusters"]
        events.create_dataset("n_clusters", data=np.asarray(table["n_clusters"], np.int16))
        events["n_clusters"].attrs.update(attrs)
    old = read_table(path)
    assert old["n_clusters"].dtype == np.int16
    assert np.array_equal(old["n_clusters"], table["n_clusters"])
    assert np.array_equal(UsableEvents().mask(old), UsableEvents().mask(table))


def _forged(grid: HexGrid, **values) -> HexGrid:
    """A grid whose numbers bypassed the constructor's checks (as a hand-built object could)."""
    grid = HexGrid(n_columns=grid.n_columns, n_rows=grid.n_rows)
    for key, value in values.items():
        object.__setattr__(grid, key, value)
    return grid


def _forged_config(**values) -> ReconConfig:
    config = ReconConfig(emission_estimator="two-stage", min_pixels=1)
    for key, value in values.items():
        object.__setattr__(config, key, value)
    return config


@pytest.mark.parametrize("grid_values, config_values", [
    ({"pitch_mm": 1e300, "_x0_mm": 1e303, "_y0_mm": 0.0}, {}),    # positions and moments overflow
    ({"pitch_mm": 1e200, "_x0_mm": 0.0, "_y0_mm": 0.0}, {}),      # finite in float64, beyond float32
    ({}, {"counts_per_kev": 1e-300}),                              # energies overflow float32
    ({}, {"counts_per_kev": 5e-324}),                              # energies infinite
    ({}, {}),                                                      # nothing out of range: no bit
])
def test_not_finite_values_get_their_status_bit_in_the_kernel_and_its_twin(grid_values, config_values):
    batch = _small_batch()
    batch = EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, grid=_forged(batch.grid, **grid_values),
                       validate=False)
    config = _forged_config(**config_values)
    kernel = kernel_columns(batch, config)
    reference = reconstruct_batch_reference(batch, config)
    assert np.array_equal(kernel["status"], reference["status"])
    flagged = (kernel["status"] & int(Status.NOT_FINITE)) != 0
    # outside rule: IEEE float32 range (numpy.finfo) of the table's float columns
    beyond = np.zeros(len(batch), bool)
    for name in ("pulse_height", "energy_kev", "centroid_x_mm", "centroid_y_mm", "m2_major_mm2"):
        beyond |= ~(np.abs(kernel[name]) <= np.finfo(np.float32).max)
    assert np.array_equal(flagged, beyond)
    assert flagged.all() == bool(grid_values or config_values)


def test_an_absurd_energy_scale_in_a_raw_file_is_flagged_and_excluded(tmp_path):
    table = reconstruct(_small_batch(), ReconConfig(emission_estimator="two-stage"),
                        run_info={"nominal_counts_per_kev": 1e-300})
    assert np.all(np.isinf(table["energy_kev"]))
    assert np.all(table["status"] & int(Status.NOT_FINITE)) and Status.NOT_FINITE & FAILURE_BITS
    assert not UsableEvents().mask(table).any()
