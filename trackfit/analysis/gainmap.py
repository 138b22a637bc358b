"""Gain map: the line peak position in spatial cells over the chip, and the per-event correction.

In each cell with at least ``min_counts`` events the line (Fe-55 by default, :func:`trackfit.analysis.fit_fe55`)
is fitted with peak, line counts, resolution and background free and the K-beta fraction fixed to that of a
global fit of the gain-corrected spectrum (:func:`grouped_peaks`, two passes). The relative gain of a cell is its
peak over the global peak (about the median cell); cells below ``min_counts`` (or whose fit failed) are NaN and are
applied as 1.

Precision per cell is about ``(FWHM/E / 2.355) / sqrt(N)`` = 0.0764/sqrt(N) for 18 % FWHM (docs/methods.md section 6).
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np

from .fitquality import FitQuality, combined_quality
from .spectrum import LineFit, fit_fe55, fit_line
from .spurious import _cell_index, centred_cell_edges

__all__ = ["GainMap", "fit_gain_map", "grouped_peaks", "GroupedPeaks", "GainCellError", "choose_gain_cell_mm",
           "GAIN_CELL_CANDIDATES_MM"]

#: cell sizes tried by :func:`choose_gain_cell_mm`, smallest first
GAIN_CELL_CANDIDATES_MM = (0.5, 1.0, 2.0, 2.5, 5.0, 10.0, 20.0, 50.0)


class GainCellError(ValueError):
    """No cell of a gain map holds enough events for a line fit.

    Attributes
    ----------
    cell_mm : float
        The cell size tried.
    min_counts, fullest, n_events : int
        The minimum asked for, the events in the fullest cell, and all events inside the map.
    suggested_cell_mm : float or None
        The smallest cell size of :data:`GAIN_CELL_CANDIDATES_MM` that would work, if any.
    """

    def __init__(self, message, *, cell_mm, min_counts, fullest, n_events, suggested_cell_mm):
        super().__init__(message)
        self.cell_mm, self.min_counts, self.fullest = cell_mm, min_counts, fullest
        self.n_events, self.suggested_cell_mm = n_events, suggested_cell_mm


class GroupedPeaks(NamedTuple):
    """Result of :func:`grouped_peaks`: one entry per group (NaN where the fit failed) and the global fit."""

    peaks: np.ndarray
    errors: np.ndarray
    global_fit: LineFit
    deviance: np.ndarray
    ndof: np.ndarray

#: K-beta/K-alpha count ratio assumed in the first pass (emission ratio 2.85/24.4 = 0.117 times a lower
#: detection efficiency at 6.5 keV; common practice, refined by the global fit of the second pass)
NOMINAL_KBETA_FRACTION = 0.1


def grouped_peaks(pulse_height, groups, *, line: str = "fe55", bins: int = 60, fit_range):
    """Line peak of each group of events (spatial cells, time slices) in two passes.

    Pass 1 fits each group with the K-beta fraction at :data:`NOMINAL_KBETA_FRACTION`; the pulse heights are then
    corrected group by group and fitted together (the global fit: resolution, K-beta fraction, reference peak
    free of the smearing by the gain variations); pass 2 refits each group with the global K-beta fraction.
    Groups whose fit fails get NaN.

    Returns
    -------
    GroupedPeaks
        ``peaks, errors`` (shape ``(len(groups),)``), ``global_fit`` (the fit of all grouped events after the
        pass-1 correction to the median group; its peak, about the median group peak, is the reference of relative
        gains) and the ``deviance`` and ``ndof`` of each group's final fit (goodness of fit).
    """
    ph = np.asarray(pulse_height, dtype=float)

    def fit_all(kbeta, resolution):
        peaks = np.full(len(groups), np.nan)
        errors = np.full(len(groups), np.nan)
        deviance = np.full(len(groups), np.nan)
        ndof = np.zeros(len(groups))
        for k, idx in enumerate(groups):
            if line == "fe55":
                fit = fit_fe55(ph[idx], bins=bins, range=fit_range, kbeta_fraction=kbeta,
                               start_resolution=resolution)
            else:
                fit = fit_line(ph[idx], bins=bins, range=fit_range, start_resolution=resolution)
            if fit.success and np.isfinite(fit.peak_err) and fit.peak_err > 0:
                peaks[k], errors[k] = fit.peak, fit.peak_err
                deviance[k], ndof[k] = fit.deviance, fit.ndof
        return peaks, errors, deviance, ndof

    peaks, errors, deviance, ndof = fit_all(NOMINAL_KBETA_FRACTION, 0.2)
    ok = np.isfinite(peaks)
    if not ok.any():
        raise ValueError(f"none of the {len(groups)} groups gave a {line} peak in the pulse-height range "
                         f"{fit_range[0]:.5g}–{fit_range[1]:.5g}" + (" (is the line an Fe-55 source? give the line "
                                                                    "energy to fit a single Gaussian line)"
                                                                    if line == "fe55" else ""))
    scale = np.median(peaks[ok])
    corrected = np.concatenate([ph[idx] * scale / peaks[k] for k, idx in enumerate(groups) if ok[k]])
    fitter = fit_fe55 if line == "fe55" else fit_line
    global_fit = fitter(corrected, bins=2 * bins, range=fit_range)
    if line == "fe55":
        kbeta = global_fit.counts_kbeta / max(global_fit.counts, 1e-12)
        peaks, errors, deviance, ndof = fit_all(kbeta, global_fit.fwhm_frac)
    return GroupedPeaks(peaks, errors, global_fit, deviance, ndof)



@dataclass(frozen=True, kw_only=True)
class GainMap:
    """Relative gain in spatial cells.

    Attributes
    ----------
    x_edges_mm, y_edges_mm : ndarray
        Cell edges.
    relative_gain, relative_gain_err : ndarray, shape (nx, ny)
        Cell peak / global peak and its error (NaN: not measured, applied as 1).
    counts : ndarray, shape (nx, ny)
        Events per cell.
    reference_peak : float
        Global peak position (pulse-height units).
    min_counts : int
        Cells with fewer events were not fitted.
    line : str
        ``"fe55"`` or ``"gaussian"``.
    position : str
        ``"centroid"`` (default: where the charge reaches the multiplier) or ``"conversion"``.
    """

    x_edges_mm: np.ndarray
    y_edges_mm: np.ndarray
    relative_gain: np.ndarray
    relative_gain_err: np.ndarray
    counts: np.ndarray
    reference_peak: float
    min_counts: int
    line: str = "fe55"
    position: str = "centroid"
    global_fit: LineFit | None = field(default=None, repr=False, compare=False)
    cell_deviance: np.ndarray | None = field(default=None, repr=False, compare=False)
    cell_ndof: np.ndarray | None = field(default=None, repr=False, compare=False)

    def __post_init__(self):
        shape = (len(self.x_edges_mm) - 1, len(self.y_edges_mm) - 1)
        for name in ("relative_gain", "relative_gain_err", "counts"):
            arr = np.asarray(getattr(self, name), dtype=float)
            if arr.shape != shape:
                raise ValueError(f"'{name}' must have shape {shape} (x cells, y cells); got {arr.shape}")
            object.__setattr__(self, name, arr)
        object.__setattr__(self, "x_edges_mm", np.asarray(self.x_edges_mm, dtype=float))
        object.__setattr__(self, "y_edges_mm", np.asarray(self.y_edges_mm, dtype=float))
        if self.position not in ("conversion", "centroid"):
            raise ValueError(f"'position' must be 'conversion' or 'centroid' (got {self.position!r})")

    @property
    def columns(self) -> tuple[str, str]:
        return ("conv_x_mm", "conv_y_mm") if self.position == "conversion" else ("centroid_x_mm", "centroid_y_mm")

    @property
    def n_measured(self) -> int:
        return int(np.count_nonzero(np.isfinite(self.relative_gain)))

    @property
    def quality(self) -> FitQuality | None:
        """Goodness of the cell fits taken together (summed deviance against summed ndof); None for a map read
        from a file (the per-cell statistics are not stored)."""
        if self.cell_deviance is None or self.cell_ndof is None:
            return None
        return combined_quality(self.cell_deviance, self.cell_ndof)

    @property
    def n_poor_cells(self) -> int:
        """Cells whose own fit is poor (:mod:`trackfit.analysis.fitquality`); 0 without per-cell statistics."""
        if self.cell_deviance is None or self.cell_ndof is None:
            return 0
        from .fitquality import fit_quality

        return sum(fit_quality(d, n).poor for d, n in zip(np.ravel(self.cell_deviance), np.ravel(self.cell_ndof),
                                                         strict=True) if np.isfinite(d) and n > 0)

    def uniformity(self) -> FitQuality:
        """Chi-square of the measured relative gains about their weighted mean (are the cells' differences more
        than their errors?), against ``cells - 1``."""
        g = self.relative_gain[np.isfinite(self.relative_gain)]
        e = self.relative_gain_err[np.isfinite(self.relative_gain)]
        if g.size < 2:
            return FitQuality(statistic=0.0, ndof=0, name="chi2")
        w = 1.0 / e**2
        mean = float(np.sum(w * g) / np.sum(w))
        return FitQuality(statistic=float(np.sum(w * (g - mean) ** 2)), ndof=int(g.size - 1), name="chi2")

    def gain_at(self, x_mm, y_mm) -> np.ndarray:
        """Relative gain at each position (1 for unmeasured cells, NaN positions and outside the map)."""
        x = np.asarray(x_mm, dtype=float)
        y = np.asarray(y_mm, dtype=float)
        ix = _cell_index(self.x_edges_mm, np.nan_to_num(x))
        iy = _cell_index(self.y_edges_mm, np.nan_to_num(y))
        gain = self.relative_gain[ix, iy]
        inside = ((x >= self.x_edges_mm[0]) & (x < self.x_edges_mm[-1]) & (y >= self.y_edges_mm[0])
                  & (y < self.y_edges_mm[-1]))
        return np.where(inside & np.isfinite(gain), gain, 1.0)

    def correct(self, pulse_height, x_mm, y_mm) -> np.ndarray:
        """Gain-corrected pulse height ``PH / G_rel(x, y)``."""
        return np.asarray(pulse_height, dtype=float) / self.gain_at(x_mm, y_mm)

    def __repr__(self):
        g = self.relative_gain[np.isfinite(self.relative_gain)]
        e = self.relative_gain_err[np.isfinite(self.relative_gain)]
        nx, ny = self.relative_gain.shape
        spread = (f"relative gain {g.min():.3f}–{g.max():.3f} (rms {g.std():.3f}), median error {np.median(e):.4f}"
                  if g.size else "no cell measured")
        quality = self.quality
        if quality is not None and quality.ndof > 0:
            spread += f"; cell fits {quality}" + (f", {self.n_poor_cells} poor cell(s)" if self.n_poor_cells else "")
        cell = np.median(np.diff(self.x_edges_mm))
        return (f"GainMap: {nx} x {ny} cells of {cell:.3g} mm, {self.n_measured} measured "
                f"(>= {self.min_counts} events); reference peak {self.reference_peak:.5g}; {spread}")

    def _repr_html_(self):
        return f"<pre>{html.escape(repr(self))}</pre>"


def fit_gain_map(x_mm, y_mm, pulse_height, *, x_edges_mm, y_edges_mm, min_counts: int = 300,
                 line: str = "fe55", bins: int = 60, fit_range=None, position: str = "centroid") -> GainMap:
    """Fit the line peak in each spatial cell.

    Parameters
    ----------
    x_mm, y_mm, pulse_height : array_like, shape (n,)
        Positions and pulse heights of flat-field events (one line source).
    x_edges_mm, y_edges_mm : array_like
        Cell edges (e.g. :func:`trackfit.analysis.spurious.cell_edges`).
    min_counts : int
        Minimum events in a cell for a fit (common practice: a few hundred).
    line : {"fe55", "gaussian"}
        Line model of the source.
    bins : int
        Histogram bins per cell over the fit range.
    fit_range : (float, float), optional
        Pulse-height range of the fits; default 0.5-1.5 times the global peak.
    position : str
        Recorded in the map (the columns the positions came from).
    """
    if line not in ("fe55", "gaussian"):
        raise ValueError(f"'line' must be 'fe55' or 'gaussian' (got {line!r})")
    if int(min_counts) != min_counts or min_counts < 10:
        raise ValueError(f"'min_counts' must be an integer >= 10 (got {min_counts!r})")
    x = np.asarray(x_mm, dtype=float)
    y = np.asarray(y_mm, dtype=float)
    ph = np.asarray(pulse_height, dtype=float)
    x_edges = np.asarray(x_edges_mm, dtype=float)
    y_edges = np.asarray(y_edges_mm, dtype=float)
    good = np.isfinite(x) & np.isfinite(y) & np.isfinite(ph) & (ph > 0)
    good &= (x >= x_edges[0]) & (x < x_edges[-1]) & (y >= y_edges[0]) & (y < y_edges[-1])
    x, y, ph = x[good], y[good], ph[good]
    if ph.size < min_counts:
        raise ValueError(f"the gain map needs at least min_counts={min_counts} events inside the map "
                         f"(got {ph.size})")
    if fit_range is None:
        first = fit_line(ph, bins=100)  # locate the peak
        fit_range = (0.5 * first.peak, 1.5 * first.peak)
    shape = (x_edges.size - 1, y_edges.size - 1)
    flat = _cell_index(x_edges, x) * shape[1] + _cell_index(y_edges, y)
    counts = np.bincount(flat, minlength=shape[0] * shape[1]).reshape(shape).astype(float)
    order = np.argsort(flat, kind="stable")
    starts = np.searchsorted(flat[order], np.arange(shape[0] * shape[1] + 1))
    cells = np.flatnonzero(counts.ravel() >= min_counts)
    if cells.size == 0:
        cell_mm = float(np.median(np.diff(x_edges)))
        suggested = choose_gain_cell_mm(x, y, min_counts=min_counts)
        raise GainCellError(
            f"no gain-map cell of {cell_mm:g} mm reached min_counts={min_counts} events (the fullest holds "
            f"{int(counts.max())} of {ph.size} events over {np.ptp(x):.3g} x {np.ptp(y):.3g} mm)",
            cell_mm=cell_mm, min_counts=int(min_counts), fullest=int(counts.max()), n_events=int(ph.size),
            suggested_cell_mm=suggested)
    groups = [order[starts[c]:starts[c + 1]] for c in cells]
    grouped = grouped_peaks(ph, groups, line=line, bins=bins, fit_range=fit_range)
    reference = grouped.global_fit.peak
    gain = np.full(shape, np.nan)
    gain_err = np.full(shape, np.nan)
    deviance = np.full(shape, np.nan)
    ndof = np.zeros(shape)
    gain.flat[cells] = grouped.peaks / reference
    gain_err.flat[cells] = grouped.errors / reference
    deviance.flat[cells] = grouped.deviance
    ndof.flat[cells] = grouped.ndof
    return GainMap(x_edges_mm=x_edges, y_edges_mm=y_edges, relative_gain=gain, relative_gain_err=gain_err,
                   counts=counts, reference_peak=float(reference), min_counts=int(min_counts), line=line,
                   position=position, global_fit=grouped.global_fit, cell_deviance=deviance, cell_ndof=ndof)


def choose_gain_cell_mm(x_mm, y_mm, *, min_counts: int = 300, covered_fraction: float = 0.8,
                        candidates=GAIN_CELL_CANDIDATES_MM) -> float | None:
    """The smallest cell size for which most events lie in cells that can be fitted.

    For each candidate (smallest first) the cells are laid out over the positions as
    :func:`~trackfit.analysis.spurious.centred_cell_edges` does; the first candidate that puts at least
    ``covered_fraction`` of the events into cells with at least ``min_counts`` events is returned. With a flat
    field of ``N`` events over an area ``A``, this is a cell of about ``sqrt(A min_counts / N)`` or a little more
    (docs/methods.md §6).

    Returns
    -------
    float or None
        The cell size in mm, or None when even the largest candidate leaves the events below ``min_counts``.
    """
    x = np.asarray(x_mm, dtype=float)
    y = np.asarray(y_mm, dtype=float)
    good = np.isfinite(x) & np.isfinite(y)
    x, y = x[good], y[good]
    if x.size < min_counts:
        return None
    for cell in candidates:
        x_edges, y_edges = centred_cell_edges(x, cell), centred_cell_edges(y, cell)
        counts, _, _ = np.histogram2d(x, y, bins=(x_edges, y_edges))
        if counts[counts >= min_counts].sum() >= covered_fraction * x.size:
            return float(cell)
    return None
