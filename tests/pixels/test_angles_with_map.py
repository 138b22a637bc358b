"""Emission angles of a lab-like run reconstructed with its measured pixel map, against the same run simulated
without the defects (same tracks, same noise, same pedestals and ADC rounding; reconstructed with the true
pedestals), and without the map.

"Done when": with the map, the same emission angle within 1 degree for >= 99 % of the events; without it, visibly
worse. A defect pixel inside a track loses its charge for good (masked, or repaired from its neighbours alike), so
the 99 % is checked on the events whose track keeps clear of the defect pixels (one pixel step), and the share of
the others, set by the defect density and the track size (about 2 % at 5.9 keV with 40 defects on the full
chip), is reported alongside.
"""

import numpy as np
import pytest

pytest.importorskip("xraydb")

from pixel_helpers import flat_field_config  # noqa: E402

from trackfit import EventBatch, HexGrid, ReconConfig, reconstruct  # noqa: E402
from trackfit.io.pixelmap import write_pixel_map  # noqa: E402
from trackfit.pixels import measure_pixel_map  # noqa: E402
from trackfit.recon.status import Status  # noqa: E402
from trackfit.simulate.labpixels import LabPixelConfig, draw_lab_chip, simulate_lab_run, write_pedestal_run  # noqa: E402


def angle_difference_deg(a, b):
    return np.degrees(np.abs((np.asarray(a) - np.asarray(b) + np.pi) % (2 * np.pi) - np.pi))


def touches_a_defect(batch, chip, pedestal, threshold_adc):
    """Events where a defect pixel is a track pixel or a neighbour of one (track: above threshold, numpy)."""
    grid = batch.grid
    defect = chip.code != 0
    out = np.zeros(len(batch), bool)
    for i in range(len(batch)):
        ev = batch.event(i)
        hit = (ev.signal - pedestal[ev.rows, ev.columns]) > threshold_adc
        if not hit.any():
            continue
        nc, nr = grid.neighbours(ev.columns[hit], ev.rows[hit])
        inside = grid.contains(nc, nr)
        near = np.concatenate([defect[ev.rows[hit], ev.columns[hit]], defect[nr[inside], nc[inside]]])
        out[i] = near.any()
    return out


def compare(tmp_path, grid, lab, n_pedestal_frames, n_events, seed):
    chip = draw_lab_chip(lab, grid)
    ped = write_pedestal_run(tmp_path / "ped.h5", chip, n_pedestal_frames, rng=seed, compression="none")
    measured = write_pixel_map(tmp_path / "map.h5", measure_pixel_map(ped))
    perfect = write_pixel_map(tmp_path / "perfect.h5", chip.without_defects().true_map())
    run = simulate_lab_run(flat_field_config(grid.n_columns, grid.n_rows, polarization_degree=1.0), chip, n_events,
                           rng=seed + 1)
    twin = run.defect_free_batch()
    reference = reconstruct(twin, ReconConfig(pixel_map=str(perfect)))
    usable = (reference["status"] & int(Status.NO_EMISSION | Status.TOO_FEW_PIXELS)) == 0
    clear = ~touches_a_defect(twin, chip, chip.pedestal_adc, ReconConfig().threshold_adc)
    with_map = reconstruct(run.batch, ReconConfig(pixel_map=str(measured)))
    same = angle_difference_deg(with_map["emission_rad"], reference["emission_rad"]) < 1.0
    # without the map: one pedestal for the whole chip (the median of every value), then the usual threshold
    one_pedestal = np.rint(np.median(run.batch.signal))
    naive = EventBatch(roi=run.batch.roi, start=run.batch.start, grid=grid,
                       signal=np.clip(run.batch.signal - one_pedestal, -32768, 32767).astype(np.int16))
    without = reconstruct(naive)
    same_without = angle_difference_deg(without["emission_rad"], reference["emission_rad"]) < 1.0
    numbers = {
        "events": int(usable.sum()),
        "share_touching_a_defect": float(np.mean(~clear[usable])),
        "with_map_clear": float(np.mean(same[usable & clear])),
        "with_map_all": float(np.mean(same[usable])),
        "without_map_all": float(np.mean(same_without[usable])),
    }
    print(numbers)
    return numbers


def test_angles_with_and_without_the_map(tmp_path):
    # a 120 x 120 chip with the full chip's defect density (40 per 105 600 pixels -> 3 hot, 3 dead)
    lab = LabPixelConfig(chip_seed=41, noise_spread_fraction=0.3, n_hot=3, n_dead=3, pedestal_subtracted=False)
    numbers = compare(tmp_path, HexGrid(n_columns=120, n_rows=120), lab, 400, 2500, seed=42)
    assert numbers["with_map_clear"] >= 0.99
    assert numbers["with_map_all"] >= 0.99 - 1.0 * numbers["share_touching_a_defect"]
    assert numbers["without_map_all"] < numbers["with_map_all"] - 0.3


@pytest.mark.slow
def test_angles_with_and_without_the_map_full_chip(tmp_path):
    lab = LabPixelConfig(chip_seed=43, noise_spread_fraction=0.3, n_hot=20, n_dead=20, pedestal_subtracted=False)
    numbers = compare(tmp_path, HexGrid(), lab, 1000, 20_000, seed=44)
    assert numbers["with_map_clear"] >= 0.99
    assert numbers["with_map_all"] >= 0.99 - 1.0 * numbers["share_touching_a_defect"]
    assert numbers["without_map_all"] < numbers["with_map_all"] - 0.3
