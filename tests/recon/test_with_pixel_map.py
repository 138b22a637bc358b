"""Reconstruction with a pixel map: the kernel against its numpy twin with pedestals, per-pixel thresholds and
masks; pedestal subtraction against numpy; provenance; clear errors for raw ADC input without a map, bad maps and
maps of another chip."""

import dataclasses

import h5py
import numpy as np
import pytest
from recon_helpers import kernel_columns
from test_reference import assert_same

from trackfit import (
    EventBatch,
    HexGrid,
    RawEventWriter,
    ReconConfig,
    open_raw,
    read_table,
    reconstruct,
    reconstruct_file,
)
from trackfit.io.pixelmap import PixelCode, PixelMap, PixelMapFormatError, PixelMapMismatchError, write_pixel_map
from trackfit.recon._kernels import subtract_pedestals
from trackfit.recon._reference import reconstruct_batch_reference
from trackfit.recon._synthetic import toy_tracks

GRID = HexGrid()


def random_map(grid=GRID, seed=1, pedestal_mean=300.0):
    rng = np.random.default_rng(seed)
    shape = grid.shape
    code = rng.choice([0, 1, 2, 3, 4], size=shape, p=[0.96, 0.01, 0.01, 0.01, 0.01]).astype(np.uint8)
    noise = rng.uniform(1.4, 2.6, shape)
    noise[code == PixelCode.FEW_SAMPLES] = np.nan
    pedestal = pedestal_mean + 20 * rng.standard_normal(shape)
    zeros = np.zeros(shape)
    return PixelMap(grid=grid, pedestal_adc=pedestal, pedestal_error_adc=zeros, noise_adc=noise,
                    noise_error_adc=zeros, occupancy=zeros, n_samples=np.full(shape, 500), n_above=zeros.astype(int),
                    code=code)


def with_pedestals(batch, pixel_map, rng):
    """The batch as a DAQ without pedestal subtraction would write it: value + pedestal, rounded (numpy)."""
    columns = np.concatenate([batch.event(i).columns for i in range(len(batch))])
    rows = np.concatenate([batch.event(i).rows for i in range(len(batch))])
    raw = np.rint(batch.signal + pixel_map.pedestal_adc[rows, columns] + rng.uniform(-0.5, 0.5, len(rows)))
    return EventBatch(roi=batch.roi, start=batch.start, signal=raw.astype(np.int16), grid=batch.grid,
                      pedestal_subtracted=False)


@pytest.fixture(scope="module")
def map_path(tmp_path_factory):
    return write_pixel_map(tmp_path_factory.mktemp("map") / "map.h5", random_map())


@pytest.mark.parametrize("threshold_noise_rms", [0.0, 5.0, 2.5])
@pytest.mark.parametrize("subtracted", [True, False])
def test_kernel_matches_reference_with_a_map(map_path, threshold_noise_rms, subtracted, make_batch):
    config = ReconConfig(pixel_map=str(map_path), threshold_noise_rms=threshold_noise_rms,
                         bad_pixels=[(150, 176), (151, 176)])
    pixel_map = random_map()
    rng = np.random.default_rng(2)
    batches = [toy_tracks(1500, 21, diffusion_mm=0.04, noise_adc=2.0), make_batch(600, 25, grid=GRID, max_side=10)]
    for batch in batches:
        if not subtracted:
            batch = with_pedestals(batch, pixel_map, rng)
        assert_same(kernel_columns(batch, config), reconstruct_batch_reference(batch, config))


def test_pedestal_subtraction_matches_numpy():
    pixel_map = random_map()
    batch = with_pedestals(toy_tracks(300, 3, noise_adc=2.0), pixel_map, np.random.default_rng(4))
    pedestal = pixel_map.pedestal_for_subtraction().ravel()
    out = batch.signal.copy()
    subtract_pedestals(0, len(batch), batch.roi, batch.start, batch.signal, batch.bad, pedestal, GRID.n_columns,
                       GRID.n_rows, out)
    columns = np.concatenate([batch.event(i).columns for i in range(len(batch))])
    rows = np.concatenate([batch.event(i).rows for i in range(len(batch))])
    expected = np.clip(np.rint(batch.signal - pedestal[rows * GRID.n_columns + columns]), -32768, 32767)
    np.testing.assert_array_equal(out, expected.astype(np.int16))  # numpy rint: round half to even


def test_per_pixel_threshold_and_mask_on_one_track(tmp_path):
    # a straight row of pixels: with threshold_noise_rms = 5 a pixel of noise 4 needs > 20 ADC, one of noise 1 > 5
    grid = HexGrid(n_columns=40, n_rows=40)
    zeros = np.zeros(grid.shape)
    noise = np.full(grid.shape, 2.0)
    noise[20, 13] = 4.0
    noise[20, 14] = 1.0
    code = np.zeros(grid.shape, np.uint8)
    code[20, 16] = PixelCode.HOT
    pixel_map = PixelMap(grid=grid, pedestal_adc=zeros, pedestal_error_adc=zeros, noise_adc=noise,
                         noise_error_adc=zeros, occupancy=zeros, n_samples=np.full(grid.shape, 100),
                         n_above=zeros.astype(int), code=code)
    path = write_pixel_map(tmp_path / "m.h5", pixel_map)
    image = np.zeros((5, 12), np.int16)
    image[2, 2:10] = [15, 15, 8, 15, 900, 15, 15, 15]  # columns 12..19 of row 20; 900 on the hot pixel (16)
    batch = EventBatch.from_images([image], [(10, 18)], grid=grid)
    plain = reconstruct(batch)  # threshold 10: the 8 (column 14) splits {12, 13} from {15..19} with the 900
    assert int(plain["n_pixels"][0]) == 5 and int(plain["n_clusters"][0]) == 2
    assert float(plain["pulse_height"][0]) == 960.0
    table = reconstruct(batch, ReconConfig(pixel_map=str(path), threshold_noise_rms=5))
    # column 13 (15 <= 5 x 4) out, column 14 (8 > 5 x 1) in, column 16 masked: {12}, {14, 15}, {17, 18, 19}
    assert int(table["n_clusters"][0]) == 3 and int(table["n_pixels"][0]) == 3
    assert float(table["pulse_height"][0]) == 45.0
    assert table.provenance["pixel_map_fingerprint"] == pixel_map.fingerprint
    assert table.provenance["pixel_map_name"] == "m.h5"


def test_raw_adc_input_needs_a_map(tmp_path, map_path):
    batch = with_pedestals(toy_tracks(20, 5), random_map(), np.random.default_rng(6))
    with pytest.raises(ValueError, match=r"the batch holds raw ADC values \(pedestal_subtracted = false\): give "
                                         r"a pixel map"):
        reconstruct(batch)
    path = tmp_path / "raw.h5"
    with RawEventWriter(path, GRID) as writer:
        writer.append(batch)
    with open_raw(path) as reader:
        assert reader.pedestal_subtracted is False
    with pytest.raises(ValueError, match=r"raw file '.*raw.h5' holds raw ADC values"):
        reconstruct_file(path, tmp_path / "t.h5", progress=False)
    assert not (tmp_path / "t.h5").exists()
    out = reconstruct_file(path, tmp_path / "t.h5", ReconConfig(pixel_map=str(map_path)), progress=False)
    table = read_table(out)
    assert len(table) == 20 and table.provenance["input_pedestal_subtracted"] == 0
    assert table.provenance["pixel_map_path"] == str(map_path.resolve())
    np.testing.assert_array_equal(table["n_pixels"], reconstruct(batch, ReconConfig(pixel_map=str(map_path)))
                                  ["n_pixels"])


def test_map_of_another_chip_is_refused(tmp_path):
    path = write_pixel_map(tmp_path / "small.h5", random_map(HexGrid(n_columns=64, n_rows=48)))
    raw = tmp_path / "run.h5"
    with RawEventWriter(raw, GRID) as writer:
        writer.append(toy_tracks(5, 1))
    with pytest.raises(PixelMapMismatchError,
                       match=r"pixel map '.*small.h5' was measured on another chip than raw file '.*run.h5': "
                             r"n_columns 64 \(map\) vs 300, n_rows 48 \(map\) vs 352"):
        reconstruct_file(raw, tmp_path / "t.h5", ReconConfig(pixel_map=str(path)), progress=False)
    with pytest.raises(PixelMapMismatchError, match="than the batch: n_columns 64"):
        reconstruct(toy_tracks(5, 1), ReconConfig(pixel_map=str(path)))


def test_bad_map_files_are_named(tmp_path):
    good = write_pixel_map(tmp_path / "good.h5", random_map(HexGrid(n_columns=30, n_rows=20)))
    text = tmp_path / "notes.h5"
    text.write_text("not a map")
    with pytest.raises(PixelMapFormatError, match=r"file '.*notes.h5': not a readable HDF5 file"):
        reconstruct(toy_tracks(2, 1), ReconConfig(pixel_map=str(text)))
    raw = tmp_path / "raw.h5"
    with RawEventWriter(raw, GRID) as writer:
        writer.append(toy_tracks(2, 1))
    with pytest.raises(PixelMapFormatError, match=r"'raw-events'.*make a map from it with `trackfit pixel-map`"):
        reconstruct(toy_tracks(2, 1), ReconConfig(pixel_map=str(raw)))
    with pytest.raises(FileNotFoundError, match="pixel map '.*missing.h5' does not exist"):
        reconstruct(toy_tracks(2, 1), ReconConfig(pixel_map=str(tmp_path / "missing.h5")))
    for change, message in [
        (lambda f: f["pixels"]["noise_adc"].__setitem__((0, 0), 9.0), r"dataset '/pixels': the arrays do not match "
                                                                      r"the content fingerprint"),
        (lambda f: f["pixels"].__delitem__("code"), r"dataset '/pixels/code': missing dataset"),
        (lambda f: f.attrs.__setitem__("format_version", 7), r"dataset '/': unknown format_version 7"),
        (lambda f: f["geometry"].attrs.__setitem__("n_rows", 21), r"dataset '/pixels/pedestal_adc': expected the "
                                                                  r"chip's shape \(n_rows, n_columns\) = \(21, 30\)"),
    ]:
        bad = tmp_path / "bad.h5"
        bad.write_bytes(good.read_bytes())
        with h5py.File(bad, "r+") as f:
            change(f)
        with pytest.raises(PixelMapFormatError, match=r"file '.*bad.h5', " + message):
            ReconConfig(pixel_map=str(bad)) and reconstruct(EventBatch.empty(HexGrid(n_columns=30, n_rows=20)),
                                                            ReconConfig(pixel_map=str(bad)))


def test_config_settings(tmp_path):
    with pytest.raises(ValueError, match=r"'threshold_noise_rms' = 5 needs a 'pixel_map'"):
        ReconConfig(threshold_noise_rms=5)
    with pytest.raises(ValueError, match="'threshold_noise_rms' must be a number between 0 and 1000"):
        ReconConfig(pixel_map="m.h5", threshold_noise_rms=-1)
    config = ReconConfig(pixel_map="maps/chip.h5", threshold_noise_rms=4.5)
    assert ReconConfig.from_toml(config.to_toml()) == config
    (tmp_path / "cfg").mkdir()
    path = config.write_toml(tmp_path / "cfg" / "recon.toml")
    assert ReconConfig.read_toml(path).pixel_map == str(tmp_path / "cfg" / "maps" / "chip.h5")
    absolute = dataclasses.replace(config, pixel_map=str(tmp_path / "x.h5"))
    assert ReconConfig.read_toml(absolute.write_toml(tmp_path / "a.toml")).pixel_map == str(tmp_path / "x.h5")


@pytest.mark.parametrize("threshold_noise_rms", [0.0, 5.0])
def test_event_display_sees_the_pixels_the_reconstruction_sees(map_path, threshold_noise_rms, tmp_path, capsys):
    """``event_clusters`` (scipy.ndimage labels, one event at a time) with a pixel map and raw ADC input finds the main
    cluster the compiled kernel finds (``n_pixels``), and ``trackfit show`` draws such a file only with the map."""
    from trackfit.cli import main
    from trackfit.recon.clusters import event_as_reconstructed, event_clusters

    pixel_map = random_map()
    batch = with_pedestals(toy_tracks(60, 8, noise_adc=2.0), pixel_map, np.random.default_rng(9))
    config = ReconConfig(pixel_map=str(map_path), threshold_noise_rms=threshold_noise_rms)
    table = reconstruct(batch, config)
    for i in range(len(batch)):
        clusters = event_clusters(batch.event(i), config, pedestal_subtracted=False)
        assert int(clusters.in_main.sum()) == int(table["n_pixels"][i])
    event, ignored, threshold = event_as_reconstructed(batch.event(0), config, pedestal_subtracted=False)
    expected = np.rint(batch.event(0).signal - pixel_map.pedestal_adc[batch.event(0).rows, batch.event(0).columns])
    np.testing.assert_array_equal(event.signal, expected)  # numpy's rint of signal - pedestal
    np.testing.assert_array_equal(ignored, pixel_map.masked[batch.event(0).rows, batch.event(0).columns])
    with pytest.raises(ValueError, match="holds raw ADC values"):
        event_clusters(batch.event(0), ReconConfig(), pedestal_subtracted=False)

    raw = tmp_path / "raw.h5"
    with RawEventWriter(raw, GRID) as writer:
        writer.append(batch)
    assert main(["show", str(raw), "--event", "0", "-o", str(tmp_path / "a.png")]) == 2
    assert "holds raw ADC values (pedestal_subtracted = false): give the pixel map" in capsys.readouterr().err
    assert main(["show", str(raw), "--event", "0", "-o", str(tmp_path / "b.png"), "--pixel-map", str(map_path),
                 "--no-overlay"]) == 0
    assert "pedestals of the pixel map subtracted" in capsys.readouterr().out and (tmp_path / "b.png").exists()
    assert main(["show", str(raw), "--event", "0", "-o", str(tmp_path / "c.png"), "--pixel-map",
                 str(tmp_path / "none.h5")]) == 2
    assert "--pixel-map: pixel map" in capsys.readouterr().err
