"""Helpers of the pixel-map tests: lab-like runs of the simulator and the checks of a measured map against truth."""

import dataclasses

import numpy as np

from trackfit.io.pixelmap import PixelCode
from trackfit.pixels.robust import MEDIAN_STANDARD_ERROR


def flat_field_config(n_columns, n_rows, energy_kev=5.9, polarization_degree=0.0):
    """The He/DME preset on a chip of the given size, lit by a flat field that covers it."""
    from trackfit.simulate import load_preset

    config = load_preset("hedme-1atm-1cm").with_monochromatic(energy_kev=energy_kev,
                                                              polarization_degree=polarization_degree)
    grid = dataclasses.replace(config.readout, n_columns=n_columns, n_rows=n_rows).grid
    size = (n_columns * grid.pitch_mm, n_rows * grid.row_pitch_mm)
    return dataclasses.replace(config, source=dataclasses.replace(config.source, beam="flat", field_size_mm=size),
                               readout=dataclasses.replace(config.readout, n_columns=n_columns, n_rows=n_rows))


def map_against_truth(pixel_map, chip, *, min_samples=50):
    """Numbers that compare a measured map with the chip it was measured on (``LabChip``)."""
    truth = chip.code
    code = pixel_map.code
    true_pedestal = np.zeros(chip.grid.shape) if chip.pedestal_subtracted else chip.pedestal_adc
    judged = code != PixelCode.FEW_SAMPLES
    well = judged & (pixel_map.n_samples >= min_samples)
    ok = (truth == PixelCode.OK) & (code == PixelCode.OK) & well
    noise_true = chip.noise_adc[ok]
    ratio = pixel_map.noise_adc[ok] / noise_true
    noise_pull = (pixel_map.noise_adc[ok] - noise_true) / pixel_map.noise_error_adc[ok]
    pedestal_error = (pixel_map.pedestal_adc - true_pedestal)[ok] / noise_true
    pedestal_pull = (pixel_map.pedestal_adc - true_pedestal)[ok] / pixel_map.pedestal_error_adc[ok]
    # pixels whose own statistics allow 0.2 x noise at 4.5 standard errors (sample-median error, docs/methods.md)
    precise = MEDIAN_STANDARD_ERROR / np.sqrt(pixel_map.n_samples[ok]) <= 0.2 / 4.5
    return {
        "missed": {c.name: int(np.count_nonzero((truth == c) & (code != c))) for c in
                   (PixelCode.HOT, PixelCode.DEAD, PixelCode.NOISY)},
        "missed_judged": {c.name: int(np.count_nonzero((truth == c) & (code != c) & judged)) for c in
                          (PixelCode.HOT, PixelCode.DEAD, PixelCode.NOISY)},
        "false_flags": int(np.count_nonzero((truth == PixelCode.OK) & judged & (code != PixelCode.OK))),
        "n_judged_ok_truth": int(np.count_nonzero((truth == PixelCode.OK) & judged)),
        "n_well": int(np.count_nonzero(ok)),
        "noise_ratio_median": float(np.median(ratio)),
        "noise_pull_sd": float(np.std(noise_pull)),
        "noise_pull_mean": float(np.mean(noise_pull)),
        "pedestal_bias": float(np.mean(pedestal_error)),
        "pedestal_pull_sd": float(np.std(pedestal_pull)),
        "pedestal_max_pull": float(np.abs(pedestal_pull).max()),
        "n_precise": int(np.count_nonzero(precise)),
        "pedestal_max_error_precise": float(np.abs(pedestal_error[precise]).max()) if precise.any() else 0.0,
    }


def assert_done_when(numbers, *, n_false_allowed=0):
    """The checks every lab-like run must pass (docs/methods.md §10)."""
    assert numbers["missed_judged"] == {"HOT": 0, "DEAD": 0, "NOISY": 0}, numbers
    assert numbers["false_flags"] <= n_false_allowed, numbers
    # noise unbiased (median ratio to truth within 0.95-1.05), spread as the sample statistics say
    assert 0.95 <= numbers["noise_ratio_median"] <= 1.05, numbers
    assert 0.8 <= numbers["noise_pull_sd"] <= 1.15, numbers
    # pedestals: no bias beyond 0.02 noise; within 0.2 x noise where the statistics allow it; pulls near 1
    assert abs(numbers["pedestal_bias"]) < 0.02, numbers
    assert numbers["pedestal_max_error_precise"] < 0.2, numbers
    assert 0.8 <= numbers["pedestal_pull_sd"] <= 1.15, numbers
