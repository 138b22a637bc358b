"""End to end on the simulated sample runs: reconstruct, calibrate, measure (sample_data/README.md).

The polarized runs were simulated 100 % polarized at 0 deg (3.7 keV), 30 deg and 120 deg (5.9 keV); the Fe-55 run
is an unpolarized flat field. The modulation factor is calibrated on the 3.7 keV and the 30 deg 5.9 keV runs, then
the degree and angle of the 120 deg run, which took no part in the calibration, must come out as simulated.
"""

import json
from pathlib import Path

import numpy as np
import pytest

SAMPLE = Path(__file__).resolve().parents[2] / "sample_data"
RUNS = ("fe55_flatfield_unpolarized", "pol100_3p7kev_0deg", "pol100_5p9kev_30deg", "pol100_5p9kev_120deg_short")

pytestmark = pytest.mark.skipif(not all((SAMPLE / f"{r}.h5").exists() for r in RUNS),
                                reason="sample_data/ runs not present")


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    from trackfit import reconstruct_file

    folder = tmp_path_factory.mktemp("tables")
    return {run: reconstruct_file(SAMPLE / f"{run}.h5", folder / f"{run}.h5", progress=False) for run in RUNS}


def test_known_polarization_recovered(tables, tmp_path, capsys):
    from trackfit.analysis import Calibration
    from trackfit.cli import main

    cal = tmp_path / "cal.h5"
    assert main(["calibrate", "-o", str(cal), "--flat-field", str(tables[RUNS[0]]),
                 "--unpolarized", str(tables[RUNS[0]]), "--polarized", f"{tables[RUNS[1]]},angle_deg=0",
                 "--polarized", f"{tables[RUNS[2]]},angle_deg=30", "--gain-cell-mm", "2.5",
                 "--spurious-cell-mm", "20"]) == 0
    calibration = Calibration.load(cal)
    # docs/methods.md section 9 [memory - sanity band only, +-0.1]: mu ~ 0.32 at 3.7 keV and ~ 0.47 at 5.9 keV
    assert calibration.modulation_factor(3.7) == pytest.approx(0.32, abs=0.1)
    assert calibration.modulation_factor(5.9) == pytest.approx(0.47, abs=0.1)
    # the Fe-55 K-alpha line sits at 5.895 keV after calibration (X-ray Data Booklet)
    assert calibration.energy_scale.energy_kev(calibration.gain_map.reference_peak) == pytest.approx(5.895,
                                                                                                      rel=0.01)
    out = tmp_path / "result.json"
    assert main(["polarization", str(tables[RUNS[3]]), "-c", str(cal), "--energy-kev", "4", "8",
                 "--json", str(out)]) == 0
    stokes = json.loads(out.read_text())["stokes"]
    # simulated: 100 % polarized at 120 deg, i.e. -60 deg in (-90, 90]
    assert abs(stokes["degree"] - 1.0) < 3 * stokes["degree_err"]
    assert abs(stokes["angle_deg"] + 60.0) < 3 * stokes["angle_err_deg"]
    assert stokes["degree_err"] < 0.15


def test_flat_field_shows_no_polarization(tables):
    # docs/methods.md section 9 [derived]: unpolarized MC on a perfect hex grid gives |Q|/I, |U|/I consistent with 0
    from trackfit.analysis import StatusCut, measure_polarization
    from trackfit.io.table import read_table

    result = measure_polarization(read_table(tables[RUNS[0]]), selection=StatusCut(), modulation_factor=1.0)
    s = result.stokes
    assert abs(s.q) < 3 * s.q_err and abs(s.u) < 3 * s.u_err


def test_calibrate_the_bundled_flat_field_with_default_options(tables, tmp_path, capsys):
    # the sample flat field (9000 Fe-55 events over 10 x 10 mm) with no option but the input: the gain-map cells
    # are chosen from the event count and the whole chain works
    from trackfit.analysis import Calibration
    from trackfit.cli import main

    cal = tmp_path / "cal.h5"
    assert main(["calibrate", "-o", str(cal), "--flat-field", str(tables[RUNS[0]])]) == 0
    captured = capsys.readouterr()
    assert "warning" not in captured.err
    assert "Cut flow of flat field run" in captured.out and "default: emission angle, no failure bit" in captured.out
    calibration = Calibration.load(cal)
    gain = calibration.gain_map
    # about 300 events or more in each of most cells: sqrt(100 mm^2 x 300 / 9000) = 1.8 mm -> 2 mm cells
    assert calibration.provenance["gain_map"]["cell_mm"] == 2.0
    assert gain.counts[np.isfinite(gain.relative_gain)].sum() >= 0.8 * gain.counts.sum()
    # the Fe-55 K-alpha line sits at 5.895 keV after calibration (X-ray Data Booklet)
    assert calibration.energy_scale.energy_kev(gain.reference_peak) == pytest.approx(5.895, rel=0.01)
