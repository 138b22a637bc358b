"""One call from an event table to a polarization result: select, calibrate, weight, subtract, measure.

:func:`measure_polarization` is what the ``trackfit polarization`` command runs; use it from Python when the
defaults fit, and the pieces (:mod:`~trackfit.analysis.selection`, :class:`~trackfit.analysis.Calibration`,
:func:`~trackfit.analysis.stokes_parameters`) when they do not.
"""

from __future__ import annotations

import html
from collections.abc import Mapping
from dataclasses import dataclass, field, replace

import numpy as np

from .calfile import ESTIMATE_PARTS, Calibration
from .estimates import EstimateMismatchError, estimator_of
from .fitquality import warn_if_poor
from .modulation import ModulationFit, fit_angle_histogram
from .selection import (
    Cut,
    CutFlow,
    NoEventsLeftError,
    warn_if_selections_differ,
    with_default,
)
from .stokes import ONE_SIGMA_LEVEL, StokesBands, StokesResult, ellipticity_weights

__all__ = ["PolarizationMeasurement", "measure_polarization", "event_weights", "WEIGHTINGS"]

#: per-event weighting schemes known by name
WEIGHTINGS = ("none", "ellipticity", "response")


def event_weights(table: Mapping, weighting) -> np.ndarray | None:
    """Per-event weights of a table: ``"none"`` -> None, ``"ellipticity"`` -> :func:`ellipticity_weights`,
    ``"response"`` -> the column ``response_weight`` (the expected modulation response of each event, added by
    :meth:`Calibration.apply` from a calibration's modulation-response part; ``docs/methods.md`` §11), or an array
    (one weight per row)."""
    if weighting is None or (isinstance(weighting, str) and weighting == "none"):
        return None
    if isinstance(weighting, str):
        if weighting == "user_weight":  # per-row weights attached by measure_polarization
            return np.asarray(table["user_weight"], dtype=float)
        if weighting == "response":
            if "response_weight" not in table:
                raise ValueError("the weights 'response' need a calibration with a modulation-response part "
                                 "(made by trackfit calibrate --weights response with polarized runs)")
            return np.asarray(table["response_weight"], dtype=float)
        if weighting != "ellipticity":
            raise ValueError(f"unknown weighting {weighting!r}; expected one of {WEIGHTINGS} or an array")
        return ellipticity_weights(table["m2_major_mm2"], table["m2_minor_mm2"])
    w = np.asarray(weighting, dtype=float)
    n = len(table["emission_rad"])
    if w.shape != (n,):
        raise ValueError(f"weights must have one value per event, shape ({n},) (got {w.shape})")
    return w


def _from_stokes(name: str, doc: str) -> property:
    """A read-only property that returns ``self.stokes.<name>``."""
    return property(lambda self: getattr(self.stokes, name), doc=f"{doc} (``stokes.{name}``).")


@dataclass(frozen=True, kw_only=True)
class PolarizationMeasurement:
    """Result of :func:`measure_polarization`: the Stokes result, its cut flow, bands and the modulation curve.

    Attributes
    ----------
    stokes : StokesResult
        The answer: normalized Stokes parameters, degree, angle, errors, interval, MDP99 (see
        :class:`~trackfit.analysis.StokesResult`). Its most used values are also attributes of the measurement
        itself (read-only shortcuts, table below).
    cut_flow : CutFlow
        Events kept and removed by each cut of the selection; the default selection (an emission angle and no
        failure bit) is its first step.
    modulation : ModulationFit or None
        Binned fit of the modulation curve of the selected events (a cross-check and a figure).
    bands : StokesBands or None
        Results per energy band, when bands were asked for.
    background_cut_flow : CutFlow or None
        Cut flow of the off-source events, when a background was subtracted.
    modulation_factor_rel_err : float
        Relative error of the calibration's modulation factor for these events.
    degree_calibration_err : float
        ``degree * modulation_factor_rel_err``: scale error of the degree from the calibration, common to every run
        analysed with it (not included in ``degree_err``).
    spurious_map_q_err, spurious_map_u_err : float
        The part of ``q_err`` and ``u_err`` (added in quadrature) that comes from the statistical errors of the
        subtracted spurious-modulation map (0 without a map); ``spurious_map_variance_share`` gives its share.
    settings : dict
        Selection, weighting, calibration parts and fit settings used (what the JSON output records).

    Shortcuts to ``stokes`` (``result.degree`` is ``result.stokes.degree``):

    ==========================  ===========================================================================
    ``q``, ``u``                normalized, modulation-corrected Stokes parameters
    ``q_err``, ``u_err``        their errors (statistical, including the spurious-map calibration error)
    ``degree``, ``degree_err``  polarization degree (0 to 1, biased high at low counts) and its error
    ``degree_low``,             interval of the degree at ``stokes.confidence_level`` (Rice law, Neyman
    ``degree_high``             construction; docs/methods.md §4)
    ``angle_deg``,              polarization angle in degrees, in (-90, 90], from +x towards +y in the
    ``angle_err_deg``           detector frame, and its error (NaN for a degree of exactly 0)
    ``angle_rad``,              the same in radians
    ``angle_err_rad``
    ``mdp99``                   minimum detectable polarization at 99 % for these events (0 to 1)
    ``p_value_unpolarized``     probability of a degree at least this large from unpolarized light
    ``detected``                ``p_value_unpolarized < 0.01``: below, the angle is undefined (any angle fits)
    ``n_events``, ``n_eff``     events used and effective events ``(sum w)^2 / sum w^2``
    ``modulation_factor``       effective modulation factor of the events
    ==========================  ===========================================================================
    """

    stokes: StokesResult
    cut_flow: CutFlow
    modulation: ModulationFit | None
    bands: StokesBands | None = None
    background_cut_flow: CutFlow | None = None
    modulation_factor_rel_err: float = 0.0
    spurious_map_q_err: float = 0.0
    spurious_map_u_err: float = 0.0
    settings: dict = field(default_factory=dict)

    # read-only shortcuts to the Stokes result (documented in the table of the class docstring)
    q = _from_stokes("q", "Normalized, modulation-corrected Stokes parameter Q")
    u = _from_stokes("u", "Normalized, modulation-corrected Stokes parameter U")
    q_err = _from_stokes("q_err", "Error of Q")
    u_err = _from_stokes("u_err", "Error of U")
    degree = _from_stokes("degree", "Polarization degree, 0 to 1")
    degree_err = _from_stokes("degree_err", "Error of the degree")
    degree_low = _from_stokes("degree_low", "Lower end of the interval of the degree")
    degree_high = _from_stokes("degree_high", "Upper end of the interval of the degree")
    angle_deg = _from_stokes("angle_deg", "Polarization angle in degrees, in (-90, 90]")
    angle_err_deg = _from_stokes("angle_err_deg", "Error of the angle in degrees")
    angle_rad = _from_stokes("angle_rad", "Polarization angle in radians, in (-pi/2, pi/2]")
    angle_err_rad = _from_stokes("angle_err_rad", "Error of the angle in radians")
    mdp99 = _from_stokes("mdp99", "Minimum detectable polarization at 99 %, 0 to 1")
    p_value_unpolarized = _from_stokes("p_value_unpolarized", "Probability of this degree from unpolarized light")
    detected = _from_stokes("detected", "Polarization detected at 99 %; below it the angle is undefined")
    n_events = _from_stokes("n_events", "Events used")
    n_eff = _from_stokes("n_eff", "Effective number of events")
    modulation_factor = _from_stokes("modulation_factor", "Effective modulation factor of the events")

    @property
    def degree_calibration_err(self) -> float:
        """Scale uncertainty of the degree from the modulation-factor calibration (``p sigma_mu / mu``, in units
        of the degree; not included in ``stokes.degree_err``, common to all runs analysed with the same
        calibration)."""
        return self.stokes.degree * self.modulation_factor_rel_err

    @property
    def spurious_map_variance_share(self) -> tuple[float, float]:
        """Fractions of the variances of Q and U that come from the spurious-map errors."""
        s = self.stokes
        share_q = (self.spurious_map_q_err / s.q_err) ** 2 if s.q_err > 0 else 0.0
        share_u = (self.spurious_map_u_err / s.u_err) ** 2 if s.u_err > 0 else 0.0
        return float(share_q), float(share_u)

    def to_dict(self) -> dict:
        out = {"stokes": self.stokes.to_dict(), "cut_flow": self.cut_flow.to_dict(), "settings": self.settings,
               "modulation_factor_rel_err": self.modulation_factor_rel_err,
               "degree_calibration_err": self.degree_calibration_err,
               "spurious_map_q_err": self.spurious_map_q_err, "spurious_map_u_err": self.spurious_map_u_err}
        if self.modulation is not None:
            m = self.modulation
            out["modulation_curve"] = {"modulation": m.modulation, "modulation_err": m.modulation_err,
                                       "phase_deg": float(np.rad2deg(m.phase_rad)),
                                       "phase_err_deg": float(np.rad2deg(m.phase_err_rad)), "chi2": m.chi2,
                                       "ndof": m.ndof, "n_bins": int(m.counts.size)}
        if self.bands is not None:
            out["energy_bands"] = self.bands.to_dict()
        if self.background_cut_flow is not None:
            out["background_cut_flow"] = self.background_cut_flow.to_dict()
        return out

    def __repr__(self):
        parts = [repr(self.stokes)]
        if self.spurious_map_q_err > 0 or self.spurious_map_u_err > 0:
            share_q, share_u = self.spurious_map_variance_share
            parts.append(f"  {'of which spurious map':<24}Q ± {self.spurious_map_q_err:.5f}, U ± "
                         f"{self.spurious_map_u_err:.5f} ({100 * share_q:.1f} % and {100 * share_u:.1f} % of the "
                         "variances: the map's statistical errors)")
        if self.modulation_factor_rel_err > 0:
            parts.append(f"  {'degree scale error':<24}± {100 * self.degree_calibration_err:.2f} percentage points "
                         f"(the modulation factor is known to ± {100 * self.modulation_factor_rel_err:.1f} % of "
                         "its value; not in the errors above)")
        parts += ["", "Cut flow", str(self.cut_flow)]
        if self.background_cut_flow is not None:
            parts += ["", "Background cut flow", str(self.background_cut_flow)]
        if self.bands is not None:
            parts += ["", "Energy bands", repr(self.bands)]
        if self.modulation is not None:
            parts += ["", repr(self.modulation)]
        return "\n".join(parts)

    def _repr_html_(self):
        pieces = [self.stokes._repr_html_(), self.cut_flow._repr_html_()]
        if self.bands is not None:
            pieces.append(self.bands._repr_html_())
        if self.modulation is not None:
            pieces.append(self.modulation._repr_html_())
        return "".join(pieces) or html.escape(repr(self))


def measure_polarization(table, *, selection: Cut | None = None, calibration: Calibration | None = None,
                         modulation_factor: float | None = None, weighting="none",
                         background_selection: Cut | None = None, background_table=None,
                         background_scale: float | None = None, energy_bands_kev=None, n_bins: int = 36,
                         use_gain_drift: bool = False, confidence_level: float = ONE_SIGMA_LEVEL,
                         estimator: str | None = None, client=None) -> PolarizationMeasurement:
    """Select events, apply a calibration, and measure the polarization.

    Parameters
    ----------
    table : mapping of column arrays, path of a table file, or a sequence of them
        An event table (``emission_rad`` and whatever the selection and calibration need), or several runs: they
        are read one at a time (files in blocks of rows) and reduced to sums that add up
        (:mod:`~trackfit.analysis.manyruns`), so the memory does not grow with their number; the result equals the
        one-table answer on their concatenation. Every run gets the same calibration and selection.
    selection : Cut, optional
        Cuts on the source events, added to the default selection (:class:`~trackfit.analysis.UsableEvents`: an
        emission angle and no failure bit), which is the first step of the cut flow. With a calibration, a
        warning (:class:`~trackfit.analysis.SelectionMismatchWarning`) says when its status and track-shape cuts
        differ from those the calibration's modulation factor or spurious map was made with.
    calibration : Calibration, optional
        Applied before the selection (so energy cuts use calibrated energies); its modulation-factor curve
        and spurious map are used per event, and the statistical errors of the spurious map are added to the
        errors of the Stokes parameters (events of one cell share the map's error).
    modulation_factor : float, optional
        One modulation factor for all events (overrides the calibration's curve).
    weighting : {"none", "ellipticity", "response"} or array_like
        Per-event weights (Di Marco et al. 2022; ``"response"``: the calibration's modulation response,
        ``docs/methods.md`` §11), or one weight per table row; the modulation factor must be measured with the
        same weights: a calibration whose modulation factor or spurious map was made with other weights is refused.
    background_selection : Cut, optional
        Off-source events (added to the default selection), taken from ``background_table`` (default: the same
        table, or each of the tables), subtracted with ``background_scale`` = (area x time on) / (area x time off)
        (required with a background). ``background_table`` may be several tables too.
    energy_bands_kev : array_like, optional
        Band edges for a per-band table (each band with its own background subtraction and map errors).
    n_bins : int
        Bins of the modulation curve (multiple of 12).
    use_gain_drift : bool
        Apply the calibration's gain drift (only for the run it was measured on).
    confidence_level : float
        Level of the Rice interval of the degree.
    estimator : {"two-stage", "adaptive", "skeleton"}, optional
        The emission-angle estimate of the tables to use (default: the one the (first) table was reconstructed
        with; :func:`trackfit.analysis.estimates.estimator_of`); every table must hold it. A calibration made with
        another estimate is refused.
    client : dask.distributed.Client, optional
        Reduce each table as a Dask task (tables given as paths are read by the workers).

    Raises
    ------
    NoEventsLeftError
        No source event passes the selection (the message shows the cut flow).
    EstimateMismatchError
        The calibration's modulation factor, spurious map or modulation response was made with another estimate
        or other weights (the message names both).
    ValueError
        Per-row weights (an array) with several tables (they belong to the rows of one table).
    """
    from .manyruns import MeasurementSpec, as_table_list, sum_tables

    selection = with_default(selection)
    tables = as_table_list(table)
    several = tables is not None
    if not several:
        tables = [table]
    background_tables = None
    if background_table is not None:
        background_tables = as_table_list(background_table) or [background_table]
    chosen = estimator_of(_with_provenance(tables[0])) if estimator is None else estimator
    _check_estimate_against_calibration(chosen, weighting, calibration, modulation_factor)
    if not isinstance(weighting, str) and weighting is not None:  # per-row weights travel with the rows
        if several:
            raise ValueError("per-row weights (an array) belong to one table; with several tables use "
                             "weighting='ellipticity' or 'none'")
        w = np.asarray(weighting, dtype=float)
        n_rows = len(table["emission_rad"])
        if w.shape != (n_rows,):
            raise ValueError(f"weights must have one value per table row, shape ({n_rows},) (got {w.shape})")
        if background_table is not None:
            raise ValueError("per-row weights cannot be used with a separate background_table; use "
                             "weighting='ellipticity' or put the weights in both tables")
        tables = [dict(table, user_weight=w)]
        weighting = "user_weight"
    has_background = background_selection is not None or background_table is not None
    if has_background and background_scale is None:
        raise ValueError("a background needs background_scale = (area x time on) / (area x time off)")
    edges = None
    if energy_bands_kev is not None:
        edges = np.asarray(energy_bands_kev, dtype=float)
        if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0):
            raise ValueError(f"'energy_bands_kev' must be increasing with at least 2 entries (got {edges.tolist()})")
    if isinstance(n_bins, bool) or int(n_bins) != n_bins or n_bins < 12 or n_bins % 12:
        raise ValueError(f"'n_bins' must be a positive multiple of 12 (got {n_bins!r})")
    _check_against_calibration(selection, weighting, calibration, modulation_factor)
    if has_background:
        warn_if_selections_differ(with_default(background_selection), selection, what="the background selection",
                                  reference_name="the source selection",
                                  reason="A background is subtracted correctly only when its events pass the same "
                                  "status and track-shape cuts as the source events")
    spec = MeasurementSpec(selection=selection, calibration=calibration, modulation_factor=modulation_factor,
                           weighting=weighting, background_selection=background_selection if has_background
                           else None, energy_edges_kev=edges, n_bins=int(n_bins), use_gain_drift=use_gain_drift,
                           estimator=chosen)
    if has_background and background_selection is None and background_tables is not None:
        spec = replace(spec, background_selection=with_default(None))
    total = sum_tables(tables, spec, background_tables=background_tables, client=client)
    flow = total.flow
    if flow.n_kept == 0:
        raise NoEventsLeftError("in the runs" if several else "in the run", flow)
    sums = total.source.stokes_sums(calibration)
    background_flow = None
    if has_background:
        background_flow = total.background_flow
        sums = sums.subtract(total.background.stokes_sums(calibration), background_scale)
    result = StokesResult.from_sums(sums, confidence_level=confidence_level)
    bands = None
    if edges is not None:
        results = []
        off_bands = total.background_bands or (None,) * len(total.bands)
        for lo, hi, band, off_band in zip(edges[:-1], edges[1:], total.bands, off_bands, strict=True):
            if band.n_rows == 0:
                results.append(None)
                continue
            band_sums = band.stokes_sums(calibration)
            if has_background and off_band is not None and off_band.n_rows:
                band_sums = band_sums.subtract(off_band.stokes_sums(calibration), background_scale)
            results.append(StokesResult.from_sums(band_sums, confidence_level=confidence_level,
                                                  label=f"{lo:g}–{hi:g} keV") if band_sums.i > 0 else None)
        bands = StokesBands(edges_kev=edges, results=tuple(results))
    mu_rel_err = float(total.mu_rel_weighted / total.mu_weight) if total.mu_weight > 0 else 0.0
    histogram = total.histogram
    modulation = fit_angle_histogram(histogram) if histogram.n_events >= 2 else None
    if modulation is not None and histogram.n_events >= 5 * n_bins:  # chi-square law: >= 5 events per bin
        warn_if_poor(modulation.quality, f"the modulation curve A + B cos²(φ − φ0) ({n_bins} bins)",
                     advice="the angles hold structure other than cos 2φ, e.g. the 60° pattern of the pixel grid; "
                     "the Stokes result does not assume the curve's shape")
    settings = {"selection": selection.to_dict(), "estimator": chosen,
                "weighting": weighting if isinstance(weighting, str) else "array",
                "modulation_factor": modulation_factor, "calibration_parts": calibration.parts() if calibration
                else [], "background_selection": None if background_selection is None
                else background_selection.to_dict(), "background_scale": background_scale, "n_bins": n_bins,
                "confidence_level": confidence_level}
    if several:
        settings["n_tables"] = len(tables)
    map_q_err = float(np.sqrt(max(sums.extra_var_q, 0.0)) / sums.i)
    map_u_err = float(np.sqrt(max(sums.extra_var_u, 0.0)) / sums.i)
    return PolarizationMeasurement(stokes=result, cut_flow=flow, modulation=modulation, bands=bands,
                                   background_cut_flow=background_flow, modulation_factor_rel_err=mu_rel_err,
                                   spurious_map_q_err=map_q_err, spurious_map_u_err=map_u_err, settings=settings)


def _with_provenance(table):
    """A table, or for a table file its provenance only (enough for :func:`estimator_of`)."""
    import os

    if isinstance(table, str | os.PathLike):
        from ..io.table import read_table

        return read_table(table, columns=[])
    return table


def _used_parts(calibration, modulation_factor) -> list[str]:
    """The calibration parts that depend on the estimate and the weights and that this measurement uses."""
    return [name for name in ESTIMATE_PARTS if getattr(calibration, name) is not None
            and not (name == "modulation_factor" and modulation_factor is not None)]


def _check_estimate_against_calibration(estimator, weighting, calibration, modulation_factor):
    """Refuse a calibration whose parts were made with another emission estimate or other weights."""
    if calibration is None:
        return
    weights = "none" if weighting is None else weighting if isinstance(weighting, str) else "array"
    for name in _used_parts(calibration, modulation_factor):
        if name == "modulation_response" and weights != "response":
            continue  # the response is only used as weights
        made_with = calibration.estimator_of(name)
        label = name.replace("_", " ")
        if made_with != estimator:
            raise EstimateMismatchError(
                f"the calibration's {label} was made with the {made_with!r} emission estimate, this measurement "
                f"uses the {estimator!r} estimate: analyse the {made_with!r} estimate (--estimator {made_with}) or "
                f"calibrate again with the {estimator!r} estimate")
        weights_made_with = calibration.weights_of(name)
        if name != "modulation_response" and weights_made_with is not None and weights not in ("array",) \
                and weights_made_with != weights:
            raise EstimateMismatchError(
                f"the calibration's {label} was made with weights {weights_made_with!r}, this measurement uses "
                f"{weights!r}: measure with --weights {weights_made_with}, or calibrate again with --weights "
                f"{weights} (the modulation factor and spurious map must be made with the weights of the analysis, "
                "Di Marco et al. 2022)")


def _check_against_calibration(selection, weighting, calibration, modulation_factor):
    """Warn when the selection differs from those of the calibration parts that are used."""
    if calibration is None:
        return
    used = [name for name in ("modulation_factor", "spurious_modulation") if getattr(calibration, name) is not None
            and not (name == "modulation_factor" and modulation_factor is not None)]
    seen = set()
    for name in used:
        reference = calibration.selection_of(name)
        if reference is not None and repr(reference.to_dict()) not in seen:
            seen.add(repr(reference.to_dict()))
            warn_if_selections_differ(selection, reference, what="this measurement",
                                      reference_name=f"the calibration's {name.replace('_', ' ')}", stacklevel=4)
