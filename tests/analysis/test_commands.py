"""The ``trackfit calibrate`` and ``trackfit polarization`` commands on small event-table files."""

import json

import numpy as np
import pytest

from trackfit.analysis import FE55_KALPHA_KEV, Calibration
from trackfit.cli import main
from trackfit.io.table import read_table, write_table

from .test_spectrum import fe55_pulse_heights
from .toys import modulated_angles

ADC_PER_KEV = 3000.0


def make_table(rng, n, *, energy_kev=None, modulation=0.0, angle_rad=0.0, spot_mm=None):
    """An event table with the columns of docs/table-format.md; flat field of Fe-55 unless energy_kev is given."""
    if energy_kev is None:
        ph = fe55_pulse_heights(rng, n, gain=ADC_PER_KEV)
    else:
        ph = ADC_PER_KEV * energy_kev * (1 + 0.07 * rng.standard_normal(n))
    if spot_mm is None:
        x, y = rng.uniform(-4, 4, n), rng.uniform(-4, 4, n)
    else:
        x, y = rng.normal(0, spot_mm, n), rng.normal(0, spot_mm, n)
    m2_minor_mm2 = rng.uniform(0.001, 0.004, n)
    return {
        "trigger_id": np.arange(n, dtype=np.int64), "time_s": np.sort(rng.uniform(0, 100, n)),
        "status": np.where(rng.random(n) < 0.02, 4, 0).astype(np.uint16),
        "n_pixels": rng.integers(20, 300, n).astype(np.int32), "n_clusters": np.ones(n, np.int16),
        "pulse_height": ph.astype(np.float32), "energy_kev": (ph / 2000.0).astype(np.float32),  # uncalibrated
        "centroid_x_mm": x.astype(np.float32), "centroid_y_mm": y.astype(np.float32),
        "conv_x_mm": x.astype(np.float32), "conv_y_mm": y.astype(np.float32),
        "axis_rad": np.zeros(n, np.float32),
        "emission_rad": modulated_angles(rng, n, modulation, angle_rad).astype(np.float32),
        "m2_major_mm2": (m2_minor_mm2 * rng.uniform(1.5, 5, n)).astype(np.float32),
        "m2_minor_mm2": m2_minor_mm2.astype(np.float32), "m3_major_mm3": np.zeros(n, np.float32),
        "peak_adc": np.full(n, 100, np.int16),
    }


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    rng = np.random.default_rng(110)
    folder = tmp_path_factory.mktemp("runs")
    paths = {}
    for name, kwargs, n in (("flat", {}, 20_000), ("pol4", dict(energy_kev=4.0, modulation=0.35), 20_000),
                            ("pol6", dict(energy_kev=6.0, modulation=0.5, angle_rad=np.deg2rad(30)), 20_000),
                            ("science", dict(energy_kev=5.0, modulation=0.425 * 0.6, angle_rad=np.deg2rad(-45),
                                             spot_mm=1.0), 20_000)):
        paths[name] = write_table(folder / f"{name}.h5", make_table(rng, n, **kwargs))
    return paths


def test_calibrate_then_polarization(runs, tmp_path, capsys):
    cal_path = tmp_path / "cal.h5"
    figures = tmp_path / "figs"
    assert main(["calibrate", "-o", str(cal_path), "--flat-field", str(runs["flat"]), "--unpolarized",
                 str(runs["flat"]), "--polarized", f"{runs['pol4']},angle_deg=0", "--polarized",
                 f"{runs['pol6']},angle_deg=30", "--gain-cell-mm", "2", "--spurious-cell-mm", "8",
                 "--figures", str(figures)]) == 0
    out = capsys.readouterr().out
    assert "modulation factor pol6.h5" in out and "wrote" in out
    cal = Calibration.load(cal_path)
    assert cal.parts() == ["energy_scale", "gain_map", "modulation_factor", "spurious_modulation"]
    # the energy scale maps the K-alpha peak to 5.895 keV (X-ray Data Booklet)
    assert cal.energy_scale.energy_kev(ADC_PER_KEV * FE55_KALPHA_KEV) == pytest.approx(FE55_KALPHA_KEV, rel=0.01)
    curve = cal.modulation_factor
    for energy, value, error, truth in zip(curve.points_energy_kev, curve.points_value, curve.points_error,
                                           (0.35, 0.5), strict=True):
        assert abs(value - truth) < 4 * error  # error includes the spurious map's (sqrt(2/N) each, Kislat 2015)
        assert error > np.sqrt(2 / 20_000)
        assert energy == pytest.approx(4.0 if truth == 0.35 else 6.0, rel=0.02)
    assert cal.provenance["modulation_factor"]["runs"] == ["pol4.h5", "pol6.h5"]
    assert {p.name for p in figures.glob("*.png")} >= {"gain_map.png", "modulation_factor.png",
                                                      "flat_field_spectrum.png"}

    result_path = tmp_path / "result.json"
    assert main(["polarization", str(runs["science"]), "-c", str(cal_path), "--energy-kev", "3",
                 "8", "--json", str(result_path), "--bands", "3", "5", "8", "--figures", str(figures)]) == 0
    printed = capsys.readouterr().out
    assert "degree" in printed and "MDP99" in printed and "Cut flow" in printed
    result = json.loads(result_path.read_text())
    stokes = result["stokes"]
    assert abs(stokes["degree"] - 0.6) < 4 * stokes["degree_err"]
    assert abs(stokes["angle_deg"] + 45) < 4 * stokes["angle_err_deg"]
    assert result["cut_flow"]["steps"][0]["cut"] == "default: emission angle, no failure bit"
    assert len(result["energy_bands"]["bands"]) == 2
    assert (figures / "science_stokes_plane.png").exists()


def test_polarization_errors(runs, tmp_path, capsys):
    assert main(["polarization", str(runs["science"])]) == 2
    assert "needs a modulation factor" in capsys.readouterr().err
    bad = tmp_path / "bad.toml"
    bad.write_text("energy = [1, 2]\n")
    assert main(["polarization", str(runs["science"]), "--modulation-factor", "0.4", "--cuts", str(bad)]) == 2
    assert "valid keys" in capsys.readouterr().err
    assert main(["polarization", str(runs["science"]), "--modulation-factor", "0.4", "--bkg-circle", "3", "3",
                 "1"]) == 2
    assert "--background-scale" in capsys.readouterr().err
    assert main(["polarization", str(tmp_path / "missing.h5"), "--modulation-factor", "0.4"]) == 2
    assert "does not exist" in capsys.readouterr().err


def test_polarization_with_background_and_weights(runs, capsys):
    # off-source ring far from the spot: scale = source area / background area (Kislat et al. 2015 subtraction)
    assert main(["polarization", str(runs["science"]), "--modulation-factor", "0.425", "--circle", "0", "0", "2",
                 "--bkg-circle", "3", "3", "0.5", "--background-scale", "16", "--weights", "ellipticity"]) == 0
    out = capsys.readouterr().out
    assert "Background cut flow" in out and "background" in out


def test_calibrate_needs_input(tmp_path, capsys):
    assert main(["calibrate", "-o", str(tmp_path / "c.h5")]) == 2
    assert "nothing to calibrate" in capsys.readouterr().err
    assert main(["calibrate", "-o", str(tmp_path / "c.h5"), "--polarized", "x.h5,angel_deg=3"]) == 2
    assert "expected key=value" in capsys.readouterr().err


def test_provenance_names_inputs(runs, tmp_path):
    # every output file stores its inputs' identity (DEVELOPERS.md, "House style")
    cal_path = tmp_path / "cal.h5"
    assert main(["calibrate", "-o", str(cal_path), "--flat-field", str(runs["flat"]), "--gain-cell-mm", "4"]) == 0
    prov = Calibration.load(cal_path).provenance["gain_map"]
    assert prov["inputs"][0]["label"] == "flat.h5" and prov["inputs"][0]["n_rows"] == 20_000
    # the default selection, recorded as cuts and as the text of the cut flow
    assert prov["cuts"] == {"cut": "AllOf", "parts": [{"cut": "UsableEvents", "reject_warnings": False}]}
    assert prov["selection"] == "default: emission angle, no failure bit"
    assert prov["cut_flows"]["flat.h5"]["steps"][0]["kept"] < 20_000  # the toy's TOO_FEW_PIXELS events removed
    out = tmp_path / "r.json"
    assert main(["polarization", str(runs["science"]), "-c", str(cal_path), "--modulation-factor", "0.4",
                 "--json", str(out)]) == 0
    result = json.loads(out.read_text())
    assert result["inputs"]["table"]["n_rows"] == 20_000
    assert "gain_map" in result["calibration_provenance"]


def test_lines_drift_and_update(runs, tmp_path):
    rng = np.random.default_rng(111)
    line = write_table(tmp_path / "line3.h5", make_table(rng, 8000, energy_kev=3.0))
    first = tmp_path / "first.h5"
    assert main(["calibrate", "-o", str(first), "--flat-field", str(runs["flat"]), "--line",
                 f"{line},energy_kev=3.0", "--gain-drift", "--gain-cell-mm", "4"]) == 0
    cal = Calibration.load(first)
    assert cal.parts() == ["energy_scale", "gain_map", "gain_drift"]
    # two lines: both land on their energies (a straight line through two points)
    scale = cal.energy_scale
    assert scale.energy_kev(scale.line_pulse_heights) == pytest.approx([FE55_KALPHA_KEV, 3.0], rel=1e-6)
    assert scale.energy_kev(ADC_PER_KEV * 3.0) == pytest.approx(3.0, rel=0.01)
    # --update keeps the parts it does not remake
    second = tmp_path / "second.h5"
    assert main(["calibrate", "-o", str(second), "--update", str(first), "--polarized", str(runs["pol6"])]) == 0
    updated = Calibration.load(second)
    assert updated.parts() == ["energy_scale", "gain_map", "gain_drift", "modulation_factor"]
    assert updated.energy_scale == scale


def test_same_selection_in_both_steps_or_a_warning(runs, tmp_path, capsys):
    cal_path = tmp_path / "cal.h5"
    assert main(["calibrate", "-o", str(cal_path), "--polarized", f"{runs['pol6']},angle_deg=30",
                 "--reject-warnings", "--min-elongation", "1.6"]) == 0
    out = capsys.readouterr().out
    assert "Cut flow of polarized run pol6.h5" in out
    assert "default: emission angle, no failure or warning bit" in out and "elongation >= 1.6" in out
    # the same status and track-shape cuts (and an energy window): no warning
    assert main(["polarization", str(runs["science"]), "-c", str(cal_path), "--reject-warnings",
                 "--min-elongation", "1.6", "--energy-kev", "5", "10"]) == 0
    captured = capsys.readouterr()
    assert "warning" not in captured.err and "default: emission angle, no failure or warning bit" in captured.out
    # the default selection alone differs from the calibration's: said on stderr, the result still printed
    assert main(["polarization", str(runs["science"]), "-c", str(cal_path)]) == 0
    captured = capsys.readouterr()
    assert "trackfit polarization: warning:" in captured.err and "'elongation >= 1.6'" in captured.err
    assert "Stokes parameters" in captured.out


def test_no_events_left_shows_the_cut_flow(runs, capsys):
    assert main(["polarization", str(runs["science"]), "--modulation-factor", "0.4", "--energy-kev", "50",
                 "60"]) == 2
    err = capsys.readouterr().err
    assert f"no events left in event table '{runs['science']}' after the selection: input " in err
    assert "default: emission angle, no failure bit" in err and "50 <= energy_kev < 60 keV" in err
    assert "background" not in err and err.count("\n") == 1  # one line
    # the counts of the one-line cut flow, recomputed here with numpy from the table's own columns
    from trackfit.analysis.estimates import estimator_of
    from trackfit.recon.estimators import ESTIMATE_COLUMNS
    from trackfit.recon.status import FAILURE_BITS

    table = read_table(runs["science"])
    angle = table[ESTIMATE_COLUMNS[estimator_of(table)]["emission_rad"]]
    kept = int((np.isfinite(angle) & ((table["status"].astype(np.int64) & int(FAILURE_BITS)) == 0)).sum())
    assert f"input {len(table)}; default: emission angle, no failure bit removed {len(table) - kept}, kept {kept}; " \
           f"50 <= energy_kev < 60 keV removed {kept}, kept 0" in err


def test_help_states_the_default_selection(capsys):
    for command in ("calibrate", "polarization"):
        with pytest.raises(SystemExit):
            main([command, "--help"])
        text = " ".join(capsys.readouterr().out.split())
        assert "Default selection, always applied first: events with an emission angle and no failure" in text
        assert "--reject-warnings" in text


def test_calibrate_errors_name_the_flags(runs, tmp_path, capsys):
    assert main(["calibrate", "-o", str(tmp_path / "c.h5"), "--flat-field", str(runs["flat"]), "--gain-cell-mm",
                 "0.2"]) == 2
    err = capsys.readouterr().err
    assert "--gain-cell-mm" in err and "--gain-min-counts" in err and "gain_cell_mm" not in err


def test_calibrate_warns_on_a_poor_line_fit(tmp_path, capsys):
    # a flat field of two unresolved lines given as one Gaussian line: the fit is poor and says so
    rng = np.random.default_rng(112)
    table = make_table(rng, 20_000, energy_kev=8.0)
    ph = ADC_PER_KEV * 8.0 * (1 + 0.03 * rng.standard_normal(20_000))  # 3 % rms lines 12 % apart
    ph[::2] *= 1.12
    table["pulse_height"] = ph.astype(np.float32)
    path = write_table(tmp_path / "double.h5", table)
    assert main(["calibrate", "-o", str(tmp_path / "c.h5"), "--flat-field", f"{path},energy_kev=8",
                 "--gain-cell-mm", "20"]) == 0
    captured = capsys.readouterr()
    assert "trackfit calibrate: warning: poor fit of the flat-field line at 8 keV" in captured.err
    assert "POOR" in captured.out


def test_polarization_of_several_tables(runs, tmp_path, capsys):
    # two tables on the command line give the answer of their concatenation (the Stokes sums add over events,
    # Kislat et al. 2015); the concatenation is made here with numpy, outside the command
    from trackfit import read_table

    both = {k: np.concatenate([read_table(runs["science"])[k], read_table(runs["pol6"])[k]])
            for k in read_table(runs["science"]).columns}
    joined = write_table(tmp_path / "joined.h5", both)
    out_two, out_one = tmp_path / "two.json", tmp_path / "one.json"
    common = ["--modulation-factor", "0.4", "--bands", "3", "5.5", "8", "--energy-kev", "2", "9"]
    assert main(["polarization", str(runs["science"]), str(runs["pol6"]), *common, "--json", str(out_two)]) == 0
    assert "runs: " in capsys.readouterr().out
    assert main(["polarization", str(joined), *common, "--json", str(out_one)]) == 0
    two, one = json.loads(out_two.read_text()), json.loads(out_one.read_text())
    for key in ("q", "u", "q_err", "u_err", "degree", "mdp99"):
        assert two["stokes"][key] == pytest.approx(one["stokes"][key], rel=1e-9)
    assert two["stokes"]["n_events"] == one["stokes"]["n_events"]
    assert two["cut_flow"] == one["cut_flow"]
    assert [t["label"] for t in two["inputs"]["tables"]] == [str(runs["science"]), str(runs["pol6"])]
    assert two["settings"]["n_tables"] == 2
    assert main(["polarization", str(runs["science"]), str(tmp_path / "none.h5"), "--modulation-factor",
                 "0.4"]) == 2
    assert "none.h5' does not exist" in capsys.readouterr().err
