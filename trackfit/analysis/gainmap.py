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

import numpy as np

from .spectrum import LineFit, fit_fe55, fit_line
from .spurious import _cell_index

__all__ = ["GainMap", "fit_gain_map", "grouped_peaks"]

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
    peaks, errors : ndarray, shape (len(groups),)
    global_fit : LineFit
        Fit of all grouped events after the pass-1 correction to the median group; its peak (about the median
        group peak) is the reference of relative gains.
    """
    ph = np.asarray(pulse_height, dtype=float)

    def fit_all(kbeta, resolution):
        peaks = np.full(len(groups), np.nan)
        errors = np.full(len(groups), np.nan)
        for k, idx in enumerate(groups):
            if line == "fe55":
                fit = fit_fe55(ph[idx], bins=bins, range=fit_range, kbeta_fraction=kbeta,
                               start_resolution=resolution)
            else:
                fit = fit_line(ph[idx], bins=bins, range=fit_range, start_resolution=resolution)
            if fit.success and np.isfinite(fit.peak_err) and fit.peak_err > 0:
                peaks[k], errors[k] = fit.peak, fit.peak_err
        return peaks, errors

    peaks, errors = fit_all(NOMINAL_KBETA_FRACTION, 0.2)
    ok = np.isfinite(peaks)
    if not ok.any():
        raise ValueError(f"no group gave a {line} peak in the range {fit_range} ({len(groups)} groups)")
    scale = np.median(peaks[ok])
    corrected = np.concatenate([ph[idx] * scale / peaks[k] for k, idx in enumerate(groups) if ok[k]])
    fitter = fit_fe55 if line == "fe55" else fit_line
    global_fit = fitter(corrected, bins=2 * bins, range=fit_range)
    if line == "fe55":
        kbeta = global_fit.counts_kbeta / max(global_fit.counts, 1e-12)
        peaks, errors = fit_all(kbeta, global_fit.fwhm_frac)
    return peaks, errors, global_fit



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
        return (f"GainMap: {nx} x {ny} cells of {np.diff(self.x_edges_mm).mean():.3g} mm, {self.n_measured} measured "
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
    groups = [order[starts[c]:starts[c + 1]] for c in cells]
    peaks, errors, global_fit = grouped_peaks(ph, groups, line=line, bins=bins, fit_range=fit_range)
    reference = global_fit.peak
    gain = np.full(shape, np.nan)
    gain_err = np.full(shape, np.nan)
    gain.flat[cells] = peaks / reference
    gain_err.flat[cells] = errors / reference
    return GainMap(x_edges_mm=x_edges, y_edges_mm=y_edges, relative_gain=gain, relative_gain_err=gain_err,
                   counts=counts, reference_peak=float(reference), min_counts=int(min_counts), line=line,
                   position=position, global_fit=global_fit)
