"""Writes the notebooks of this folder from the cell sources below (committed without outputs).

Edit the cells here, run ``python notebooks/_build.py``, and commit both this script and the notebooks. Each
notebook's first code cell holds its parameters, so a user can point it at their own runs; the test suite
(tests/test_notebooks.py) overrides them to run on sample_data/ into a temporary folder.
"""

from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

HERE = Path(__file__).resolve().parent


def notebook(cells):
    nb = new_notebook()
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    nb.metadata["language_info"] = {"name": "python"}
    for kind, source in cells:
        source = source.strip("\n")
        nb.cells.append(new_markdown_cell(source) if kind == "md" else new_code_cell(source))
    return nb


FIRST_LOOK = [
    ("md", """
# First look at a run

Open a raw event file, look at a gallery of events with their reconstruction, reconstruct a subsample and
summarise it: energy spectrum, cluster size, elongation, and the status flags with the meaning of each.
Change the parameters in the next cell to point it at your own run.
"""),
    ("code", """
# parameters
RAW_FILE = "../sample_data/fe55_flatfield_unpolarized.h5"
N_EVENTS = 5000          # events to reconstruct for the summaries (None: the whole file)
N_GALLERY = 8            # events in the gallery
SETTINGS = None          # a settings or reconstruction TOML file (None: the defaults)
OUTPUT_DIR = "first_look_output"
"""),
    ("code", """
import json
from pathlib import Path

import matplotlib.pyplot as plt
import numpy as np

import trackfit
from trackfit.io.summary import summarize_raw
from trackfit.plotting import draw_event_gallery
from trackfit.recon import STATUS_DOCS, ReconConfig, Status, status_counts

output = Path(OUTPUT_DIR)
output.mkdir(parents=True, exist_ok=True)
config = ReconConfig.read_toml(SETTINGS) if SETTINGS else ReconConfig()
print(summarize_raw(RAW_FILE, max_events=N_EVENTS).as_text())
"""),
    ("md", "## A gallery of events with the reconstruction on top"),
    ("code", """
reader = trackfit.open_raw(RAW_FILE)
n = len(reader) if N_EVENTS is None else min(N_EVENTS, len(reader))
batch = reader.read_batch(0, n, with_truth=False)
table = trackfit.reconstruct(batch, config)
shown = range(min(N_GALLERY, len(batch)))
fig = draw_event_gallery([batch.event(i) for i in shown], [table.row(i) for i in shown],
                         threshold_adc=config.threshold_adc)
fig.savefig(output / "gallery.png", dpi=90)
"""),
    ("md", "## The event table"),
    ("code", """
table
"""),
    ("code", """
ok = table["status"] == 0
elongation = table["mom2_long"][ok] / np.maximum(table["mom2_trans"][ok], 1e-12)
fig, axes = plt.subplots(1, 3, figsize=(13, 3.6), layout="constrained")
axes[0].hist(table["pulse_height"][ok], bins=120, histtype="step")
axes[0].set_xlabel("pulse height [ADC counts]")
axes[0].set_ylabel("events")
axes[1].hist(table["n_pixels"][ok], bins=60, histtype="step")
axes[1].set_xlabel("pixels in the main cluster")
axes[2].hist(np.clip(elongation, 1, 10), bins=60, histtype="step")
axes[2].set_xlabel("elongation mom2_long / mom2_trans")
fig.savefig(output / "distributions.png", dpi=90)
"""),
    ("md", "## Status flags: how many events carry each, and what it means"),
    ("code", """
counts = status_counts(table["status"])
for name, count in counts.items():
    meaning = "fully reconstructed" if name == "ok" else STATUS_DOCS[Status[name]]
    print(f"{name:<22}{count:>7}  {meaning}")
"""),
    ("code", """
summary = {"n_events": int(len(table)), "n_ok": int(ok.sum()), "status_counts": counts,
           "median_pulse_height": float(np.median(table["pulse_height"][ok]))}
(output / "first_look.json").write_text(json.dumps(summary, indent=2))
summary
"""),
]


CUT_TUNING = [
    ("md", """
# Tuning reconstruction settings and cuts

Sweep reconstruction parameters and selection cuts on a 100 %-polarized run and an unpolarized run, look at the
modulation factor, the efficiency, the quality factor mu sqrt(efficiency) and the residual modulation of the
unpolarized run against each parameter, and freeze the best point into one settings file that
`trackfit reconstruct --config` and the analysis read.
"""),
    ("code", """
# parameters
POLARIZED = "../sample_data/pol100_5p9kev_30deg.h5"          # known polarization degree (below)
UNPOLARIZED = "../sample_data/fe55_flatfield_unpolarized.h5"  # a similar energy, no polarization
POLARIZATION_DEGREE = 1.0
LINE_ENERGY_KEV = 5.895       # energy of the main line of the unpolarized run (Mn K-alpha of Fe-55)
N_EVENTS = 9000               # events of each run kept in memory
RECON_GRID = {"r_min": [1.2, 1.5, 1.8], "weight_scale_mm": [0.03, 0.05, 0.08]}
CUT_GRID = {"energy_kev": [(4.5, 7.5)], "elongation_min": [None, 1.2, 1.5], "fiducial_radius_mm": [None, 1.5]}
MAX_RESIDUAL_SIGMA = 3.0      # best point: residual modulation below this many standard errors
OUTPUT_DIR = "tuning_output"
"""),
    ("code", """
import json
from dataclasses import replace
from pathlib import Path

import numpy as np

import trackfit
from trackfit.analysis import fit_fe55, stokes_parameters
from trackfit.recon import ReconConfig
from trackfit.tuning import load_subsample, read_settings, sweep_settings

output = Path(OUTPUT_DIR)
output.mkdir(parents=True, exist_ok=True)
polarized, _ = load_subsample(POLARIZED, N_EVENTS)
unpolarized, _ = load_subsample(UNPOLARIZED, N_EVENTS)
"""),
    ("md", "First an energy scale, so that the energy window means keV: the Fe-55 line of the unpolarized run."),
    ("code", """
raw_table = trackfit.reconstruct(unpolarized)
line = fit_fe55(raw_table["pulse_height"][raw_table["status"] == 0])
base = replace(ReconConfig(), counts_per_kev=line.peak / LINE_ENERGY_KEV)
line
"""),
    ("code", """
sweep = sweep_settings(polarized, unpolarized, recon_grid=RECON_GRID, cut_grid=CUT_GRID, base_config=base,
                       polarization_degree=POLARIZATION_DEGREE, max_residual_sigma=MAX_RESIDUAL_SIGMA)
sweep
"""),
    ("code", """
fig = sweep.plot()
fig.savefig(output / "sweep.png", dpi=80)
"""),
    ("md", """
With ipywidgets installed, sliders pick a point of the grid and show its metrics; without it, `sweep.row(i)`
does the same for row `i`.
"""),
    ("code", """
try:
    import ipywidgets
except ImportError:
    ipywidgets = None
if ipywidgets is not None:
    names = [n for n in sweep.recon_parameters + sweep.cut_parameters if n != "energy_kev"]
    choices = {n: sorted({str(p[0].get(n, p[1].get(n))) for p in sweep.points}) for n in names}

    def show(**chosen):
        for i, (recon, cuts) in enumerate(sweep.points):
            if all(str({**recon, **cuts}[n]) == v for n, v in chosen.items()):
                return sweep.row(i)

    ipywidgets.interact(show, **{n: ipywidgets.SelectionSlider(options=v) for n, v in choices.items()})
else:
    print(sweep.row())
"""),
    ("md", "Freeze the best point and use it: reconstruct the polarized run again from the file and measure."),
    ("code", """
settings_path = sweep.write_toml(output / "tuned.toml")
print(settings_path.read_text())
config, selection = read_settings(settings_path)
table = trackfit.reconstruct(polarized, config)
kept = selection.mask(table)
print(selection.cut_flow(table))
check = stokes_parameters(table["emission_rad"][kept], modulation_factor=1.0)
check
"""),
    ("code", """
best = sweep.row()
result = {"settings": str(settings_path), "best_index": sweep.best_index, "best_quality": best["quality"],
          "max_eligible_quality": float(np.nanmax(sweep.columns["quality"][
              sweep.columns["residual_modulation"] < MAX_RESIDUAL_SIGMA * sweep.columns["residual_modulation_err"]])),
          "recheck_modulation": check.degree / POLARIZATION_DEGREE, "sweep_modulation": best["modulation"],
          "n_points": len(sweep)}
(output / "tuning.json").write_text(json.dumps(result, indent=2))
result
"""),
]


NOTEBOOKS = {"01_first_look.ipynb": FIRST_LOOK, "02_cut_tuning.ipynb": CUT_TUNING}


def main():
    for name, cells in NOTEBOOKS.items():
        nbformat.write(notebook(cells), HERE / name)
        print(f"wrote {HERE / name}")


if __name__ == "__main__":
    main()
