"""Fixtures of the fuzz suite: the sandboxed child process, the valid files every mutation starts from, and the
tally of inputs tried, accepted and refused per target (printed at the end of the test run)."""

from __future__ import annotations

import collections
from pathlib import Path

import h5py
import numpy as np
import pytest

from . import probes
from .sandbox import Sandbox

ROOT = Path(__file__).resolve().parents[2]
#: a simulator file of the project's sample data; the base raw file is its first events
SIMULATED = ROOT / "sample_data" / "pol100_5p9kev_120deg_short.h5"
BASE_EVENTS = 10
BASE_TRUTH = ("emission_azimuth_rad", "photon_energy_kev", "absorber_shell")

#: target -> Counter of outcomes ("accepted", "refused", and the failures), filled by contract.record
TALLY: dict[str, collections.Counter] = collections.defaultdict(collections.Counter)


def pytest_terminal_summary(terminalreporter):
    if not TALLY:
        return
    terminalreporter.section("fuzz inputs per target")
    for target in sorted(TALLY):
        counts = TALLY[target]
        rest = ", ".join(f"{k} {v}" for k, v in sorted(counts.items()) if k not in ("accepted", "refused"))
        terminalreporter.write_line(f"{target:<28} tried {sum(counts.values()):>5}, accepted {counts['accepted']:>5}, "
                                    f"refused {counts['refused']:>5}" + (f", {rest}" if rest else ""))


@pytest.fixture(scope="package")
def sandbox():
    box = Sandbox(probes.warm_up)
    yield box
    box.close()


@pytest.fixture(scope="package")
def fuzz_dir(tmp_path_factory):
    return tmp_path_factory.mktemp("fuzz")


@pytest.fixture(scope="package")
def outside_file(fuzz_dir):
    """A text file outside every HDF5 file: what external links and external storage point at."""
    path = fuzz_dir / "outside.txt"
    path.write_text("not pixel values: a text file beside the data\n" * 200)
    return path


@pytest.fixture(scope="package")
def base_raw(fuzz_dir):
    """A small valid simulator file: the first events of a sample run, with three truth columns and the run info,
    written by RawEventWriter in small chunks (so a file of a few tens of kB still has several chunks)."""
    from trackfit import RawEventWriter, open_raw

    path = fuzz_dir / "base_raw.h5"
    with open_raw(SIMULATED) as reader:
        batch = reader.read_batch(0, BASE_EVENTS)
        run_info = {k: v for k, v in reader.run_info.items() if k in ("nominal_counts_per_kev", "design", "seed")}
        grid = reader.grid
    truth = {k: batch.truth[k] for k in BASE_TRUTH}
    from trackfit import EventBatch

    batch = EventBatch(roi=batch.roi, start=batch.start, signal=batch.signal, time_s=batch.time_s,
                       trigger_id=batch.trigger_id, grid=grid, truth=truth)
    with RawEventWriter(path, grid, run_info=run_info, created_utc="1970-01-01T00:00:00Z", chunk_events=4,
                        chunk_pixels=1024) as writer:
        writer.append(batch)
    return path


@pytest.fixture(scope="package")
def base_table(sandbox, base_raw, fuzz_dir):
    """The event table of the base raw file, made in the child process (where the kernels are loaded)."""
    path = fuzz_dir / "base_table.h5"
    outcome = sandbox.run(probes.read_raw, base_raw, path, strict=True)
    assert outcome.kind == "accepted", str(outcome)
    return path


def calibration_parts():
    """A calibration with every part, as in the calibration-file tests."""
    from trackfit.analysis import EnergyScale, GainDrift, GainMap, ModulationFactorCurve, SpuriousMap

    edges = np.array([-2.0, 0.0, 2.0])
    shape = (2, 2, 2)
    return dict(
        energy_scale=EnergyScale(coefficients=(0.0, 5.895 / 5000.0), line_pulse_heights=(5000.0,),
                                 line_energies_kev=(5.895,)),
        gain_map=GainMap(x_edges_mm=edges, y_edges_mm=edges, relative_gain=np.array([[0.9, 1.1], [np.nan, 1.0]]),
                         relative_gain_err=np.full((2, 2), 0.01), counts=np.array([[500, 600], [10, 700]]),
                         reference_peak=5000.0, min_counts=300),
        gain_drift=GainDrift(node_time_s=np.array([0.0, 100.0]), node_gain=np.array([1.05, 0.95]), model="spline"),
        modulation_factor=ModulationFactorCurve(coefficients=(0.1, 0.2), energy_range_kev=(2.0, 8.0),
                                                points_energy_kev=(2.0, 8.0), points_value=(0.24, 0.52),
                                                points_error=(0.01, 0.01)),
        spurious_modulation=SpuriousMap(energy_kev=np.array([3.0, 6.0]), x_edges_mm=edges, y_edges_mm=edges,
                                        q=np.arange(8.0).reshape(shape) / 100, u=-np.arange(8.0).reshape(shape) / 100,
                                        q_err=np.full(shape, 0.001), u_err=np.full(shape, 0.001),
                                        counts=np.full(shape, 1e5)),
    )


@pytest.fixture(scope="package")
def base_calibration(fuzz_dir):
    from trackfit.analysis import Calibration
    from trackfit.analysis.calfile import make_provenance

    parts = calibration_parts()
    provenance = {name: make_provenance(runs=[f"run_{name}.h5"], cuts={"cut": "StatusCut"}) for name in parts}
    path = fuzz_dir / "base_calibration.h5"
    Calibration(**parts, provenance=provenance).save(path)
    with h5py.File(path, "r") as f:  # the file has the layout docs/calibration-format.md describes
        assert sorted(f) == sorted(parts)
    return path


@pytest.fixture(scope="package")
def base_pixel_map(fuzz_dir):
    """A small valid pixel map (a 20 x 12 chip), as in the pixel-map file tests."""
    from trackfit import HexGrid
    from trackfit.io.pixelmap import PixelMap, SourceRun, write_pixel_map

    grid = HexGrid(n_columns=20, n_rows=12)
    rng = np.random.default_rng(1)
    shape = grid.shape
    pixel_map = PixelMap(grid=grid, pedestal_adc=rng.normal(400, 20, shape), pedestal_error_adc=np.full(shape, 0.1),
                         noise_adc=rng.uniform(1.5, 2.5, shape), noise_error_adc=np.full(shape, 0.08),
                         occupancy=rng.uniform(0, 1e-3, shape), n_samples=np.full(shape, 400),
                         n_above=np.zeros(shape, int), code=np.zeros(shape, np.uint8),
                         settings={"min_samples": 50, "hot_p_value": 1e-9}, statistics={"noise_median_adc": 2.0},
                         sources=(SourceRun(name="ped.h5", fingerprint="crc32:roi=1", n_events=400,
                                            trigger_mode="random", pedestal_subtracted=False),))
    path = fuzz_dir / "base_pixel_map.h5"
    write_pixel_map(path, pixel_map, created_utc="1970-01-01T00:00:00Z")
    return path
