"""Lab-like readout of the simulator: the drawn chip follows the stated distributions (checked with scipy.stats), the
read-out values follow the chip, files carry the chip truth, and the defect-free twin shares every random number."""

import dataclasses

import numpy as np
import pytest
from scipy import stats
from sim_helpers import small_chip

from trackfit import HexGrid, open_raw
from trackfit.io.pixelmap import PixelCode
from trackfit.simulate import ConfigError
from trackfit.simulate.labpixels import (
    PIXEL_TRUTH,
    LabPixelConfig,
    draw_lab_chip,
    read_pixel_truth,
    simulate_lab_run,
    simulate_pedestal_run,
    write_pedestal_run,
)

GRID = HexGrid(n_columns=80, n_rows=70)
LAB = LabPixelConfig(chip_seed=11, pedestal_mean_adc=500.0, pedestal_rms_adc=25.0, noise_mean_adc=2.0,
                     noise_spread_fraction=0.3, n_hot=9, n_dead=8, n_noisy=7, pedestal_subtracted=False)


def test_chip_follows_the_stated_distributions():
    chip = draw_lab_chip(LAB, GRID)
    ok = chip.code == PixelCode.OK
    # Kolmogorov-Smirnov against scipy's distributions (outside reference: scipy.stats)
    assert stats.kstest(chip.pedestal_adc.ravel(), stats.norm(500.0, 25.0).cdf).pvalue > 1e-3
    assert stats.kstest(chip.noise_adc[ok], stats.uniform(1.4, 1.2).cdf).pvalue > 1e-3
    counts = np.bincount(chip.code.ravel(), minlength=5)
    assert counts[PixelCode.HOT] == 9 and counts[PixelCode.DEAD] == 8 and counts[PixelCode.NOISY] == 7
    assert np.all(chip.noise_adc[chip.code == PixelCode.DEAD] == 0)
    factor = chip.noise_adc[chip.code == PixelCode.NOISY] / chip.base_noise_adc[chip.code == PixelCode.NOISY]
    assert np.all((factor >= 4.0) & (factor <= 8.0))
    fire = chip.hot_fire_probability[chip.code == PixelCode.HOT]
    assert np.all((fire >= 0.1) & (fire <= 0.5)) and np.all(chip.hot_fire_probability[~(chip.code == 1)] == 0)
    # the chip is a function of chip_seed alone
    again = draw_lab_chip(LAB, GRID)
    assert np.array_equal(again.pedestal_adc, chip.pedestal_adc) and np.array_equal(again.code, chip.code)
    other = draw_lab_chip(dataclasses.replace(LAB, chip_seed=12), GRID)
    assert not np.array_equal(other.code, chip.code)


def test_pedestal_run_values_follow_the_chip(tmp_path):
    run = simulate_pedestal_run(LAB, 600, rng=3, grid=GRID)
    assert run.trigger_mode == "random" and not run.batch.pedestal_subtracted
    frames = run.batch.signal.reshape(600, *GRID.shape).astype(np.float64)
    chip = run.chip
    ok = chip.code == PixelCode.OK
    # per-pixel sample mean and standard deviation against the truth (numpy); rounding to whole counts adds
    # 1/12 count^2 of variance (Sheppard's correction)
    mean, std = frames.mean(axis=0), frames.std(axis=0, ddof=1)
    assert np.abs((mean - chip.pedestal_adc)[ok] / chip.noise_adc[ok]).max() < 5 / np.sqrt(600) * 1.2
    expected = np.sqrt(chip.noise_adc[ok] ** 2 + 1 / 12)
    assert np.median(std[ok] / expected) == pytest.approx(1.0, abs=0.01)
    dead = chip.code == PixelCode.DEAD
    assert np.all(frames[:, dead] == np.rint(chip.pedestal_adc[dead]))
    hot = chip.code == PixelCode.HOT
    fired = (frames[:, hot] - chip.pedestal_adc[hot]) > 10 * chip.noise_adc[hot]
    # binomial: the fraction of events with a spike matches each hot pixel's firing probability
    p = chip.hot_fire_probability[hot]
    assert np.all(np.abs(fired.mean(axis=0) - p) < 5 * np.sqrt(p * (1 - p) / 600))

    path = run.write(tmp_path / "ped.h5")
    with open_raw(path) as reader:
        assert reader.trigger_mode == "random" and reader.pedestal_subtracted is False
        assert reader.run_info["lab_pixels_toml"] == LAB.to_toml()
        assert reader.truth_names == []
    streamed = write_pedestal_run(tmp_path / "streamed.h5", LAB, 600, rng=3, grid=GRID)
    with open_raw(streamed) as reader:
        assert np.array_equal(reader.read_all().signal, run.batch.signal)  # the same values, block by block
        assert reader.trigger_mode == "random" and reader.pedestal_subtracted is False
    truth = read_pixel_truth(path)
    assert set(truth) == set(PIXEL_TRUTH)
    assert np.array_equal(truth["code"], chip.code)
    np.testing.assert_allclose(truth["pedestal_adc"], chip.pedestal_adc, rtol=1e-6)


def test_track_run_and_its_defect_free_twin(hedme_6kev_pencil, tmp_path):
    config = small_chip(hedme_6kev_pencil)
    lab = dataclasses.replace(LAB, n_hot=40, n_dead=40, n_noisy=0)
    run = simulate_lab_run(config, lab, 300, rng=4)
    twin = run.defect_free_batch()
    assert np.array_equal(twin.roi, run.batch.roi) and np.array_equal(twin.start, run.batch.start)
    assert twin.pedestal_subtracted is False and run.batch.pedestal_subtracted is False
    # pixels that are not defective read the same value in both (the same random numbers)
    columns = np.concatenate([run.batch.event(i).columns for i in range(len(run.batch))])
    rows = np.concatenate([run.batch.event(i).rows for i in range(len(run.batch))])
    defect = run.chip.code[rows, columns] != PixelCode.OK
    assert defect.any()
    assert np.array_equal(twin.signal[~defect], run.batch.signal[~defect])
    assert not np.array_equal(twin.signal[defect], run.batch.signal[defect])
    # the charge under the noise is the simulator's: pixel sums match its noise-free charge within the noise
    charge = run.charge.signal.astype(np.float64)
    pedestal = run.chip.pedestal_adc[rows, columns]
    residual = (twin.signal - pedestal - charge) / run.chip.base_noise_adc[rows, columns]
    assert abs(residual.mean()) < 0.02 and residual.std() == pytest.approx(1.0, abs=0.03)
    path = run.write(tmp_path / "lab.h5")
    clean = run.write(tmp_path / "clean.h5", defect_free=True)
    with open_raw(path) as reader, open_raw(clean) as clean_reader:
        assert reader.trigger_mode == "self" and "photon_energy_kev" in reader.truth_names
        assert clean_reader.run_info["lab_pixels_defect_free"] == 1
        assert np.array_equal(clean_reader.read_all().signal, twin.signal)
    assert np.all(read_pixel_truth(clean)["code"] == 0)


def test_config_toml_round_trip_and_errors(tmp_path):
    assert LabPixelConfig.from_toml(LAB.to_toml()) == LAB
    path = tmp_path / "lab.toml"
    path.write_text(LAB.to_toml())
    assert LabPixelConfig.load(path) == LAB
    with pytest.raises(ConfigError, match=r"unknown key\(s\) lab_pixels.n_warm; valid keys"):
        LabPixelConfig.from_dict({"n_warm": 3})
    with pytest.raises(ConfigError, match="noise_spread_fraction"):
        LabPixelConfig(noise_spread_fraction=1.5)
    with pytest.raises(ConfigError, match="hot_fire_probability"):
        LabPixelConfig(hot_fire_probability=(0.5, 1.5))
    with pytest.raises(ConfigError, match="n_dead"):
        LabPixelConfig(n_dead=-1)
    with pytest.raises(ConfigError, match="defective pixels requested"):
        draw_lab_chip(LabPixelConfig(n_hot=20), HexGrid(n_columns=4, n_rows=4))
