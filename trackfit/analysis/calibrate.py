"""Build a :class:`~trackfit.analysis.Calibration` from calibration runs (what ``trackfit calibrate`` runs).

Order of the steps, each using the parts made before it:

1. flat field (Fe-55): gain versus time (optional, one run only), gain map (centroid positions), K-alpha peak of
   the gain-corrected spectrum;
2. energy scale from the K-alpha peak and any further lines (one Gaussian each, on gain-corrected pulse heights);
3. spurious-modulation map from unpolarized runs (one energy node per run);
4. modulation factor versus energy from polarized runs, with the spurious modulation subtracted.

Runs of steps 3 and 4 are selected after calibration (so energy windows use calibrated energies) with the same
selection and weights as the science analysis should use.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from .calfile import Calibration, make_provenance
from .gainmap import fit_gain_map
from .gaintime import fit_gain_drift
from .modfactor import fit_modulation_factor_curve, measure_modulation_factor
from .polarimetry import event_weights
from .selection import Cut, StatusCut, select_rows
from .spectrum import FE55_KALPHA_KEV, EnergyScale, LineFit, fit_fe55, fit_line
from .spurious import cell_edges, measure_spurious_map

__all__ = ["CalibrationRun", "CalibrationReport", "build_calibration", "table_identity"]


@dataclass(frozen=True, kw_only=True)
class CalibrationRun:
    """One calibration run: its table and what is known about its beam.

    Attributes
    ----------
    table : mapping of column arrays
    label : str
        Recorded in the provenance (usually the file name).
    energy_kev : float, optional
        Line energy (lines for the energy scale; informative otherwise).
    polarization_degree : float
        Beam degree of polarized runs (default 1).
    polarization_angle_rad : float, optional
        Beam angle in the detector frame, if known (then the modulation is the projection on it).
    """

    table: Mapping
    label: str = ""
    energy_kev: float | None = None
    polarization_degree: float = 1.0
    polarization_angle_rad: float | None = None


@dataclass(kw_only=True)
class CalibrationReport:
    """Intermediate fits of :func:`build_calibration` (for printing and figures)."""

    flat_field_fit: LineFit | None = None
    line_fits: list = field(default_factory=list)
    modulation_points: list = field(default_factory=list)
    notes: list = field(default_factory=list)


_IDENTITY_KEYS = ("input_name", "input_fingerprint", "config_toml", "trackfit_version", "created_utc")


def table_identity(table, label: str = "") -> dict:
    """What identifies an input table in a provenance record: its label, row count and, for event tables
    written by the reconstruction, the raw input's name and fingerprint and the reconstruction settings."""
    prov = getattr(table, "provenance", {}) or {}
    n_rows = len(next(iter(table.values()))) if len(table) else 0
    return {"label": label, "n_rows": int(n_rows), **{f"table_{k}": prov[k] for k in _IDENTITY_KEYS if k in prov}}


def _concat(tables, columns):
    return {c: np.concatenate([np.asarray(t[c]) for t in tables]) for c in columns}


def _edges(values, cell_mm):
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    if values.size == 0:
        raise ValueError("no finite positions to lay the cells over")
    low = np.floor(values.min() / cell_mm) * cell_mm
    high = np.ceil(values.max() / cell_mm) * cell_mm
    return cell_edges(low, max(high, low + cell_mm), cell_mm)


def build_calibration(*, flat_field: Sequence[CalibrationRun] = (), lines: Sequence[CalibrationRun] = (),
                      unpolarized: Sequence[CalibrationRun] = (), polarized: Sequence[CalibrationRun] = (),
                      selection: Cut | None = None, flat_selection: Cut | None = None, weighting: str = "none",
                      gain_cell_mm: float = 1.0, gain_min_counts: int = 300, gain_drift: bool = False,
                      drift_slices: int = 20, quadratic: bool = False, spurious_cell_mm: float = 2.0,
                      spurious_min_counts: int = 100, spurious_energy_edges_kev=None, extent_mm=None,
                      base: Calibration | None = None) -> tuple[Calibration, CalibrationReport]:
    """Make calibration parts from runs (see the module docstring for the steps).

    Parameters
    ----------
    flat_field : sequence of CalibrationRun
        Fe-55 flat-field runs: gain map and the K-alpha line of the energy scale.
    lines : sequence of CalibrationRun
        Further lines for the energy scale (``energy_kev`` required).
    unpolarized, polarized : sequence of CalibrationRun
        Runs for the spurious-modulation map and the modulation-factor curve.
    selection : Cut, optional
        Selection of unpolarized and polarized events (after calibration); default: status == 0.
    flat_selection : Cut, optional
        Selection of flat-field and line events (before calibration); default: status == 0.
    weighting : {"none", "ellipticity"}
        Per-event weights for steps 3 and 4.
    gain_cell_mm, gain_min_counts : float, int
        Gain-map cells and the minimum events per fitted cell.
    gain_drift : bool
        Fit gain versus time on the (single) flat-field run first.
    quadratic : bool
        Quadratic energy scale (needs three lines).
    spurious_cell_mm, spurious_min_counts : float, int
        Cells of the spurious map and the minimum events per cell.
    spurious_energy_edges_kev : array_like, optional
        Pool the unpolarized runs and make one spurious-map node per energy bin (default: one node per run).
    extent_mm : (x0, x1, y0, y1), optional
        Region covered by the maps (default: the range of the flat-field or unpolarized positions).
    base : Calibration, optional
        Start from these parts (those made here replace them).
    """
    selection = selection if selection is not None else StatusCut()
    flat_selection = flat_selection if flat_selection is not None else StatusCut()
    cal = base if base is not None else Calibration()
    report = CalibrationReport()
    cuts = selection.to_dict()

    if flat_field:
        chosen = [select_rows(run.table, flat_selection.mask(run.table)) for run in flat_field]
        data = _concat(chosen, ("pulse_height", "centroid_x_mm", "centroid_y_mm", "time_s"))
        labels = [run.label for run in flat_field]
        flat_inputs = [table_identity(run.table, run.label) for run in flat_field]
        ph = data["pulse_height"].astype(float)
        if gain_drift:
            if len(flat_field) != 1:
                raise ValueError(f"gain versus time needs exactly one flat-field run (got {len(flat_field)})")
            drift = fit_gain_drift(data["time_s"], ph, n_slices=drift_slices)
            ph = drift.correct(ph, data["time_s"])
            cal = cal.with_part("gain_drift", drift, make_provenance(runs=labels, cuts=flat_selection.to_dict(),
                                                                     inputs=flat_inputs))
        if extent_mm is None:
            x_edges, y_edges = _edges(data["centroid_x_mm"], gain_cell_mm), _edges(data["centroid_y_mm"], gain_cell_mm)
        else:
            x_edges = cell_edges(extent_mm[0], extent_mm[1], gain_cell_mm)
            y_edges = cell_edges(extent_mm[2], extent_mm[3], gain_cell_mm)
        gain = fit_gain_map(data["centroid_x_mm"], data["centroid_y_mm"], ph, x_edges_mm=x_edges, y_edges_mm=y_edges,
                            min_counts=gain_min_counts)
        cal = cal.with_part("gain_map", gain, make_provenance(runs=labels, cuts=flat_selection.to_dict(),
                                                               cell_mm=gain_cell_mm, min_counts=gain_min_counts,
                                                               inputs=flat_inputs))
        corrected = gain.correct(ph, data["centroid_x_mm"], data["centroid_y_mm"])
        report.flat_field_fit = fit_fe55(corrected, bins=100, range=(0.5 * gain.reference_peak,
                                                                     1.5 * gain.reference_peak))
        peaks, energies, errors = [report.flat_field_fit.peak], [FE55_KALPHA_KEV], [report.flat_field_fit.peak_err]
        line_labels = labels
        for run in lines:
            if run.energy_kev is None:
                raise ValueError(f"line run '{run.label}' needs its energy_kev")
            t = select_rows(run.table, flat_selection.mask(run.table))
            ph_line = gain.correct(np.asarray(t["pulse_height"], float), t["centroid_x_mm"], t["centroid_y_mm"])
            if cal.gain_drift is not None and gain_drift:
                report.notes.append(f"gain drift of the flat field not applied to line run '{run.label}'")
            guess = report.flat_field_fit.peak * run.energy_kev / FE55_KALPHA_KEV
            fit = fit_line(ph_line, bins=80, range=(0.6 * guess, 1.4 * guess))
            report.line_fits.append((run.label, run.energy_kev, fit))
            peaks.append(fit.peak)
            energies.append(run.energy_kev)
            errors.append(fit.peak_err)
            line_labels = line_labels + [run.label]
        scale = EnergyScale.from_lines(peaks, energies, degree=2 if quadratic else 1, pulse_height_errors=errors)
        cal = cal.with_part("energy_scale", scale, make_provenance(
            runs=line_labels, cuts=flat_selection.to_dict(), lines_kev=energies,
            inputs=flat_inputs + [table_identity(run.table, run.label) for run in lines]))
    elif lines:
        raise ValueError("line runs need a flat-field run for the gain map and the K-alpha reference")

    def prepared(run):
        columns = cal.apply(run.table)
        events = select_rows(columns, selection.mask(columns))
        weights = event_weights(events, weighting)
        return events, weights

    if unpolarized:
        if cal.energy_scale is None:
            report.notes.append("no energy scale: the spurious map uses the energy_kev column of the tables")
        prepared_runs = []
        for run in unpolarized:
            events, weights = prepared(run)
            if weights is not None:
                events = dict(events, weights=weights)
            prepared_runs.append(events)
        if extent_mm is None and cal.gain_map is not None:
            x0, x1 = cal.gain_map.x_edges_mm[[0, -1]]
            y0, y1 = cal.gain_map.y_edges_mm[[0, -1]]
            x_edges, y_edges = cell_edges(x0, x1, spurious_cell_mm), cell_edges(y0, y1, spurious_cell_mm)
        elif extent_mm is None:
            x_edges = _edges(np.concatenate([r["conv_x_mm"] for r in prepared_runs]), spurious_cell_mm)
            y_edges = _edges(np.concatenate([r["conv_y_mm"] for r in prepared_runs]), spurious_cell_mm)
        else:
            x_edges = cell_edges(extent_mm[0], extent_mm[1], spurious_cell_mm)
            y_edges = cell_edges(extent_mm[2], extent_mm[3], spurious_cell_mm)
        spurious = measure_spurious_map(prepared_runs, x_edges_mm=x_edges, y_edges_mm=y_edges,
                                        min_counts=spurious_min_counts, energy_edges_kev=spurious_energy_edges_kev)
        cal = cal.with_part("spurious_modulation", spurious, make_provenance(
            runs=[r.label for r in unpolarized], cuts=cuts, weights=weighting, cell_mm=spurious_cell_mm,
            min_counts=spurious_min_counts, energy_edges_kev=spurious_energy_edges_kev,
            inputs=[table_identity(r.table, r.label) for r in unpolarized]))

    if polarized:
        points = []
        for run in polarized:
            events, weights = prepared(run)
            spurious, extra = {}, (0.0, 0.0)
            if cal.spurious_modulation is not None:
                spurious = {"spurious_q": events["spurious_q"], "spurious_u": events["spurious_u"]}
                xc, yc = cal.spurious_modulation.columns
                w = np.ones(len(events["emission_rad"])) if weights is None else weights
                coefficients = np.where(np.isfinite(np.asarray(events["emission_rad"], float)), 2.0 * w, np.nan)
                extra = cal.spurious_modulation.sum_variance(events["energy_kev"], events[xc], events[yc],
                                                             coefficients)
            point = measure_modulation_factor(events["emission_rad"], events["energy_kev"],
                                              polarization_degree=run.polarization_degree,
                                              polarization_angle_rad=run.polarization_angle_rad, weights=weights,
                                              extra_variance=extra, **spurious)
            points.append(point)
            report.modulation_points.append((run.label, point))
        curve = fit_modulation_factor_curve(points)
        cal = cal.with_part("modulation_factor", curve, make_provenance(
            runs=[r.label for r in polarized], cuts=cuts, weights=weighting,
            beams=[{"degree": r.polarization_degree, "angle_rad": r.polarization_angle_rad} for r in polarized],
            inputs=[table_identity(r.table, r.label) for r in polarized]))
    return cal, report
