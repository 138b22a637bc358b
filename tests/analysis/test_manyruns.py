"""measure_polarization on several tables: sums per table, then their combination, equal to the concatenation."""

import numpy as np
import pytest

from trackfit import EventTable, write_table
from trackfit.analysis import (
    Calibration,
    CircleRegion,
    EnergyWindow,
    ModulationFactorCurve,
    NoEventsLeftError,
    SpuriousMap,
    measure_polarization,
)

from .toys import modulated_angles


def _run(seed, n):
    """A polarized spot over a uniform background, with energies, positions, shapes and a few failed events."""
    rng = np.random.default_rng(seed)
    n_src = n // 3
    x = np.concatenate([rng.normal(0, 0.5, n_src), rng.uniform(-6, 6, n - n_src)])
    y = np.concatenate([rng.normal(0, 0.5, n_src), rng.uniform(-6, 6, n - n_src)])
    phi = np.concatenate([modulated_angles(rng, n_src, 0.2, np.deg2rad(25.0)),
                          modulated_angles(rng, n - n_src, 0.1, np.deg2rad(-50.0))])
    status = np.where(rng.uniform(size=n) < 0.03, 2, 0).astype(np.uint16)  # NO_SIGNAL: a failure bit
    phi[status != 0] = np.nan
    minor = rng.uniform(0.2, 1.0, n)
    return EventTable({"emission_rad": phi.astype(np.float32), "energy_kev": rng.uniform(2, 8, n).astype(np.float32),
                       "pulse_height": rng.uniform(5000, 30000, n).astype(np.float32),
                       "conv_x_mm": x.astype(np.float32), "conv_y_mm": y.astype(np.float32), "status": status,
                       "m2_major_mm2": (minor + rng.uniform(0.0, 2.0, n)).astype(np.float32),
                       "m2_minor_mm2": minor.astype(np.float32)})


@pytest.fixture(scope="module")
def runs():
    return [_run(seed, n) for seed, n in ((1, 9000), (2, 4000), (3, 12000), (4, 1))]  # the last has one event


@pytest.fixture(scope="module")
def calibration():
    # a modulation-factor curve with errors (from its points) and a spurious map of 2 energy nodes x 3 x 3 cells
    curve = ModulationFactorCurve(coefficients=(0.1, 0.12), energy_range_kev=(2.0, 8.0),
                                  points_energy_kev=(2.0, 4.0, 8.0), points_value=(0.18, 0.27, 0.35),
                                  points_error=(0.01, 0.01, 0.02))
    rng = np.random.default_rng(7)
    edges = np.linspace(-6, 6, 4)
    shape = (2, 3, 3)
    spurious = SpuriousMap(energy_kev=np.array([3.0, 6.0]), x_edges_mm=edges, y_edges_mm=edges,
                           q=rng.normal(0, 0.01, shape), u=rng.normal(0, 0.01, shape),
                           q_err=np.full(shape, 0.003), u_err=np.full(shape, 0.004), counts=np.full(shape, 1e5))
    return Calibration(modulation_factor=curve, spurious_modulation=spurious)


def _assert_same(a, b):
    """Equal to float rounding: the sums are added in another order."""
    sa, sb = a.stokes, b.stokes
    for name in ("q", "u", "q_err", "u_err", "qu_cov", "degree", "degree_err", "angle_rad", "mdp99", "n_eff",
                 "sum_weights", "modulation_factor", "degree_low", "degree_high"):
        assert getattr(sa, name) == pytest.approx(getattr(sb, name), rel=1e-9, abs=1e-12), name
    assert sa.n_events == sb.n_events and sa.n_background == sb.n_background
    assert a.cut_flow.to_dict() == b.cut_flow.to_dict()
    assert a.spurious_map_q_err == pytest.approx(b.spurious_map_q_err, rel=1e-9)
    assert a.spurious_map_u_err == pytest.approx(b.spurious_map_u_err, rel=1e-9)
    assert a.modulation_factor_rel_err == pytest.approx(b.modulation_factor_rel_err, rel=1e-9)
    assert np.allclose(a.modulation.counts, b.modulation.counts, rtol=1e-12)  # sums of weights per bin
    assert a.modulation.modulation == pytest.approx(b.modulation.modulation, rel=1e-7)
    if a.bands is not None:
        for x, y in zip(a.bands.results, b.bands.results, strict=True):
            assert (x is None) == (y is None)
            if x is not None:
                assert x.q == pytest.approx(y.q, rel=1e-9) and x.q_err == pytest.approx(y.q_err, rel=1e-9)
                assert x.n_events == y.n_events
    if a.background_cut_flow is not None:
        assert a.background_cut_flow.to_dict() == b.background_cut_flow.to_dict()


@pytest.mark.parametrize("weighting", ["none", "ellipticity"])
def test_many_tables_equal_their_concatenation(runs, calibration, tmp_path, weighting):
    # the outside reference is the one-table answer on the concatenated rows (numpy.concatenate): Stokes sums are
    # sums over events (Kislat et al. 2015), so splitting the events over tables must not change them
    options = dict(calibration=calibration, weighting=weighting, selection=CircleRegion(radius_mm=2.5),
                   background_selection=CircleRegion(x_mm=3.5, y_mm=3.5, radius_mm=2.5), background_scale=1.0,
                   energy_bands_kev=[2, 4, 6, 8])
    joined = EventTable.concatenate(runs)
    one = measure_polarization(joined, **options)
    assert one.spurious_map_q_err > 0 and one.modulation_factor_rel_err > 0 and one.stokes.n_background > 0
    _assert_same(measure_polarization(runs, **options), one)
    # the same from files, read one at a time in blocks of rows
    paths = [write_table(tmp_path / f"run{k}_{weighting}.h5", run) for k, run in enumerate(runs)]
    from trackfit.analysis import manyruns

    manyruns_block, manyruns.BLOCK_ROWS = manyruns.BLOCK_ROWS, 5000
    try:
        from_files = measure_polarization(paths, **options)
    finally:
        manyruns.BLOCK_ROWS = manyruns_block
    _assert_same(from_files, one)
    assert from_files.settings["n_tables"] == 4


def test_separate_background_tables(runs, calibration):
    options = dict(calibration=calibration, selection=EnergyWindow(low_kev=3, high_kev=7), background_scale=0.5)
    one = measure_polarization(EventTable.concatenate(runs[:2]),
                               background_table=EventTable.concatenate(runs[2:]), **options)
    _assert_same(measure_polarization(runs[:2], background_table=runs[2:], **options), one)


def test_on_a_dask_cluster(runs, calibration, tmp_path):
    distributed = pytest.importorskip("dask.distributed", reason="needs the optional extra trackfit[dask]")
    paths = [write_table(tmp_path / f"run{k}.h5", run) for k, run in enumerate(runs)]
    options = dict(calibration=calibration, energy_bands_kev=[2, 5, 8])
    with distributed.Client(processes=False, n_workers=2, threads_per_worker=1, dashboard_address=None) as client:
        on_cluster = measure_polarization(paths, client=client, **options)
    _assert_same(on_cluster, measure_polarization(EventTable.concatenate(runs), **options))


def test_what_several_tables_refuse(runs):
    with pytest.raises(ValueError, match="belong to one table"):
        measure_polarization(runs, modulation_factor=0.3, weighting=np.ones(10))
    with pytest.raises(NoEventsLeftError, match="in the runs"):
        measure_polarization(runs, modulation_factor=0.3, selection=EnergyWindow(low_kev=20, high_kev=30))
    # one run without events left is fine when the others have some
    result = measure_polarization(runs, modulation_factor=0.3, selection=CircleRegion(radius_mm=1.0))
    assert result.stokes.n_events > 0
