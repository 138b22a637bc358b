"""Build a :class:`~trackfit.analysis.Calibration` from calibration runs (what ``trackfit calibrate`` runs).

Order of the steps, each using the parts made before it:

1. flat field (an Fe-55 source by default, or any single line of known energy): gain versus time (optional, one run
   only), gain map (centroid positions; cell size chosen from the event count unless given), the line peak of the
   gain-corrected spectrum;
2. energy scale from the flat-field line and any further lines (one Gaussian each, on gain-corrected pulse heights
   when there is a gain map); lines alone, without a flat field, are enough: they are found in their spectra by
   :mod:`~trackfit.analysis.linefinder`;
3. with the weights ``"response"``: the expected modulation response of an event from its shape, fitted on the
   polarized runs (``docs/methods.md`` §11);
4. spurious-modulation map from unpolarized runs (one energy node per run), its cells centred on the data;
5. modulation factor versus energy from polarized runs, with the spurious modulation subtracted.

Steps 3-5 use one emission estimate of the tables (``estimator``, by default the one the tables were reconstructed
with; :mod:`trackfit.analysis.estimates`), recorded in the provenance of each part (``estimator``).

Every run is selected with the default selection (:class:`~trackfit.analysis.UsableEvents`: an emission angle and
no failure bit) plus the cuts given: ``flat_selection`` for steps 1-2 (on the table's own energies), ``selection``
for steps 3-5 after calibration (so energy windows use calibrated energies), the same that the science analysis
should use. The cut flow of every run is kept in the report and in the provenance; a run left without events
raises :class:`~trackfit.analysis.NoEventsLeftError` with its cut flow. Poor fits (line fits, gain-map cells, gain
drift, modulation-factor curve) raise a :class:`~trackfit.analysis.fitquality.FitQualityWarning`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from .calfile import Calibration, make_provenance
from .estimates import estimator_of, with_estimate
from .fitquality import warn_if_poor
from .gainmap import GainCellError, choose_gain_cell_mm, fit_gain_map
from .gaintime import fit_gain_drift
from .linefinder import fit_line_near, nominal_counts_per_kev, scan_gain
from .modfactor import fit_modulation_factor_curve, measure_modulation_factor
from .polarimetry import WEIGHTINGS, event_weights
from .response_weights import fit_modulation_response
from .selection import Cut, NoEventsLeftError, select_rows, with_default
from .spectrum import FE55_KALPHA_KEV, EnergyScale, LineFit, fit_fe55
from .spurious import cell_edges, centred_cell_edges, measure_spurious_map

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
        Line energy: required for lines of the energy scale; for a flat field, its line (default: Fe-55, fitted as
        the blended Mn K-alpha/K-beta pair; any other energy is fitted as one Gaussian line); informative otherwise.
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
    """Intermediate results of :func:`build_calibration` (for printing and figures).

    Attributes
    ----------
    flat_field_fit : LineFit or None
        Line fit of the gain-corrected flat-field spectrum.
    flat_field_line_kev : float or None
        Energy of that line.
    line_fits : list of (label, energy_kev, LineFit)
        Fits of the further lines.
    modulation_points : list of (label, ModulationFactorPoint)
    cut_flows : list of (label, role, CutFlow)
        The selection of every run, step by step (role: "flat field", "line", "unpolarized", "polarized").
    selection, flat_selection : Cut
        The selections used (with the default first).
    gain_cell_mm : float or None
        Gain-map cell size used.
    notes : list of str
        Choices made and things to know.
    """

    flat_field_fit: LineFit | None = None
    flat_field_line_kev: float | None = None
    line_fits: list = field(default_factory=list)
    modulation_points: list = field(default_factory=list)
    cut_flows: list = field(default_factory=list)
    selection: Cut | None = None
    flat_selection: Cut | None = None
    gain_cell_mm: float | None = None
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


def _with_one_estimate(estimator, unpolarized, polarized):
    """The estimate of the unpolarized and polarized runs (one for all) and the runs with its columns in place."""
    import dataclasses

    runs = list(unpolarized) + list(polarized)
    if estimator is None:
        found = {run.label or f"run {k}": estimator_of(run.table) for k, run in enumerate(runs)}
        if len(set(found.values())) > 1:
            raise ValueError(f"the unpolarized and polarized tables were reconstructed with different emission "
                             f"estimates ({', '.join(f'{k}: {v}' for k, v in found.items())}): give one estimator "
                             "(--estimator) that all of them hold")
        estimator = next(iter(found.values()), "two-stage")

    def swapped(run):
        return dataclasses.replace(run, table=with_estimate(run.table, estimator, name=f"table '{run.label}'"))

    return estimator, [swapped(r) for r in unpolarized], [swapped(r) for r in polarized]


def _selected(run, selection, role, report):
    """The rows of a run that pass the selection; the cut flow goes to the report; none left is an error."""
    flow = selection.cut_flow(run.table)
    report.cut_flows.append((run.label, role, flow))
    if flow.n_kept == 0:
        raise NoEventsLeftError(f"in {role} run '{run.label}'", flow)
    return select_rows(run.table, selection.mask(run.table))


def _flows(report, role):
    return {label: flow.to_dict() for label, r, flow in report.cut_flows if r == role}


def _selection_record(selection, report, *roles):
    flows = {}
    for role in roles:
        flows.update(_flows(report, role))
    return {"cuts": selection.to_dict(), "selection": selection.describe(), "cut_flows": flows}


def _fit_flat_line(corrected, line_kev, reference_peak):
    """Line fit of the gain-corrected flat-field spectrum: the Fe-55 pair, or one Gaussian line."""
    if line_kev is None:
        return fit_fe55(corrected, bins=100, range=(0.5 * reference_peak, 1.5 * reference_peak))
    return fit_line_near(corrected, reference_peak)


def build_calibration(*, flat_field: Sequence[CalibrationRun] = (), lines: Sequence[CalibrationRun] = (),
                      unpolarized: Sequence[CalibrationRun] = (), polarized: Sequence[CalibrationRun] = (),
                      selection: Cut | None = None, flat_selection: Cut | None = None, weighting: str = "none",
                      gain_cell_mm: float | None = None, gain_min_counts: int = 300, gain_drift: bool = False,
                      drift_slices: int = 20, quadratic: bool = False, spurious_cell_mm: float = 2.0,
                      spurious_min_counts: int = 100, spurious_energy_edges_kev=None, extent_mm=None,
                      base: Calibration | None = None,
                      estimator: str | None = None) -> tuple[Calibration, CalibrationReport]:
    """Make calibration parts from runs (see the module docstring for the steps).

    Parameters
    ----------
    flat_field : sequence of CalibrationRun
        Flat-field runs of one line: gain map and the first line of the energy scale. Their ``energy_kev`` is the
        line (all runs the same); None (default) means an Fe-55 source.
    lines : sequence of CalibrationRun
        Further lines for the energy scale (``energy_kev`` required); with no flat field they alone make the scale
        (one line: a scale through the origin). Several lines may come from one table (a line and its escape peak).
    unpolarized, polarized : sequence of CalibrationRun
        Runs for the spurious-modulation map and the modulation-factor curve.
    selection : Cut, optional
        Cuts on unpolarized and polarized events (after calibration), added to the default selection.
    flat_selection : Cut, optional
        Cuts on flat-field and line events (before calibration), added to the default selection.
    weighting : {"none", "ellipticity", "response"}
        Per-event weights for steps 4 and 5; ``"response"`` fits the modulation response on the polarized runs
        first (step 3), or uses the one of ``base`` when there are no polarized runs.
    gain_cell_mm : float, optional
        Gain-map cell size; default: chosen from the event count (:func:`~trackfit.analysis.gainmap.
        choose_gain_cell_mm`, the smallest size for which 80 % of the events lie in cells of ``gain_min_counts``).
    gain_min_counts : int
        Minimum events per fitted gain-map cell.
    gain_drift : bool
        Fit gain versus time on the (single) flat-field run first.
    quadratic : bool
        Quadratic energy scale (needs three lines).
    spurious_cell_mm, spurious_min_counts : float, int
        Cells of the spurious map and the minimum events per cell.
    spurious_energy_edges_kev : array_like, optional
        Pool the unpolarized runs and make one spurious-map node per energy bin (default: one node per run).
    extent_mm : (x0, x1, y0, y1), optional
        Region covered by the maps (default: each map's cells centred on its own data).
    base : Calibration, optional
        Start from these parts (those made here replace them).
    estimator : {"two-stage", "adaptive", "skeleton"}, optional
        The emission-angle estimate of the unpolarized and polarized tables to use (default: the one they were
        reconstructed with, which must then be the same for all of them).

    Raises
    ------
    NoEventsLeftError
        A run kept no event; the message shows its cut flow.
    ValueError
        Inputs that cannot make the parts asked for (the message names the parameter to change).
    """
    selection = with_default(selection)
    flat_selection = with_default(flat_selection)
    if weighting not in WEIGHTINGS:
        raise ValueError(f"unknown weighting {weighting!r}; expected one of {WEIGHTINGS}")
    cal = base if base is not None else Calibration()
    report = CalibrationReport(selection=selection, flat_selection=flat_selection)
    estimator, unpolarized, polarized = _with_one_estimate(estimator, unpolarized, polarized)
    if weighting == "response" and not polarized and (cal.modulation_response is None
                                                      or cal.estimator_of("modulation_response") != estimator):
        raise ValueError("weighting='response' needs polarized runs to fit the modulation response (or a base "
                         f"calibration with a modulation response made with the {estimator!r} estimate)")
    science_record = dict(weights=weighting, estimator=estimator)
    line_points = []  # (label, energy_kev, LineFit)
    gain = None

    if flat_field:
        line_energies = {run.energy_kev for run in flat_field}
        if len(line_energies) != 1:
            raise ValueError(f"flat-field runs must share one line (got energies {sorted(map(str, line_energies))})")
        line_kev = line_energies.pop()
        chosen = [_selected(run, flat_selection, "flat field", report) for run in flat_field]
        data = _concat(chosen, ("pulse_height", "centroid_x_mm", "centroid_y_mm", "time_s"))
        labels = [run.label for run in flat_field]
        flat_inputs = [table_identity(run.table, run.label) for run in flat_field]
        model = "fe55" if line_kev is None else "gaussian"
        ph = data["pulse_height"].astype(float)
        fit_range = None
        if line_kev is not None:  # find the line (pulse height per keV from the table's nominal scale)
            nominal = nominal_counts_per_kev(ph, np.concatenate([np.asarray(t["energy_kev"]) for t in chosen]))
            try:
                located = fit_line_near(ph, scan_gain([ph], [line_kev], guess=nominal) * line_kev)
            except ValueError as err:
                raise ValueError(f"flat-field run(s) {', '.join(repr(r.label) for r in flat_field)}, line at "
                                 f"{line_kev:g} keV: {err}") from None
            fit_range = (float(located.edges[0]), float(located.edges[-1]))  # the line, clear of its neighbours
        if gain_drift:
            if len(flat_field) != 1:
                raise ValueError(f"gain versus time needs exactly one flat-field run (got {len(flat_field)})")
            drift = fit_gain_drift(data["time_s"], ph, n_slices=drift_slices, line=model, fit_range=fit_range)
            warn_if_poor(drift.quality, f"the gain drift ({drift.model} model through {drift_slices} time slices)")
            ph = drift.correct(ph, data["time_s"])
            cal = cal.with_part("gain_drift", drift, make_provenance(
                runs=labels, inputs=flat_inputs, **_selection_record(flat_selection, report, "flat field")))
        x, y = data["centroid_x_mm"], data["centroid_y_mm"]
        cell_mm = gain_cell_mm
        if cell_mm is None:
            cell_mm = choose_gain_cell_mm(x, y, min_counts=gain_min_counts)
            if cell_mm is None:
                raise ValueError(f"a gain map needs cells of at least gain_min_counts={gain_min_counts} events; "
                                 f"the flat field has {ph.size} selected events: lower gain_min_counts or give "
                                 "more flat-field events")
            report.notes.append(f"gain-map cells of {cell_mm:g} mm, chosen for {ph.size} flat-field events so that "
                                f"most cells hold >= {gain_min_counts} (gain_cell_mm sets another size)")
        report.gain_cell_mm = cell_mm
        if extent_mm is None:
            x_edges, y_edges = centred_cell_edges(x, cell_mm), centred_cell_edges(y, cell_mm)
        else:
            x_edges = cell_edges(extent_mm[0], extent_mm[1], cell_mm)
            y_edges = cell_edges(extent_mm[2], extent_mm[3], cell_mm)
        try:
            gain = fit_gain_map(x, y, ph, x_edges_mm=x_edges, y_edges_mm=y_edges, min_counts=gain_min_counts,
                                line=model, fit_range=fit_range)
        except GainCellError as err:
            advice = (f"gain_cell_mm={err.suggested_cell_mm:g} would work" if err.suggested_cell_mm is not None
                      else "no cell size would work")
            raise ValueError(f"no gain-map cell of gain_cell_mm={err.cell_mm:g} mm reached gain_min_counts="
                             f"{err.min_counts} events (the fullest holds {err.fullest} of {err.n_events} "
                             f"flat-field events): give larger cells ({advice}) or a smaller gain_min_counts") \
                from None
        quality = gain.quality
        if quality is not None:
            warn_if_poor(quality, f"the gain-map cells ({gain.n_measured} line fits taken together; "
                                  f"{gain.n_poor_cells} poor on their own)",
                         advice="larger cells or a line model that fits the source")
        cal = cal.with_part("gain_map", gain, make_provenance(
            runs=labels, cell_mm=cell_mm, min_counts=gain_min_counts, line_kev=line_kev, inputs=flat_inputs,
            **_selection_record(flat_selection, report, "flat field")))
        corrected = gain.correct(ph, x, y)
        fit = _fit_flat_line(corrected, line_kev, gain.reference_peak)
        line_kev = FE55_KALPHA_KEV if line_kev is None else line_kev
        warn_if_poor(fit.quality, f"the flat-field line at {line_kev:g} keV")
        report.flat_field_fit, report.flat_field_line_kev = fit, line_kev
        line_points.append((", ".join(labels), line_kev, fit))

    if lines:
        for run in lines:
            if run.energy_kev is None:
                raise ValueError(f"line run '{run.label}' needs its energy_kev")
        selected = {}
        for run in lines:  # one selection (and one cut flow) per table
            if id(run.table) not in selected:
                selected[id(run.table)] = _selected(run, flat_selection, "line", report)
        spectra = {}
        for key, t in selected.items():
            values = np.asarray(t["pulse_height"], dtype=float)
            if gain is not None:
                values = gain.correct(values, t["centroid_x_mm"], t["centroid_y_mm"])
            spectra[key] = values
        if line_points:  # the flat-field line fixes the gain
            per_kev = line_points[0][2].peak / line_points[0][1]
            guess = per_kev
        else:
            first = selected[id(lines[0].table)]
            guess = nominal_counts_per_kev(first["pulse_height"], first["energy_kev"])
        if gain_drift and cal.gain_drift is not None:
            report.notes.append("gain drift of the flat field not applied to the line runs")
        per_kev = scan_gain([spectra[id(r.table)] for r in lines], [r.energy_kev for r in lines], guess=guess,
                            span=1.3 if line_points else 2.5)
        for run in lines:
            others = [per_kev * o.energy_kev for o in lines if o.table is run.table and o is not run]
            try:
                fit = fit_line_near(spectra[id(run.table)], per_kev * run.energy_kev, neighbours=others)
            except ValueError as err:  # say which run: several line runs may be calibrated at once
                raise ValueError(f"line run '{run.label}', line at {run.energy_kev:g} keV: {err}") from None
            warn_if_poor(fit.quality, f"the line at {run.energy_kev:g} keV of '{run.label}'")
            report.line_fits.append((run.label, run.energy_kev, fit))
            line_points.append((run.label, run.energy_kev, fit))

    if line_points:
        peaks = [fit.peak for _, _, fit in line_points]
        energies = [energy for _, energy, _ in line_points]
        errors = [fit.peak_err for _, _, fit in line_points]
        scale = EnergyScale.from_lines(peaks, energies, degree=2 if quadratic else 1, pulse_height_errors=errors)
        if len(line_points) == 1:
            report.notes.append("one line: the energy scale goes through the origin")
        inputs = [table_identity(run.table, run.label) for run in list(flat_field) + list(lines)]
        cal = cal.with_part("energy_scale", scale, make_provenance(
            runs=[label for label, _, _ in line_points], lines_kev=energies, inputs=inputs,
            **_selection_record(flat_selection, report, "flat field", "line")))

    def prepared(run, role):
        columns = cal.apply(run.table)
        flow = selection.cut_flow(columns)
        report.cut_flows.append((run.label, role, flow))
        if flow.n_kept == 0:
            raise NoEventsLeftError(f"in {role} run '{run.label}'", flow)
        events = select_rows(columns, selection.mask(columns))
        return events, event_weights(events, weighting)

    if weighting == "response" and polarized:
        fit_runs = []
        for run in polarized:
            columns = cal.apply(run.table)
            events = select_rows(columns, selection.mask(columns))
            fit_runs.append((events, events["emission_rad"], run.polarization_degree, run.polarization_angle_rad))
        response = fit_modulation_response(fit_runs)
        cal = cal.with_part("modulation_response", response, make_provenance(
            runs=[r.label for r in polarized], inputs=[table_identity(r.table, r.label) for r in polarized],
            beams=[{"degree": r.polarization_degree, "angle_rad": r.polarization_angle_rad} for r in polarized],
            features=list(response.features), cuts=selection.to_dict(), selection=selection.describe(),
            weights="response", estimator=estimator))

    if unpolarized:
        if cal.energy_scale is None:
            report.notes.append("no energy scale: the spurious map uses the energy_kev column of the tables")
        prepared_runs = []
        for run in unpolarized:
            events, weights = prepared(run, "unpolarized")
            if weights is not None:
                events = dict(events, weights=weights)
            prepared_runs.append(events)
        if extent_mm is None:
            x_edges = centred_cell_edges(np.concatenate([r["conv_x_mm"] for r in prepared_runs]), spurious_cell_mm)
            y_edges = centred_cell_edges(np.concatenate([r["conv_y_mm"] for r in prepared_runs]), spurious_cell_mm)
        else:
            x_edges = cell_edges(extent_mm[0], extent_mm[1], spurious_cell_mm)
            y_edges = cell_edges(extent_mm[2], extent_mm[3], spurious_cell_mm)
        spurious = measure_spurious_map(prepared_runs, x_edges_mm=x_edges, y_edges_mm=y_edges,
                                        min_counts=spurious_min_counts, energy_edges_kev=spurious_energy_edges_kev)
        cal = cal.with_part("spurious_modulation", spurious, make_provenance(
            runs=[r.label for r in unpolarized], cell_mm=spurious_cell_mm, min_counts=spurious_min_counts,
            energy_edges_kev=spurious_energy_edges_kev, inputs=[table_identity(r.table, r.label) for r in unpolarized],
            **science_record, **_selection_record(selection, report, "unpolarized")))

    if polarized:
        points = []
        for run in polarized:
            events, weights = prepared(run, "polarized")
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
        warn_if_poor(curve.quality, "the modulation-factor curve through the polarized runs",
                     advice="a curve of another order, or runs that disagree")
        cal = cal.with_part("modulation_factor", curve, make_provenance(
            runs=[r.label for r in polarized],
            beams=[{"degree": r.polarization_degree, "angle_rad": r.polarization_angle_rad} for r in polarized],
            inputs=[table_identity(r.table, r.label) for r in polarized], **science_record,
            **_selection_record(selection, report, "polarized")))
    return cal, report
