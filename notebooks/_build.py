"""Writes the notebooks of this folder from the cell sources below (committed without outputs).

Edit the cells here, run ``python notebooks/_build.py``, and commit both this script and the notebooks. Each
notebook's first code cell holds its parameters, so a user can point it at their own runs; the test suite
(tests/test_notebooks.py) overrides them to run on sample_data/ into a temporary folder.
"""

import hashlib
from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

HERE = Path(__file__).resolve().parent


def notebook(cells, name=""):
    """A notebook of the cells; cell ids are derived from the notebook name and the cell position, so rebuilding
    an unchanged notebook gives an identical file."""
    nb = new_notebook()
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    nb.metadata["language_info"] = {"name": "python"}
    for k, (kind, source) in enumerate(cells):
        source = source.strip("\n")
        cell = new_markdown_cell(source) if kind == "md" else new_code_cell(source)
        cell.id = hashlib.sha1(f"{name}:{k}".encode()).hexdigest()[:8]
        nb.cells.append(cell)
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
from trackfit.analysis.estimates import with_estimate
from trackfit.io.summary import summarize_raw
from trackfit.io.energy_label import energy_axis_label
from trackfit.plotting import draw_event_gallery
from trackfit.recon import STATUS_DOCS, ReconConfig, Status, status_counts
from trackfit.recon.clusters import event_clusters

output = Path(OUTPUT_DIR)
output.mkdir(parents=True, exist_ok=True)
config = ReconConfig.read_toml(SETTINGS) if SETTINGS else ReconConfig()
print(summarize_raw(RAW_FILE, max_events=N_EVENTS).as_text())
"""),
    ("md", """
## A gallery of events with the reconstruction on top

One colour scale for all panels; hatched pixels are above the threshold but outside the main cluster, the only
one the reconstruction uses. The conversion point and the emission direction drawn are those of the estimate the
table offers to the analysis (the settings' `emission_estimator`). Energies are labelled uncalibrated when neither
the settings nor the raw file give the ADC counts per keV.
"""),
    ("code", """
reader = trackfit.open_raw(RAW_FILE)
n = len(reader) if N_EVENTS is None else min(N_EVENTS, len(reader))
batch = reader.read_batch(0, n, with_truth=False)
table = trackfit.reconstruct(batch, config, run_info=reader.run_info)
shown = [batch.event(i) for i in range(min(N_GALLERY, len(batch)))]
estimate = with_estimate(table)   # the settings' emission estimate in emission_rad, conv_x_mm, conv_y_mm
fig = draw_event_gallery(shown, [estimate.row(i) for i in range(len(shown))], threshold_adc=config.threshold_adc,
                         outside_main=[event_clusters(e, config).outside_main for e in shown],
                         provenance=table.provenance)
fig.savefig(output / "gallery.png", dpi=90)
"""),
    ("md", "## The event table"),
    ("code", """
table
"""),
    ("code", """
ok = table["status"] == 0
elongation = table["m2_major_mm2"][ok] / np.maximum(table["m2_minor_mm2"][ok], 1e-12)
fig, axes = plt.subplots(1, 3, figsize=(13, 3.6), layout="constrained")
axes[0].hist(table["energy_kev"][ok], bins=120, histtype="step")
axes[0].set_xlabel(energy_axis_label(table.provenance))
axes[0].set_ylabel("events")
axes[1].hist(table["n_pixels"][ok], bins=60, histtype="step")
axes[1].set_xlabel("pixels in the main cluster")
axes[2].hist(np.clip(elongation, 1, 10), bins=60, histtype="step")
axes[2].set_xlabel("elongation m2_major_mm2 / m2_minor_mm2")
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
RECON_GRID = {"start_search_inner_rms": [1.2, 1.5, 1.8], "second_pass_length_mm": [0.03, 0.05, 0.08]}
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
from trackfit.analysis import default_selection, fit_fe55, stokes_parameters
from trackfit.recon import ReconConfig
from trackfit.tuning import load_subsample, read_settings, sweep_settings

output = Path(OUTPUT_DIR)
output.mkdir(parents=True, exist_ok=True)
polarized, _ = load_subsample(POLARIZED, N_EVENTS)
unpolarized, _ = load_subsample(UNPOLARIZED, N_EVENTS)
"""),
    ("md", """
First an energy scale, so that the energy window means keV: the Fe-55 line of the unpolarized run. The start
search and the second pass swept here are settings of the classic two-stage estimate (the default adaptive estimate
sets them per track from its size, docs/methods.md §11), so the sweep analyses that estimate.
"""),
    ("code", """
raw_table = trackfit.reconstruct(unpolarized)
line = fit_fe55(raw_table["pulse_height"][default_selection().mask(raw_table)])
base = replace(ReconConfig(), counts_per_kev=line.peak / LINE_ENERGY_KEV, emission_estimator="two-stage")
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


CALIBRATION_REPORT = [
    ("md", """
# Calibration report

From a flat-field Fe-55 run and 100 %-polarized runs at several energies: the line fit and energy scale, the gain
map, the modulation factor versus energy and the spurious-modulation map of the unpolarized run; all of it saved
to one calibration file, which `trackfit polarization -c` and `Calibration.load` use.
"""),
    ("code", """
# parameters
FLAT_FIELD = "../sample_data/fe55_flatfield_unpolarized.h5"        # Fe-55, unpolarized, flat field
POLARIZED = {                                                       # raw file -> (degree, angle in degrees)
    "../sample_data/pol100_3p7kev_0deg.h5": (1.0, 0.0),
    "../sample_data/pol100_5p9kev_30deg.h5": (1.0, 30.0),
}
SETTINGS = None            # reconstruction settings (TOML) or None for the defaults
GAIN_CELL_MM = None        # gain-map cells in mm; None: chosen from the number of flat-field events
SPURIOUS_CELL_MM = 10.0    # spurious-map cells: large, as the sample flat field is small
OUTPUT_DIR = "calibration_output"
"""),
    ("code", """
import json
from pathlib import Path

import numpy as np

import trackfit
from trackfit.analysis import CalibrationRun, EnergyWindow, build_calibration, figures
from trackfit.recon import ReconConfig

output = Path(OUTPUT_DIR)
output.mkdir(parents=True, exist_ok=True)
config = ReconConfig.read_toml(SETTINGS) if SETTINGS else ReconConfig()


def table_of(raw_path):
    out = output / (Path(raw_path).stem + "_events.h5")
    trackfit.reconstruct_file(raw_path, out, config, progress=False, overwrite=True)
    return trackfit.read_table(out)


flat = table_of(FLAT_FIELD)
polarized = {path: table_of(path) for path in POLARIZED}
"""),
    ("code", """
runs = [CalibrationRun(table=polarized[path], label=Path(path).name, polarization_degree=degree,
                       polarization_angle_rad=np.deg2rad(angle)) for path, (degree, angle) in POLARIZED.items()]
calibration, report = build_calibration(
    flat_field=[CalibrationRun(table=flat, label=Path(FLAT_FIELD).name)],
    unpolarized=[CalibrationRun(table=flat, label=Path(FLAT_FIELD).name)],
    polarized=runs, gain_cell_mm=GAIN_CELL_MM, spurious_cell_mm=SPURIOUS_CELL_MM)
for label, role, flow in report.cut_flows:  # every run: the default selection first, then the cuts given
    print(f"{role} run {label}")
    print(flow, end="\\n\\n")
calibration
"""),
    ("md", "## Energy: the Fe-55 line fit (after gain correction) and the energy scale"),
    ("code", """
figures.plot_spectrum_fit(report.flat_field_fit)
report.flat_field_fit
"""),
    ("md", "## Gain map"),
    ("code", """
figures.plot_gain_map(calibration.gain_map)
calibration.gain_map
"""),
    ("md", "## Modulation factor versus energy"),
    ("code", """
figures.plot_modulation_factor(calibration.modulation_factor, calibrated=calibration.energy_scale is not None)
for label, point in report.modulation_points:
    print(f"{label}: mu = {point.value:.4f} +- {point.error:.4f} at {point.energy_kev:.3f} keV "
          f"({point.n_events} events)")
"""),
    ("md", "## Spurious modulation of the unpolarized run"),
    ("code", """
figures.plot_spurious_map(calibration.spurious_modulation)
calibration.spurious_modulation
"""),
    ("md", "## Save, reload, and check on the calibration runs themselves"),
    ("code", """
from trackfit.analysis import Calibration, measure_polarization

path = calibration.save(output / "calibration.h5", overwrite=True)
reloaded = Calibration.load(path)
checks = {}
for raw_path, (degree, angle) in POLARIZED.items():
    result = measure_polarization(polarized[raw_path], calibration=reloaded,
                                  selection=EnergyWindow(low_kev=1.0, high_kev=10.0))  # + the default
    checks[Path(raw_path).name] = {"degree": result.stokes.degree, "degree_err": result.stokes.degree_err,
                                   "angle_deg": float(np.rad2deg(result.stokes.angle_rad)), "true_degree": degree,
                                   "true_angle_deg": angle}
checks
"""),
    ("code", """
summary = {"calibration": str(path), "parts": reloaded.parts(),
           "energy_per_count_kev": reloaded.energy_scale.coefficients[1],
           "fwhm_frac": report.flat_field_fit.fwhm_frac,
           "modulation_points": [(p.energy_kev, p.value, p.error) for _, p in report.modulation_points],
           "checks": checks}
(output / "calibration_report.json").write_text(json.dumps(summary, indent=2, default=float))
summary
"""),
]


DESIGN_STUDY = [
    ("md", """
# Design study: which design, how long, how many bytes

Compare detector designs before building them: the response of each design (detection efficiency, modulation
factor, resolution and bytes per event versus energy, from simulated 100 %-polarized beams), then the plan of an
observation of a bright and a faint invented source with each design: MDP99 in the exposure, the exposure that
reaches the target MDP, and the data volume of the readout. Two shipped designs and one of your own (a variation of
a preset; or load your own TOML with `SimConfig.load`). Change the parameters in the next cell.
"""),
    ("code", """
# parameters
PRESETS = ["hedme-1atm-1cm", "ardme-3atm-3cm"]      # shipped designs (trackfit simulate --list-presets)
OWN_DESIGN = {"name": "hedme-1atm-2cm", "base": "hedme-1atm-1cm", "changes": {"gas.gap_cm": 2.0}}  # your own
EVENTS_PER_ENERGY = 2000     # triggered events per energy (mu to about +-0.03); 20000 or more for final numbers
N_ENERGIES = 8               # energies of each response's grid (over the band where window x gas >= 1 %)
WORKERS = None               # processes (None: one per CPU)
CACHE_DIR = None             # response cache (None: the default user cache folder)
BAND_KEV = (2.0, 8.0)        # analysis band
EXPOSURE_S = 1e5             # planned exposure
TARGET_MDP = 0.05            # MDP99 to reach
AREA_CM2 = 100.0             # collecting area (a mirror)
BACKGROUND = 5e-4            # selected background events per cm2 s keV
BACKGROUND_REGION_CM2 = 0.2  # source region on the detector
SOURCES = {                  # invented sources: power laws at 1 keV (photons cm-2 s-1 keV-1) behind a gas column
    "bright": {"flux_at_1kev": 3.0, "photon_index": 2.0, "absorption_column_cm2": 3e21},
    "faint": {"flux_at_1kev": 0.01, "photon_index": 2.0, "absorption_column_cm2": 1e22},
}
OUTPUT_DIR = "design_study_output"
"""),
    ("code", """
import json
from pathlib import Path

from trackfit.design import with_design_value
from trackfit.planner import Observation, plan_observation
from trackfit.planner_figures import plot_response_curves, save_plan_figures
from trackfit.response_builder import ResponseSettings, build_response
from trackfit.simulate import load_preset

output = Path(OUTPUT_DIR)
output.mkdir(parents=True, exist_ok=True)
designs = {name: load_preset(name) for name in PRESETS}
own = load_preset(OWN_DESIGN["base"])
for key, value in OWN_DESIGN["changes"].items():
    own = with_design_value(own, key, value)
designs[OWN_DESIGN["name"]] = own
settings = ResponseSettings(n_energies=N_ENERGIES, events_per_energy=EVENTS_PER_ENERGY)
"""),
    ("md", """
## The response of each design

Simulated and reconstructed beams at each energy (cached: running the notebook again is quick). The top panel
shows μ(E)·ε(E), what a polarization measurement needs per incident photon; the band of the study is shaded.
"""),
    ("code", """
responses, response_files = {}, {}
for name, design in designs.items():
    responses[name] = build_response(design, name=name, settings=settings, workers=WORKERS, cache_dir=CACHE_DIR)
    response_files[name] = str(responses[name].save(output / f"{name}_response.h5", overwrite=True))
    print(responses[name].summary(), end="\\n\\n")
plot_response_curves(list(responses.values()), band_kev=BAND_KEV);
"""),
    ("md", """
## Plans for a bright and a faint source

The same designs, band, exposure and instrument for each source. MDP99 follows Weisskopf et al. (2010) with the
background; the data volume counts every triggered event over each design's whole range.
"""),
    ("code", """
plans = {}
for source, spectrum in SOURCES.items():
    observation = Observation(**spectrum, area_cm2=AREA_CM2, background_per_cm2_s_kev=BACKGROUND,
                              background_region_cm2=BACKGROUND_REGION_CM2, band_kev=BAND_KEV,
                              exposure_s=EXPOSURE_S, target_mdp=TARGET_MDP)
    plans[source] = plan_observation(list(responses.values()), observation)
    print(f"--- {source} source")
    print(plans[source].summary(), end="\\n\\n")
    save_plan_figures(plans[source], output / source)
"""),
    ("md", """
## Which design, how long, how many bytes

For each source the design that reaches the target MDP soonest among those whose MDP the responses determine
(μ_eff at least three errors from zero), its exposure, and what it writes per day over that time.
"""),
    ("code", """
rows, best = [], {}
for source, plan in plans.items():
    determined = [p for p in plan.designs if p.effective_modulation_factor > 3 * p.effective_modulation_factor_err]
    winner = min(determined, key=lambda p: p.exposure_for_target_s) if determined else None
    best[source] = winner.name if winner else None
    for p in plan.designs:
        rows.append({"source": source, "design": p.name, "mdp99": p.mdp99, "mu_eff": p.effective_modulation_factor,
                     "exposure_for_target_s": p.exposure_for_target_s, "gb_per_day": p.gb_per_day,
                     "gb_for_target": p.gb_per_day * p.exposure_for_target_s / 86400.0,
                     "best": p.name == best[source]})
print(f"{'source':8} {'design':16} {'MDP99':>7} {'mu_eff':>7} {'T for target':>13} {'GB/day':>8} "
      f"{'GB to target':>13}")
for r in rows:
    print(f"{r['source']:8} {r['design']:16} {100 * r['mdp99']:6.2f}% {r['mu_eff']:7.3f} "
          f"{r['exposure_for_target_s']:12.3g}s {r['gb_per_day']:8.3g} {r['gb_for_target']:13.3g}"
          f"{'  <- best' if r['best'] else ''}")
"""),
    ("code", """
summary = {"responses": response_files, "best": best,
           "plans": {source: plan.to_dict() for source, plan in plans.items()},
           "figures": sorted(str(p) for p in output.glob("*/*.png"))}
(output / "design_study.json").write_text(json.dumps(summary, indent=2))
best
"""),
]


NOTEBOOKS = {"01_first_look.ipynb": FIRST_LOOK, "02_cut_tuning.ipynb": CUT_TUNING,
             "03_calibration_report.ipynb": CALIBRATION_REPORT, "04_design_study.ipynb": DESIGN_STUDY}


def main():
    for name, cells in NOTEBOOKS.items():
        nbformat.write(notebook(cells, name), HERE / name)
        print(f"wrote {HERE / name}")


if __name__ == "__main__":
    main()
