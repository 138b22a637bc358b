"""The README's main-job command and its Python example work as written, on the bundled sample runs."""

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import trackfit

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def main_job(tmp_path_factory):
    out = tmp_path_factory.mktemp("main_job")
    env = dict(os.environ, PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ.get('PATH', '')}")
    done = subprocess.run(["bash", str(ROOT / "sample_data" / "run_all.sh"), str(out)], capture_output=True,
                          text=True, env=env, timeout=600)
    assert done.returncode == 0, done.stderr
    return out, done.stdout


def test_quick_start_command_is_the_documented_one():
    readme = (ROOT / "README.md").read_text()
    block = re.search(r"## Quick start.*?```\n(.*?)```", readme, flags=re.S).group(1).strip().splitlines()
    assert block == ['pip install -e . && bash sample_data/run_all.sh', 'pip install -e ".[dev]" && python -m pytest']
    ci = (ROOT / ".ci" / "run").read_text()
    assert block[1] in ci


def test_main_job_measures_the_known_beam(main_job):
    out, stdout = main_job
    assert "fully reconstructed" in stdout and "wrote" in stdout
    result = json.loads((out / "pol100_5p9kev_120deg_short.json").read_text())
    stokes = result["stokes"]
    # the simulated run is 100 % polarized at 120 degrees (= -60 degrees modulo 180): recovered within 3 sigma
    assert abs(stokes["degree"] - 1.0) < 3 * stokes["degree_err"]
    angle_deg = (stokes["angle_deg"] + 60.0 + 90.0) % 180.0 - 90.0
    assert abs(angle_deg) < 3 * stokes["angle_err_deg"]
    # MDP99 = 4.29 / (mu sqrt(N)) without background (Weisskopf et al. 2010)
    expected = 4.29193 / (stokes["modulation_factor"] * np.sqrt(stokes["n_events"]))
    assert stokes["mdp99"] == pytest.approx(expected, rel=0.05)
    assert sorted(p.name for p in (out / "figures").glob("*.png"))


def test_python_example_runs(main_job, tmp_path, monkeypatch, capsys):
    # the README's example runs as written from the repository root after the Quick start: a folder with the same
    # relative paths (the sample run, the example settings file, the Quick start's calibration file)
    out, _ = main_job
    for name in ("sample_data/pol100_5p9kev_120deg_short.h5", "docs/examples/recon.toml"):
        (tmp_path / name).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(ROOT / name, tmp_path / name)
    (tmp_path / "trackfit_output").mkdir()
    shutil.copy(out / "calibration.h5", tmp_path / "trackfit_output" / "calibration.h5")
    monkeypatch.chdir(tmp_path)
    code = re.search(r"```python\n(.*?)```", (ROOT / "README.md").read_text(), flags=re.S).group(1)
    namespace = {}
    exec(compile(code, "README example", "exec"), namespace)
    result = namespace["result"]
    printed = capsys.readouterr().out
    # the simulated run is 100 % polarized at 120 degrees (= -60 degrees modulo 180): recovered within 3 sigma
    assert abs(result.degree - 1.0) < 3 * result.degree_err
    assert abs((result.angle_deg + 60.0 + 90.0) % 180.0 - 90.0) < 3 * result.angle_err_deg
    assert f"degree {result.degree:.1%}" in printed and f"from {result.n_events} events" in printed
    assert "Stokes parameters" in printed


def test_result_shortcuts_are_the_stokes_values(main_job):
    # every shortcut the README and the PolarizationMeasurement docstring list is the StokesResult's value
    from trackfit.analysis import Calibration, PolarizationMeasurement, measure_polarization

    out, _ = main_job
    table = trackfit.read_table(out / "pol100_5p9kev_120deg_short_events.h5")
    result = measure_polarization(table, calibration=Calibration.load(out / "calibration.h5"))
    table_rows = re.findall(r"^    (``\w+``[^\n]*)", PolarizationMeasurement.__doc__, flags=re.M)
    names = {n for row in table_rows for n in re.findall(r"``(\w+)``", row)}
    readme = (ROOT / "README.md").read_text()
    listed = readme[readme.index("- **Results.**"):readme.index("- **Tables in pandas.**")]
    for name in re.findall(r"`(\w+)`", listed):
        if hasattr(result.stokes, name) and name != "to_dict":
            names.add(name)
    assert {"degree", "degree_err", "angle_deg", "angle_err_deg", "mdp99", "n_events", "q", "u"} <= names
    for name in sorted(names):
        assert getattr(result, name) == getattr(result.stokes, name), name
        with pytest.raises(AttributeError):
            setattr(result, name, 0.0)


def test_example_settings_file_holds_every_default():
    # docs/examples/recon.toml, which the README points to, is a complete settings file at the defaults
    import tomllib

    from trackfit import ReconConfig

    path = ROOT / "docs" / "examples" / "recon.toml"
    assert ReconConfig.read_toml(path) == ReconConfig()
    # settings that are not set by default (counts_per_kev: from the raw file) appear as commented-out lines
    unset = {name for name, value in ReconConfig().to_dict().items() if value is None}
    assert set(tomllib.loads(path.read_text())["recon"]) == set(ReconConfig.field_names()) - unset
    assert all(f"# {name} = " in path.read_text() for name in unset)


def test_sample_data_readme_numbers_are_what_the_main_job_measures(main_job):
    # sample_data/README.md quotes the main job's results; they must be what it measures (to the digits quoted)
    from trackfit.analysis import Calibration

    out, _ = main_job
    text = " ".join((ROOT / "sample_data" / "README.md").read_text().split())
    curve = Calibration.load(out / "calibration.h5").modulation_factor
    low, high = sorted(zip(curve.points_energy_kev, curve.points_value, curve.points_error, strict=True))
    assert f"5.9 keV run at 30° shows a modulation factor of {high[1]:.3f} ± {high[2]:.3f}" in text
    assert f"3.7 keV run {low[1]:.3f} ± {low[2]:.3f}" in text
    stokes = json.loads((out / "pol100_5p9kev_120deg_short.json").read_text())["stokes"]
    quoted = (f"{100 * stokes['degree']:.1f} % ± {100 * stokes['degree_err']:.1f} % at "
              f"{stokes['angle_deg']:.1f}° ± {stokes['angle_err_deg']:.1f}°").replace("-", "−")
    assert quoted in text


def test_own_design_example_runs(tmp_path, monkeypatch, capsys):
    # the README's second example, as written, in an empty folder: a 20 keV argon design simulated, reconstructed,
    # calibrated from its own line and used to measure a beam simulated at 50 % and 30 degrees
    monkeypatch.chdir(tmp_path)
    blocks = re.findall(r"```python\n(.*?)```", (ROOT / "README.md").read_text(), flags=re.S)
    code = next(block for block in blocks if "ardme-3atm-3cm" in block)
    namespace = {}
    exec(compile(code, "README own-design example", "exec"), namespace)
    result, selection = namespace["result"], namespace["selection"]
    printed = capsys.readouterr().out
    # the simulated beam is recovered within 3 sigma (statistical and modulation-factor calibration errors added)
    degree_sigma = np.hypot(result.degree_err, result.degree_calibration_err)
    assert abs(result.degree - 0.5) < 3 * degree_sigma
    assert abs(result.angle_deg - 30.0) < 3 * result.angle_err_deg
    # the energy scale from the run's own line puts the line at 20 keV: the 18-22 keV cut keeps most events
    last_step = result.cut_flow.to_dict()["steps"][-1]
    assert last_step["kept"] > 0.8 * 6000
    # the same selection was used in both steps, and its cut flow shows in both outputs
    assert result.settings["selection"] == selection.to_dict()
    assert printed.count(last_step["cut"]) >= 2
    assert (tmp_path / "my_design" / "calibration.h5").exists()


def test_planner_example_runs_as_written(tmp_path):
    # the README's planner commands, run as written in an empty folder (the response cache in the test's folder)
    block = re.search(r"## Which design, how long, how many bytes.*?```\n(.*?)```", (ROOT / "README.md").read_text(),
                      flags=re.S).group(1)
    env = dict(os.environ, PATH=f"{Path(sys.executable).parent}{os.pathsep}{os.environ.get('PATH', '')}",
               TRACKFIT_CACHE_DIR=str(tmp_path / "cache"))
    done = subprocess.run(["bash", "-e", "-c", block], cwd=tmp_path, capture_output=True, text=True, env=env,
                          timeout=900)
    assert done.returncode == 0, done.stderr
    designs = json.loads((tmp_path / "planning" / "plan.json").read_text())["designs"]
    assert list(designs) == ["hedme-1atm-1cm", "dme-0.8atm-1cm", "ardme-3atm-3cm"]
    for plan in designs.values():
        for key in ("mdp99", "exposure_for_target_s", "effective_modulation_factor", "source_counts",
                    "background_counts", "bytes_per_day"):
            assert plan[key] > 0, key
    # what the README says of the answer
    hedme, dme, argon = designs.values()
    assert 0.013 < hedme["mdp99"] < 0.022 and 0.013 < dme["mdp99"] < 0.022               # "about 1.5-2 %"
    assert 4.5 < argon["source_counts"] / hedme["source_counts"] < 6.5                    # "five times more photons"
    assert argon["effective_modulation_factor"] < 3 * argon["effective_modulation_factor_err"]  # "cannot be told"
    assert any("within 3 errors of zero" in note for note in argon["notes"])
    assert 0.02 < argon["bands"][-1]["mdp99"] < 0.045 and argon["bands"][-1]["low_kev"] == pytest.approx(5.657, 1e-3)
    assert 6.0 < argon["bytes_per_day"] / hedme["bytes_per_day"] < 8.5                    # "seven times more bytes"
    assert sorted(p.name for p in (tmp_path / "planning" / "figures").glob("*.png")) == [
        "detected_spectra.png", "mdp_vs_exposure.png", "response_curves.png"]
