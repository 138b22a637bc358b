"""Polarimetry and calibration: from event tables to spectra, gain maps, Stokes parameters and MDP.

What to use when
----------------
* Choose events with cuts from :mod:`~trackfit.analysis.selection` (:class:`EnergyWindow`, :class:`CircleRegion`,
  :class:`ElongationCut`, :class:`StatusCut`, ...), combined with ``&``, ``|``, ``~``; every analysis adds them to
  the default selection, :class:`UsableEvents` (an emission angle and no failure bit; ``reject_warnings=True``
  also drops warning bits), which :func:`with_default` puts first. ``cut.cut_flow(table)`` says how many events
  each cut removed; ``read_selection("cuts.toml")`` reads them from a file.
* Energy: :func:`fit_fe55` (blended Mn K-alpha/K-beta of an Fe-55 source) or :func:`fit_line` (one Gaussian) on
  pulse heights; :class:`EnergyScale` from one or more lines; :func:`fit_gain_map` (peak per spatial cell) and
  :func:`fit_gain_drift` (peak per time slice) for relative gains.
* Polarization: :func:`stokes_parameters` (unbinned, Kislat et al. 2015) is the main tool and gives degree, angle,
  errors, Rice interval and MDP99; :func:`stokes_in_bands` per energy band; :func:`stokes_sums` +
  ``StokesSums.subtract`` for off-source background; :func:`modulation_curve` for the binned fit and its figure;
  :func:`mdp99` for planning; :func:`ellipticity_weights` for the weighted analysis.
* Calibration of the polarimeter response: :func:`measure_modulation_factor` on 100 %-polarized runs and
  :func:`fit_modulation_factor_curve`; :func:`measure_spurious_map` on unpolarized runs and
  :func:`separate_spurious` for runs 90 degrees apart. :class:`Calibration` bundles energy scale, gain map,
  modulation-factor curve and spurious map, saves/loads them (``docs/calibration-format.md``) and applies them to
  any event table; :func:`build_calibration` makes one from calibration runs (``trackfit calibrate``);
  :func:`measure_polarization` does selection + calibration + Stokes on a table in one call
  (``trackfit polarization``). :func:`bragg_mosaic_polarization` gives the degree of a Bragg-reflected beam.
* Fit quality: every fit reports its goodness of fit (``fit.quality``); poor fits raise a
  :class:`FitQualityWarning` in :func:`build_calibration` and :func:`measure_polarization`
  (:mod:`~trackfit.analysis.fitquality`).
* Figures: :mod:`trackfit.analysis.figures` (matplotlib, imported lazily).
"""

from . import figures  # noqa: F401  (matplotlib itself is imported inside the functions)
from .calfile import CALIBRATION_FORMAT_VERSION, Calibration, CalibrationFormatError
from .calibrate import CalibrationReport, CalibrationRun, build_calibration
from .fitquality import FitQuality, FitQualityWarning
from .gainmap import GainMap, fit_gain_map
from .gaintime import GainDrift, fit_gain_drift
from .modfactor import (
    ModulationFactorCurve,
    ModulationFactorPoint,
    fit_modulation_factor_curve,
    measure_modulation_factor,
)
from .modulation import ModulationFit, modulation_curve
from .polarimetry import PolarizationMeasurement, measure_polarization
from .selection import (
    AllOf,
    AnyOf,
    CircleRegion,
    Cut,
    CutFlow,
    ElongationCut,
    EnergyWindow,
    Everything,
    HexagonRegion,
    Invert,
    NoEventsLeftError,
    PixelCountCut,
    RangeCut,
    RectangleRegion,
    SelectionError,
    SelectionMismatchWarning,
    StatusCut,
    UsableEvents,
    cut_from_dict,
    default_selection,
    read_selection,
    select_rows,
    selection_differences,
    selection_from_dict,
    selection_to_dict,
    with_default,
    write_selection,
)
from .sources import bragg_angle_rad, bragg_energy_kev, bragg_mosaic_polarization
from .spectrum import FE55_KALPHA_KEV, FE55_KBETA_KEV, FE55_LINES_KEV, EnergyScale, LineFit, fit_fe55, fit_line
from .spurious import SpuriousMap, SpuriousSeparation, cell_edges, measure_spurious_map, separate_spurious
from .stokes import (
    MDP99_CONSTANT,
    StokesBands,
    StokesResult,
    StokesSums,
    ellipticity_weights,
    mdp99,
    rice_interval,
    stokes_in_bands,
    stokes_parameters,
    stokes_sums,
)

__all__ = [
    "AllOf", "AnyOf", "CALIBRATION_FORMAT_VERSION", "Calibration", "CalibrationFormatError", "CalibrationReport",
    "CalibrationRun", "CircleRegion", "Cut", "CutFlow", "ElongationCut", "EnergyScale", "EnergyWindow",
    "Everything", "FE55_KALPHA_KEV", "FE55_KBETA_KEV", "FE55_LINES_KEV", "FitQuality", "FitQualityWarning",
    "GainDrift", "GainMap", "HexagonRegion", "Invert", "LineFit", "MDP99_CONSTANT", "ModulationFactorCurve",
    "ModulationFactorPoint", "ModulationFit", "NoEventsLeftError", "PixelCountCut", "PolarizationMeasurement",
    "RangeCut", "RectangleRegion", "SelectionError", "SelectionMismatchWarning", "SpuriousMap",
    "SpuriousSeparation", "StatusCut", "StokesBands", "StokesResult", "StokesSums", "UsableEvents",
    "bragg_angle_rad", "bragg_energy_kev", "bragg_mosaic_polarization", "build_calibration", "cell_edges",
    "cut_from_dict", "default_selection", "ellipticity_weights", "fit_fe55", "fit_gain_drift", "fit_gain_map",
    "fit_line", "fit_modulation_factor_curve", "mdp99", "measure_modulation_factor", "measure_polarization",
    "measure_spurious_map", "modulation_curve", "read_selection", "rice_interval", "select_rows",
    "selection_differences", "selection_from_dict", "selection_to_dict", "separate_spurious", "stokes_in_bands",
    "stokes_parameters", "stokes_sums", "with_default", "write_selection",
]
