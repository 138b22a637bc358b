"""event_clusters labels the pixels the way the reconstruction kernel counts them (the kernel is the reference)."""

from pathlib import Path

import numpy as np
import pytest

from trackfit import ReconConfig, open_raw, reconstruct
from trackfit.recon._synthetic import toy_tracks
from trackfit.recon.clusters import event_clusters

SAMPLE = Path(__file__).resolve().parents[2] / "sample_data" / "fe55_flatfield_unpolarized.h5"


@pytest.fixture(scope="module")
def events():
    with open_raw(SAMPLE) as reader:
        return reader.read_batch(0, 400, with_truth=False)


def _bad_pixels(batch):
    """The brightest pixel of every tenth event: bad pixels that split or shrink real tracks."""
    pixels = []
    for i in range(0, len(batch), 10):
        event = batch.event(i)
        k = int(np.argmax(event.signal))
        pixels.append((int(event.columns[k]), int(event.rows[k])))
    return pixels


@pytest.mark.parametrize("kind", ["default", "high threshold", "bad pixels"])
def test_main_cluster_agrees_with_the_kernel(events, kind):
    config = {"default": ReconConfig(), "high threshold": ReconConfig(threshold_adc=40),
              "bad pixels": ReconConfig(bad_pixels=_bad_pixels(events))}[kind]
    table = reconstruct(events, config)
    assert (table["n_clusters"] > 1).sum() > 100  # simulated Fe-55 tracks: many events with several clusters
    for i in range(len(events)):
        event = events.event(i)
        clusters = event_clusters(event, config)
        # the compiled kernel's pixel and cluster counts and summed signal, computed independently
        assert int(clusters.in_main.sum()) == table["n_pixels"][i]
        assert clusters.n_clusters == table["n_clusters"][i]
        assert float(event.signal[clusters.in_main].sum()) == pytest.approx(float(table["pulse_height"][i]))
        assert not (clusters.in_main & clusters.outside_main).any()
        taking_part = event.signal > np.floor(config.threshold_adc)
        assert not (clusters.labels[~taking_part] > 0).any()


def test_empty_event_has_no_cluster():
    batch = toy_tracks(5, 1, roi_shape=(6, 6))
    event = batch.event(0)
    clusters = event_clusters(event, ReconConfig(threshold_adc=30_000))
    assert clusters.main == 0 and clusters.n_clusters == 0 and not clusters.in_main.any()


def test_docstring_example():
    import doctest

    import trackfit.recon.clusters as module

    assert doctest.testmod(module).failed == 0
