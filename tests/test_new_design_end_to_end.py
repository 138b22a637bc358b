"""A new detector design from the README alone: the shell commands of its "Your own design" section simulate a
20 keV run of the 3 atm argon preset, reconstruct it, calibrate it from its own line with an energy cut in keV and
measure its polarization, with the same selection in both steps and visible in both outputs.

The block runs as written, except for smaller statistics (1500 events per run, a few seconds of simulation each)
and fixed seeds; the checks are 3-sigma checks against the simulated beams (the calibration run at 0 degrees, the
measured run at 30 degrees, both 100 % polarized). The reconstruction runs with its default settings: the
calibration finds the lines whatever nominal scale the table's own energies were computed with.
"""

import json
import os
import re
import shlex
from pathlib import Path

import numpy as np
import pytest

from trackfit.cli import main

README = Path(__file__).resolve().parents[1] / "README.md"
LINE_KEV = 20.0


def readme_commands() -> list[list[str]]:
    text = README.read_text()
    block = re.search(r"## Your own design.*?```\n(.*?)```", text, flags=re.S).group(1)
    return [shlex.split(line) for line in block.replace("\\\n", " ").strip().splitlines()]


@pytest.fixture(scope="module")
def design_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("argon")
    outputs = []
    here = os.getcwd()
    os.chdir(folder)
    try:
        seeds = iter(("21", "22"))
        for command in readme_commands():
            assert command[0] == "trackfit"
            args = command[1:]
            if args[0] == "simulate":
                args[args.index("-n") + 1] = "1500"
                args += ["--seed", next(seeds), "--no-progress"]
            if args[0] == "reconstruct":
                args += ["--no-progress"]
            if args[0] == "polarization":
                args += ["--json", "result.json"]
            outputs.append((args, _run(args)))
    finally:
        os.chdir(here)
    return folder, outputs


def _run(args):
    import contextlib
    import io

    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        status = main(args)
    assert status == 0, err.getvalue()
    return out.getvalue(), err.getvalue()


def test_readme_block_calibrates_from_own_lines_and_measures(design_run):
    folder, outputs = design_run
    by_command = {args[0]: (args, out, err) for args, (out, err) in outputs}
    calibrate_args, calibrate_out, calibrate_err = by_command["calibrate"]
    _, measure_out, measure_err = by_command["polarization"]
    # the energy scale comes from the run's own line, and the same energy window is cut in both steps
    assert [a for a in calibrate_args if "energy_kev=" in a] == ["tables/run_events.h5,energy_kev=20"]

    # the same selection in both steps, shown in both outputs, and no warning about it (or anything else)
    for output in (calibrate_out, measure_out):
        assert "default: emission angle, no failure bit" in output
        assert "18 <= energy_kev < 22 keV" in output
    assert calibrate_err == "" and measure_err == ""

    answer = json.loads((folder / "result.json").read_text())
    stokes = answer["stokes"]
    # the energy cut keeps the line: most events of a monochromatic 20 keV run (escape peak and tails removed)
    steps = answer["cut_flow"]["steps"]
    assert steps[1]["kept"] > 0.7 * steps[0]["kept"]
    # the simulated beam: 100 % polarized at 30 degrees; the degree's error includes the modulation-factor scale
    # error of the calibration run (both 3-sigma checks)
    degree_err = np.hypot(stokes["degree_err"], answer["degree_calibration_err"])
    assert abs(stokes["degree"] - 1.0) < 3 * degree_err
    assert abs(stokes["angle_deg"] - 30.0) < 3 * stokes["angle_err_deg"]
    assert stokes["detected"]


def test_energies_after_calibration_are_kev(design_run):
    # after the calibration from the run's own lines, its main line sits at 20 keV
    from trackfit.analysis import Calibration
    from trackfit.io.table import read_table

    folder, _ = design_run
    calibration = Calibration.load(folder / "cal.h5")
    energy = calibration.apply(read_table(folder / "tables" / "run_events.h5"))["energy_kev"]
    near_line = energy[(energy > 18) & (energy < 22)]
    assert np.median(near_line) == pytest.approx(LINE_KEV, abs=0.2)
