"""Pixel-map files: a written map reads back identical (arrays, settings, sources, fingerprint); the data type checks
its arrays; a map of another chip is refused listing what differs."""

import numpy as np
import pytest

from trackfit import HexGrid
from trackfit.io.pixelmap import (
    PixelCode,
    PixelMap,
    PixelMapMismatchError,
    SourceRun,
    read_pixel_map,
    write_pixel_map,
)

GRID = HexGrid(n_columns=20, n_rows=12)


def a_map(**changes):
    rng = np.random.default_rng(1)
    shape = GRID.shape
    values = dict(grid=GRID, pedestal_adc=rng.normal(400, 20, shape), pedestal_error_adc=np.full(shape, 0.1),
                  noise_adc=rng.uniform(1.5, 2.5, shape), noise_error_adc=np.full(shape, 0.08),
                  occupancy=rng.uniform(0, 1e-3, shape), n_samples=np.full(shape, 400), n_above=np.zeros(shape, int),
                  code=np.zeros(shape, np.uint8), settings={"min_samples": 50, "hot_p_value": 1e-9},
                  statistics={"noise_median_adc": 2.0, "warnings": ["a warning"]},
                  sources=(SourceRun(name="ped.h5", fingerprint="crc32:roi=1", n_events=400, trigger_mode="random",
                                     pedestal_subtracted=False),))
    values.update(changes)
    return PixelMap(**values)


def test_round_trip(tmp_path):
    code = np.zeros(GRID.shape, np.uint8)
    code[3, 4], code[5, 6], code[7, 8], code[0, 0] = PixelCode.HOT, PixelCode.DEAD, PixelCode.NOISY, 4
    pixel_map = a_map(code=code)
    back = read_pixel_map(write_pixel_map(tmp_path / "m.h5", pixel_map))
    for name in ("pedestal_adc", "noise_adc", "occupancy", "n_samples", "code"):
        np.testing.assert_array_equal(getattr(back, name), getattr(pixel_map, name).astype(getattr(back, name).dtype))
    assert back.fingerprint == pixel_map.fingerprint and back.path == str(tmp_path / "m.h5")
    assert back.settings == pixel_map.settings and back.sources == pixel_map.sources
    assert back.statistics["warnings"] == ["a warning"]
    assert back.counts() == {"OK": 236, "HOT": 1, "DEAD": 1, "NOISY": 1, "FEW_SAMPLES": 1}
    np.testing.assert_array_equal(np.argwhere(back.masked), [[3, 4], [5, 6], [7, 8]])
    assert "hot 1, dead 1, noisy 1, few samples 1" in back.summary_text() and "warning       a warning" in \
        back.summary_text()
    assert "<table>" in back._repr_html_() and "1 source run" in repr(back)
    with pytest.raises(FileExistsError):
        write_pixel_map(tmp_path / "m.h5", pixel_map)
    with pytest.raises(ValueError):
        back.code[0, 0] = 1  # arrays are read-only: a map is a value


def test_fallbacks_for_pixels_without_estimates():
    pedestal = np.full(GRID.shape, 400.0)
    pedestal[2, 2] = np.nan
    noise = np.full(GRID.shape, 2.0)
    noise[1, 1] = 9.0
    code = np.zeros(GRID.shape, np.uint8)
    code[1, 1] = PixelCode.FEW_SAMPLES
    pixel_map = a_map(pedestal_adc=pedestal, noise_adc=noise, code=code)
    assert pixel_map.pedestal_for_subtraction()[2, 2] == 400.0
    assert pixel_map.noise_for_threshold()[1, 1] == 2.0  # not judged: the chip's median noise


def test_checks():
    with pytest.raises(ValueError, match=r"'noise_adc' must have the chip's shape .* \(12, 20\) \(got \(20, 12\)\)"):
        a_map(noise_adc=np.ones((20, 12)))
    with pytest.raises(ValueError, match=r"'code' holds unknown values \[9\]"):
        a_map(code=np.full(GRID.shape, 9, np.uint8))
    pixel_map = a_map()
    pixel_map.check_grid(GRID)
    with pytest.raises(PixelMapMismatchError, match=r"pitch_mm 0.05 \(map\) vs 0.055, shifted_rows 'odd' \(map\) "
                                                    r"vs 'even'"):
        pixel_map.check_grid(HexGrid(n_columns=20, n_rows=12, pitch_mm=0.055, shifted_rows="even"), "run 7")
