"""The command line of pixel maps: simulate a lab-like chip, measure its map, look at it, reconstruct with it; flags
are checked and bad input gets one line naming the flag or the file, never a traceback."""

import json

import numpy as np
import pytest

pytest.importorskip("xraydb")

from trackfit import read_table  # noqa: E402
from trackfit.cli import main  # noqa: E402
from trackfit.io.pixelmap import PixelCode, read_pixel_map  # noqa: E402
from trackfit.simulate.labpixels import read_pixel_truth  # noqa: E402

LAB = """[lab_pixels]
chip_seed = 7
noise_spread_fraction = 0.3
n_hot = 4
n_dead = 4
pedestal_subtracted = false
"""
CHIP = """[readout]
n_columns = 48
n_rows = 48
[source]
beam = "flat"
field_size_mm = [2.2, 1.9]
"""


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    folder = tmp_path_factory.mktemp("cli")
    (folder / "lab.toml").write_text(LAB)
    (folder / "chip.toml").write_text(CHIP)
    chip = str(folder / "chip.toml")
    assert main(["simulate", chip, "--lab-pixels", str(folder / "lab.toml"), "--pedestal-run", "-n", "300",
                 "-o", str(folder / "ped.h5"), "--seed", "1"]) == 0
    assert main(["simulate", chip, "--lab-pixels", str(folder / "lab.toml"), "-n", "800", "-o",
                 str(folder / "tracks.h5"), "--seed", "2", "--no-progress"]) == 0
    return folder


def test_measure_look_and_reconstruct(files, capsys):
    capsys.readouterr()
    assert main(["pixel-map", str(files / "ped.h5"), "-o", str(files / "map.h5"), "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "codes         ok 2296, hot 4, dead 4, noisy 0, few samples 0" in out and "map.png" in out
    assert (files / "map.png").stat().st_size > 10_000
    truth = read_pixel_truth(files / "ped.h5")
    pixel_map = read_pixel_map(files / "map.h5")
    assert np.array_equal(pixel_map.code == PixelCode.HOT, truth["code"] == PixelCode.HOT)
    assert main(["info", str(files / "map.h5"), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["codes"]["DEAD"] == 4
    assert main(["info", str(files / "tracks.h5")]) == 0
    assert "raw ADC values, pedestals included" in capsys.readouterr().out
    assert main(["reconstruct", str(files / "tracks.h5"), "-o", str(files / "t.h5"), "--pixel-map",
                 str(files / "map.h5"), "--threshold-noise-rms", "5", "--no-progress"]) == 0
    table = read_table(files / "t.h5")
    assert len(table) == 800 and table.provenance["pixel_map_fingerprint"] == pixel_map.fingerprint
    assert np.mean(table["status"] == 0) > 0.5


@pytest.mark.parametrize("argv, message", [
    (["pixel-map", "{ped}", "-o", "{out}", "--min-samples", "0"], "--min-samples must be >= 1 (got 0)"),
    (["pixel-map", "{ped}", "-o", "{out}", "--hot-p-value", "3"], "--hot-p-value must be between 0 and 1"),
    (["pixel-map", "{dir}/none.h5", "-o", "{out}"], "raw event file '{dir}/none.h5' does not exist"),
    (["pixel-map", "{ped}", "-o", "{ped}"], "exists; pass --overwrite"),
    (["reconstruct", "{tracks}", "-o", "{out}"], "holds raw ADC values (pedestal_subtracted = false): give a "
                                                  "pixel map"),
    (["reconstruct", "{tracks}", "-o", "{out}", "--threshold-noise-rms", "5"],
     "--threshold-noise-rms = 5 needs a pixel map (--pixel-map)"),
    (["reconstruct", "{tracks}", "-o", "{out}", "--pixel-map", "{dir}/none.h5"],
     "--pixel-map: pixel map '{dir}/none.h5' does not exist"),
    (["reconstruct", "{tracks}", "-o", "{out}", "--pixel-map", "{tracks}"],
     "attribute 'trackfit_format' must be 'pixel-map' (got 'raw-events')"),
])
def test_bad_input_is_one_line(files, capsys, argv, message):
    names = {"ped": files / "ped.h5", "tracks": files / "tracks.h5", "out": files / "x.h5", "dir": files}
    argv = [a.format(**names) for a in argv]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert message.format(**names) in err and "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_map_of_another_chip(files, tmp_path, capsys):
    (tmp_path / "big.toml").write_text(CHIP.replace("n_columns = 48", "n_columns = 50"))
    assert main(["simulate", str(tmp_path / "big.toml"), "--lab-pixels", str(files / "lab.toml"), "--pedestal-run",
                 "-n", "60", "-o", str(tmp_path / "ped50.h5"), "--seed", "3"]) == 0
    assert main(["pixel-map", str(tmp_path / "ped50.h5"), "-o", str(tmp_path / "m50.h5"), "--no-figure",
                 "--no-progress"]) == 0
    capsys.readouterr()
    assert main(["reconstruct", str(files / "tracks.h5"), "-o", str(tmp_path / "t.h5"), "--pixel-map",
                 str(tmp_path / "m50.h5"), "--no-progress"]) == 2
    err = capsys.readouterr().err
    assert "was measured on another chip than raw file" in err and "n_columns 50 (map) vs 48" in err
