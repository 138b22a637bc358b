"""The first-look tools: ``trackfit info``, ``trackfit show`` and the event display."""

import json

import matplotlib
import numpy as np
import pytest

from trackfit import EventBatch, HexGrid, RawEventWriter, open_raw
from trackfit.cli import main
from trackfit.plotting import draw_event, draw_event_gallery

matplotlib.use("agg")


@pytest.fixture(autouse=True)
def _close_figures():
    """Figures drawn here are not saved; close them so later tests start without open figures."""
    yield
    import matplotlib.pyplot as plt

    plt.close("all")


def test_version_and_help(capsys):
    assert main(["--version"]) == 0
    assert capsys.readouterr().out.startswith("trackfit ")
    with pytest.raises(SystemExit) as exit_:  # argparse's own --version, after other arguments
        main(["info", "--version"])
    assert exit_.value.code == 2
    assert main([]) == 2


def test_info_summarises_the_file(small_raw_file, capsys):
    path, batch = small_raw_file
    assert main(["info", str(path)]) == 0
    text = capsys.readouterr().out
    assert "events        500" in text and "64 x 48 hexagonal pixels, pitch 50.0 um" in text
    assert "every scanned event is well formed" in text and "energy_kev, shell" in text
    assert "run           source       = test generator" in text
    assert main(["info", str(path), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    sums = np.add.reduceat(batch.signal.astype(np.int64), batch.start[:-1])
    # reference: numpy quantiles of the per-event sums computed here from the generating batch
    assert summary["pulse_height_quantiles"] == pytest.approx(np.quantile(sums, [0, 0.05, 0.5, 0.95, 1]).tolist())
    assert summary["n_events"] == 500 and summary["peak_adc_max"] == batch.signal.max()
    assert summary["time_first_s"] == batch.time_s[0] and summary["time_last_s"] == batch.time_s[-1]
    assert summary["run_info"]["source"] == "test generator"


def test_info_lists_bad_events_and_errors_cleanly(small_raw_file, tmp_path, capsys):
    import h5py

    path, _ = small_raw_file
    with h5py.File(path, "r+") as f:
        f["events/roi"][33, 0] = 5000
    assert main(["info", str(path)]) == 0
    out = capsys.readouterr().out
    assert "BAD EVENTS    1 malformed" in out and "event 33: 'roi': ROI outside the chip" in out
    assert main(["info", str(tmp_path / "missing.h5")]) == 2
    assert "does not exist" in capsys.readouterr().err


def _track_file(tmp_path):
    """One straight, bright track on a small chip, written as a raw file."""
    grid = HexGrid(n_columns=40, n_rows=40)
    image = np.zeros((20, 20), np.int16)
    for k in range(12):
        image[10, 4 + k] = 40 + 15 * k
    batch = EventBatch.from_images([image, image[::-1, ::-1].copy()], [(10, 10), (10, 10)], grid=grid)
    path = tmp_path / "tracks.h5"
    with RawEventWriter(path, grid) as writer:
        writer.append(batch)
    return path


def _two_cluster_file(tmp_path):
    """One bright track and, apart from it, a faint 3-pixel blob: two clusters in a 20 x 20 ROI."""
    grid = HexGrid(n_columns=40, n_rows=40)
    image = np.zeros((20, 20), np.int16)
    for k in range(12):
        image[10, 4 + k] = 40 + 15 * k
    image[3, 2:5] = 30  # not connected to the track (rows 3 and 10 are far apart)
    batch = EventBatch.from_images([image], [(10, 10)], grid=grid)
    path = tmp_path / "two.h5"
    with RawEventWriter(path, grid) as writer:
        writer.append(batch)
    return path


def test_show_writes_a_figure_with_overlay(tmp_path, capsys, monkeypatch):
    import matplotlib.figure

    path = _track_file(tmp_path)
    out = tmp_path / "event.png"
    assert main(["show", str(path), "--event", "1", "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "reconstruction (main cluster, adaptive estimate): status=" in text and f"wrote {out}" in text
    assert out.stat().st_size > 10_000
    # title and printout give the same counts and say which is which
    titles = []
    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", lambda fig, *a, **k: titles.append(
        fig.axes[0].get_title()))
    two = _two_cluster_file(tmp_path)
    assert main(["show", str(two), "--event", "0", "-o", str(out)]) == 0
    text = capsys.readouterr().out
    # 12 track pixels and a 3-pixel blob, counted here from the image built above
    assert "ROI 20 x 20 = 400 pixels, 15 above threshold_adc = 10 in 2 cluster(s); main cluster 12 pixels" in text
    assert "3 pixels outside it (hatched)" in text and "n_pixels=12" in text
    assert titles[0].startswith("event 0 (trigger 0): 400 ROI pixels, 12 in the main cluster")
    assert "energy_kev=" in text and "(uncalibrated)" in text and "(uncalibrated)" in titles[0]
    assert main(["show", str(path), "--event", "7", "-o", str(out)]) == 2
    assert "event 7 out of range" in capsys.readouterr().err


def test_draw_event_draws_every_pixel_and_the_overlay(tmp_path):
    path = _track_file(tmp_path)
    with open_raw(path) as reader:
        event = reader[0]
    result = {"centroid_x_mm": float(event.x_mm.mean()), "centroid_y_mm": float(event.y_mm.mean()), "axis_rad": 0.0,
              "m2_major_mm2": 0.01, "conv_x_mm": float(event.x_mm[0]), "conv_y_mm": float(event.y_mm[0]),
              "emission_rad": 0.3}
    ax = draw_event(event, result=result)
    polys = ax.collections[0]
    assert len(polys.get_paths()) == event.signal.size
    assert np.allclose(polys.get_array(), np.clip(event.signal, 0, None))
    labels = ax.get_legend_handles_labels()[1]
    assert labels == ["principal axis", "centroid", "conversion point", "emission direction"]
    assert ax.get_aspect() == 1.0
    # threshold: pixels at or below it become outlines in a second collection
    ax2 = draw_event(event, threshold_adc=0)
    assert len(ax2.collections[0].get_paths()) == int((event.signal > 0).sum())
    assert len(ax2.collections[1].get_paths()) == int((event.signal <= 0).sum())
    # pixels outside the main cluster: one hatched collection with a legend entry
    outside = np.zeros(event.signal.shape, bool)
    outside[:3] = True
    ax3 = draw_event(event, result=result, outside_main=outside)
    hatched = [c for c in ax3.collections if c.get_hatch()]
    assert len(hatched) == 1 and len(hatched[0].get_paths()) == 3
    assert "above threshold, outside the main cluster" in ax3.get_legend_handles_labels()[1]


def test_gallery_has_a_colour_bar_and_a_legend_off_the_tracks(tmp_path):
    path = _track_file(tmp_path)
    with open_raw(path) as reader:
        events = [reader[0], reader[1], reader[0]]
    result = {"centroid_x_mm": float(events[0].x_mm.mean()), "centroid_y_mm": float(events[0].y_mm.mean()),
              "axis_rad": 0.0, "m2_major_mm2": 0.01, "conv_x_mm": float(events[0].x_mm[0]),
              "conv_y_mm": float(events[0].y_mm[0]), "emission_rad": 0.3, "energy_kev": 5.9}
    fig = draw_event_gallery(events, results=[result, None, result], ncols=2,
                             provenance={"energy_scale_source": "none"})
    panels = [ax for ax in fig.axes if ax.get_label() != "<colorbar>"]
    colorbars = [ax for ax in fig.axes if ax.get_label() == "<colorbar>"]
    assert len(panels) == 4 and not panels[3].axison and len(colorbars) == 1
    assert colorbars[0].get_ylabel() == "pulse height [ADC counts]"
    # one colour scale for every panel, up to the largest pixel of all events
    limits = {panel.collections[0].get_clim() for panel in panels[:3]}
    assert limits == {(0.0, float(max(e.signal.max() for e in events)))}
    assert all(panel.get_legend() is None for panel in panels) and len(fig.legends) == 1
    fig.canvas.draw()
    legend_box = fig.legends[0].get_window_extent()
    assert not any(legend_box.overlaps(panel.get_window_extent()) for panel in panels[:3])
    assert "(uncalibrated)" in panels[0].get_title()
