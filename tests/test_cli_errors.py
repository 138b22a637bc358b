"""What the command line shows when the input or the environment is wrong: one line naming the file and the flag,
exit status 2, never a traceback (``--debug`` or TRACKFIT_DEBUG=1 adds it); a defect of trackfit exits with 3."""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from trackfit import EventBatch, HexGrid, RawEventWriter
from trackfit.cli import main
from trackfit.io.table import read_table, write_table

IS_ROOT = hasattr(os, "geteuid") and os.geteuid() == 0


def one_line_error(capsys, command: str) -> str:
    """The stderr of a refused command: exactly one line, ``trackfit <command>: error: ...``, no traceback."""
    err = capsys.readouterr().err
    assert "Traceback" not in err
    lines = [line for line in err.splitlines() if not line.startswith(f"trackfit {command}: warning:")]
    assert len(lines) == 1, err
    assert lines[0].startswith(f"trackfit {command}: error: "), err
    return lines[0]


def left_behind(folder: Path) -> list[str]:
    """Temporary or partial files a failed write left in ``folder``."""
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".") or p.name.endswith(".partial"))


# ----------------------------------------------------------------------------------------------- inputs of tests
def small_table(rng, n=3000, *, estimates=False):
    """An event table with the columns the analysis reads: isotropic emission angles, a 6 keV line."""
    ph = 3000.0 * 6.0 * (1 + 0.07 * rng.standard_normal(n))
    x, y = rng.normal(0, 1.0, n), rng.normal(0, 1.0, n)
    minor = rng.uniform(0.001, 0.004, n)
    columns = {
        "event_index": np.arange(n, dtype=np.int64), "trigger_id": np.arange(n, dtype=np.int64),
        "time_s": np.sort(rng.uniform(0, 100, n)), "status": np.zeros(n, np.uint16),
        "n_pixels": rng.integers(20, 300, n).astype(np.int32), "pulse_height": ph.astype(np.float32),
        "energy_kev": (ph / 3000.0).astype(np.float32), "centroid_x_mm": x.astype(np.float32),
        "centroid_y_mm": y.astype(np.float32), "conv_x_mm": x.astype(np.float32), "conv_y_mm": y.astype(np.float32),
        "emission_rad": rng.uniform(-np.pi, np.pi, n).astype(np.float32),
        "m2_major_mm2": (minor * rng.uniform(1.5, 5, n)).astype(np.float32), "m2_minor_mm2": minor.astype(np.float32),
    }
    if estimates:
        columns.update(adaptive_emission_rad=columns["emission_rad"], adaptive_conv_x_mm=columns["conv_x_mm"],
                       adaptive_conv_y_mm=columns["conv_y_mm"])
    return columns


@pytest.fixture(scope="module")
def tables(tmp_path_factory):
    """Good and damaged event tables (paths by name)."""
    rng = np.random.default_rng(2026)
    folder = tmp_path_factory.mktemp("tables")
    good = small_table(rng)
    n = len(good["status"])
    variants = {"good": good, "empty": {k: v[:0] for k, v in good.items()},
                "all_failed": dict(good, status=np.full(n, 2, np.uint16)),  # NO_SIGNAL on every event
                "no_angles": dict(good, emission_rad=np.full(n, np.nan, np.float32)),
                "angles_out_of_range": dict(good, emission_rad=(good["emission_rad"] * 1000).astype(np.float32)),
                "infinite_energy": dict(good, energy_kev=np.where(np.arange(n) == 17, np.inf,
                                                                  good["energy_kev"]).astype(np.float32)),
                "no_status": {k: v for k, v in good.items() if k != "status"},
                "no_pulse_height": {k: v for k, v in good.items() if k != "pulse_height"}}
    return {name: write_table(folder / f"{name}.h5", columns) for name, columns in variants.items()}


def write_wide_event(path, *, hits, n_columns=160, n_rows=130, noise_adc=2.0, seed=5):
    """A raw file of one event whose ROI is the whole chip (``n_columns`` x ``n_rows``): Gaussian noise plus
    blobs of 400 ADC counts at the (column, row) centres in ``hits``."""
    grid = HexGrid(n_columns=n_columns, n_rows=n_rows)
    rng = np.random.default_rng(seed)
    image = rng.normal(0, noise_adc, (n_rows, n_columns))
    for column, row in hits:
        image[row - 2:row + 3, column - 2:column + 3] += 400.0
    batch = EventBatch(roi=np.array([[0, 0, n_columns, n_rows]], np.int32),
                       start=np.array([0, n_columns * n_rows]), signal=image.round().astype(np.int16).ravel(),
                       time_s=np.array([0.0]), trigger_id=np.array([1]), grid=grid)
    with RawEventWriter(path, grid, run_info={"source": "test generator"}) as writer:
        writer.append(batch)
    return path


# ------------------------------------------------------------------------------------- the policy of main()
def test_debug_flag_and_variable_show_the_traceback(tmp_path, capsys, monkeypatch):
    missing = str(tmp_path / "missing.h5")
    monkeypatch.delenv("TRACKFIT_DEBUG", raising=False)
    assert main(["show", missing, "-e", "0", "-o", str(tmp_path / "x.png")]) == 2
    assert missing in one_line_error(capsys, "show")
    assert main(["--debug", "show", missing, "-e", "0", "-o", str(tmp_path / "x.png")]) == 2
    err = capsys.readouterr().err
    assert "Traceback (most recent call last)" in err and err.rstrip().splitlines()[-1].startswith(
        "trackfit show: error: ")
    monkeypatch.setenv("TRACKFIT_DEBUG", "1")
    assert main(["show", missing, "-e", "0", "-o", str(tmp_path / "x.png")]) == 2
    assert "Traceback (most recent call last)" in capsys.readouterr().err


def test_an_internal_error_exits_3_with_one_line(capsys, monkeypatch):
    import trackfit.commands.show as show

    def broken(args):
        raise TypeError("an injected defect")

    monkeypatch.delenv("TRACKFIT_DEBUG", raising=False)
    monkeypatch.setattr(show, "run", broken)
    assert main(["show", "any.h5", "-e", "0"]) == 3
    err = capsys.readouterr().err
    assert err == ("trackfit show: internal error: TypeError: an injected defect (rerun with --debug for the "
                   "traceback; please report it)\n")
    assert main(["--debug", "show", "any.h5", "-e", "0"]) == 3
    assert "Traceback (most recent call last)" in capsys.readouterr().err


# ------------------------------------------------------------------------------------------ outputs that fail
def output_cases(tables, raw, target):
    """(command, argv) writing to ``target`` (a path whose folder cannot hold it), one per output flag."""
    table, cal_args = str(tables["good"]), ["--modulation-factor", "0.4"]
    return [
        ("simulate", ["simulate", "--preset", "hedme-1atm-1cm", "-n", "5", "-o", str(target), "--no-progress"],
         "-o/--output"),
        ("calibrate", ["calibrate", "-o", str(target), "--flat-field", table], "-o/--output"),
        ("polarization", ["polarization", table, *cal_args, "--json", str(target)], "--json"),
        ("polarization", ["polarization", table, *cal_args, "--figures", str(target)], "--figures"),
        ("show", ["show", str(raw), "-e", "0", "--no-overlay", "-o", str(target)], "-o/--output"),
        ("reconstruct", ["reconstruct", str(raw), "--out-dir", str(target), "--no-progress"], "--out-dir"),
        ("reconstruct", ["reconstruct", str(raw), "-o", str(target), "--no-progress"], "-o/--output"),
        ("pixel-map", ["pixel-map", str(raw), "-o", str(target), "--no-progress"], "-o/--output"),
    ]


def test_outputs_below_a_file_are_refused_naming_the_flag(tables, small_raw_file, tmp_path, capsys):
    raw, _ = small_raw_file
    blocker = tmp_path / "a_file.txt"
    blocker.write_text("not a folder")
    target = blocker / "out" / "result.h5"
    for command, argv, flag in output_cases(tables, raw, target):
        assert main(argv) == 2, argv
        line = one_line_error(capsys, command)
        assert flag in line and str(blocker) in line, line
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a_file.txt", "small.h5"]


@pytest.mark.skipif(IS_ROOT, reason="the superuser writes into read-only folders (the subprocess test below mounts "
                    "a read-only file system instead)")
def test_read_only_folder_in_process(tables, small_raw_file, tmp_path, capsys):
    raw, _ = small_raw_file
    folder = tmp_path / "read_only"
    folder.mkdir()
    folder.chmod(0o555)
    try:
        for command, argv, flag in output_cases(tables, raw, folder / "result.h5"):
            assert main(argv) == 2, argv
            line = one_line_error(capsys, command)
            assert flag in line and "permission denied" in line.lower(), line
        assert list(folder.iterdir()) == []
    finally:
        folder.chmod(0o755)


def read_only_runner(folder: Path):
    """A command prefix that runs the console script with ``folder`` read-only: a plain run when folder
    permissions bind us, else (the superuser) a private mount namespace with a read-only tmpfs on ``folder``;
    None when neither is possible."""
    script = shutil.which("trackfit")
    console = [script] if script else [sys.executable, "-m", "trackfit"]
    if not IS_ROOT:
        folder.chmod(0o555)
        return console
    unshare = shutil.which("unshare")
    if unshare is None:
        return None
    probe = subprocess.run([unshare, "-m", "sh", "-c", f"mount -t tmpfs -o ro,size=64k tmpfs '{folder}'"],
                           capture_output=True)
    if probe.returncode != 0:
        return None
    return [unshare, "-m", "sh", "-c", f"mount -t tmpfs -o ro,size=64k tmpfs '{folder}' && exec \"$@\"", "sh",
            *console]


@pytest.mark.parametrize("case", ["simulate", "show"])
def test_read_only_target_console_script(case, small_raw_file, tmp_path):
    raw, _ = small_raw_file
    folder = tmp_path / "read_only"
    folder.mkdir()
    runner = read_only_runner(folder)
    if runner is None:
        pytest.skip("no way to make a read-only folder here (superuser without mount namespaces)")
    argv = {"simulate": ["simulate", "--preset", "hedme-1atm-1cm", "-n", "5", "-o", str(folder / "sim.h5"),
                         "--no-progress"],
            "show": ["show", str(raw), "-e", "0", "--no-overlay", "-o", str(folder / "event.png")]}[case]
    env = dict(os.environ, MPLBACKEND="agg")
    env.pop("TRACKFIT_DEBUG", None)
    try:
        done = subprocess.run([*runner, *argv], capture_output=True, text=True, env=env, timeout=300)
    finally:
        folder.chmod(0o755)
    assert done.returncode == 2, done.stderr
    assert "Traceback" not in done.stderr
    line = done.stderr.strip().splitlines()[-1]
    assert line.startswith(f"trackfit {case}: error: cannot write file '{folder}/") and "-o/--output" in line
    assert "read-only file system" in line or "permission denied" in line, line
    assert list(folder.iterdir()) == []


def test_out_dir_is_created_and_a_folder_is_no_output_file(small_raw_file, tmp_path, capsys):
    raw, _ = small_raw_file
    out_dir = tmp_path / "new" / "deeper"
    assert main(["reconstruct", str(raw), "--out-dir", str(out_dir), "--no-progress"]) == 0
    capsys.readouterr()
    assert [p.name for p in out_dir.glob("*.h5")] == ["small_events.h5"]
    assert main(["show", str(raw), "-e", "0", "--no-overlay", "-o", str(out_dir)]) == 2
    assert f"-o/--output '{out_dir}' is a folder, not a file" in one_line_error(capsys, "show")


def test_a_failed_figure_leaves_nothing_and_keeps_the_old_file(tmp_path, monkeypatch):
    import matplotlib.pyplot as plt

    from trackfit.io.errors import FileWriteError
    from trackfit.io.whole_files import save_figure_whole, write_text_whole

    target = tmp_path / "figure.png"
    target.write_bytes(b"the figure of yesterday")
    fig, _ = plt.subplots()

    def full_disk(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(fig, "savefig", full_disk)
    with pytest.raises(FileWriteError) as caught:
        save_figure_whole(fig, target)
    assert str(caught.value) == f"cannot write file '{target}': no space left on device"
    assert target.read_bytes() == b"the figure of yesterday" and sorted(tmp_path.iterdir()) == [target]
    assert not plt.fignum_exists(fig.number)
    write_text_whole(target.with_suffix(".json"), "{}\n")
    with pytest.raises(FileExistsError):
        write_text_whole(target.with_suffix(".json"), "{}\n", overwrite=False)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["figure.json", "figure.png"]


# --------------------------------------------------------------------------------------- tables that fail
@pytest.mark.parametrize("command", ["calibrate", "polarization"])
def test_empty_failed_and_damaged_tables_are_named(command, tables, tmp_path, capsys):
    def run(name):
        if command == "calibrate":
            argv = ["calibrate", "-o", str(tmp_path / "cal.h5"), "--flat-field", str(tables[name])]
        else:
            argv = ["polarization", str(tables[name]), "--modulation-factor", "0.4"]
        assert main(argv) == 2, name
        line = one_line_error(capsys, command)
        assert f"'{tables[name]}'" in line, line
        return line

    n = len(read_table(tables["good"], ["status"]))
    assert "0 rows" in run("empty")
    # every event has the failure bit NO_SIGNAL: the cut flow and the reason, counted from the table
    line = run("all_failed")
    assert f"input {n}; default: emission angle, no failure bit removed {n}, kept 0" in line
    assert f"{n} have failure bit NO_SIGNAL" in line
    assert f"{n} have no emission angle (NaN or infinite) without a failure bit" in run("no_angles")
    line = run("angles_out_of_range")
    angles = read_table(tables["angles_out_of_range"], ["emission_rad"])["emission_rad"]
    outside = int((np.abs(angles) > np.pi).sum())  # numpy's count of the angles outside [-pi, pi]
    assert f"column 'emission_rad': {outside} of the {n} events" in line and "first row 0" in line
    if command == "polarization":  # energies are checked where they are used (calibrate's flat field refits them)
        assert "column 'energy_kev': 1 of the" in run("infinite_energy") and "event_index 17" in \
            run("infinite_energy")
    assert "has no column 'status'" in run("no_status") and "made by trackfit" in run("no_status")
    if command == "calibrate":
        assert "has no column 'pulse_height'" in run("no_pulse_height")
    assert not (tmp_path / "cal.h5").exists()


def test_missing_estimate_and_a_calibration_of_another_estimate(tmp_path, capsys):
    rng = np.random.default_rng(7)
    two_stage = write_table(tmp_path / "two_stage.h5", small_table(rng, 20_000))
    both = write_table(tmp_path / "both.h5", small_table(rng, 3000, estimates=True))
    assert main(["polarization", str(two_stage), "--modulation-factor", "0.4", "--estimator", "adaptive"]) == 2
    line = one_line_error(capsys, "polarization")
    assert f"event table '{two_stage}'" in line and "has no column 'adaptive_emission_rad'" in line
    assert "--estimator adaptive" in line
    cal = tmp_path / "cal.h5"
    assert main(["calibrate", "-o", str(cal), "--polarized", str(two_stage)]) == 0
    capsys.readouterr()
    assert main(["polarization", str(both), "-c", str(cal), "--estimator", "adaptive"]) == 2
    line = one_line_error(capsys, "polarization")
    assert f"calibration '{cal}'" in line and "'two-stage'" in line and "'adaptive'" in line


# ---------------------------------------------------------------------------------- show on a full-chip ROI
def test_region_to_draw_is_the_box_around_the_hits(tmp_path):
    from trackfit import open_raw
    from trackfit.plotting import RegionTooLargeError, draw_event, region_to_draw

    path = write_wide_event(tmp_path / "wide.h5", hits=[(40, 30), (48, 36)], n_columns=64, n_rows=48)
    with open_raw(path) as reader:
        event = reader[0]
    region = region_to_draw(event, threshold_adc=50.0, max_pixels=1000, margin_pixels=2)
    # the box computed here from the blobs: columns 38..50 and rows 28..38, widened by 2 pixels
    expected = (event.columns >= 36) & (event.columns <= 52) & (event.rows >= 26) & (event.rows <= 40)
    assert np.array_equal(region, expected)
    assert region_to_draw(event, threshold_adc=None, max_pixels=1000, margin_pixels=2).tolist() == region.tolist()
    ax = draw_event(event, threshold_adc=50.0, max_pixels=1000, margin_pixels=2)
    assert sum(len(c.get_paths()) for c in ax.collections) == int(expected.sum())
    assert f"{int(expected.sum())} drawn, around the hits" in ax.get_title()
    assert region_to_draw(event, max_pixels=len(event.signal)).all()  # small enough: everything
    with pytest.raises(RegionTooLargeError, match=r"holds \d+ of its 3072 ROI pixels, more than the 100"):
        region_to_draw(event, threshold_adc=50.0, max_pixels=100)
    import matplotlib.pyplot as plt

    plt.close("all")


def test_show_draws_a_full_chip_event_around_its_track_or_refuses(tmp_path, capsys):
    path = write_wide_event(tmp_path / "wide.h5", hits=[(80, 60)])
    out = tmp_path / "event.png"
    assert main(["show", str(path), "-e", "0", "--no-overlay", "--threshold-adc", "50", "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "drawn: 121 of the 20800 ROI pixels" in text and out.exists()  # the 5 x 5 blob widened by 3 pixels
    spread = write_wide_event(tmp_path / "spread.h5", hits=[(3, 3), (156, 126)])
    assert main(["show", str(spread), "-e", "0", "--no-overlay", "--threshold-adc", "50", "-o", str(out)]) == 2
    line = one_line_error(capsys, "show")
    assert "more than the 20000 a display draws" in line and "--max-pixels N" in line
    assert main(["show", str(spread), "-e", "0", "--no-overlay", "--max-pixels", "0"]) == 2
    assert "--max-pixels must be >= 1 (got 0)" in one_line_error(capsys, "show")


def test_show_default_matches_the_library():
    from trackfit.commands.show import DEFAULT_MAX_PIXELS
    from trackfit.plotting import DEFAULT_MAX_PIXELS as LIBRARY_DEFAULT

    assert DEFAULT_MAX_PIXELS == LIBRARY_DEFAULT
