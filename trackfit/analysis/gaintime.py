"""Gain versus time within a run: the line peak in time slices, a smooth model, and the correction.

Slices hold equal numbers of events. The smooth model is either

* ``"charging"``: ``G(t) = G0 [1 - d (1 - exp(-(t - t0)/tau))]``, the approach to equilibrium of a multiplier
  whose dielectric charges up (Kumar et al. 2020 for the phenomenon; this closed form is the constant-rate
  solution of the model in docs/methods.md section 6), fitted with :func:`scipy.optimize.curve_fit`;
* ``"spline"``: a smoothing spline (:class:`scipy.interpolate.UnivariateSpline`, weights 1/error, smoothing =
  number of slices, i.e. chi-square about one per slice).

The model is stored as a dense table of ``(time_s, relative_gain)`` nodes and applied by linear interpolation
(constant beyond the ends). Relative gain is the model over its mean over the run's events.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np
from scipy import interpolate, optimize

from .fitquality import FitQuality, fit_quality
from .gainmap import grouped_peaks
from .spectrum import fit_line

__all__ = ["GainDrift", "fit_gain_drift"]


@dataclass(frozen=True, kw_only=True)
class GainDrift:
    """Relative gain versus time.

    Attributes
    ----------
    node_time_s, node_gain : ndarray
        The smooth model, tabulated (applied by linear interpolation).
    slice_time_s, slice_peak, slice_peak_err : ndarray
        Mean time and fitted peak (pulse-height units) of each time slice.
    reference_peak : float
        Peak that corresponds to relative gain 1.
    model : str
        ``"charging"`` or ``"spline"``.
    parameters : dict
        Parameters of the charging model (empty for the spline).
    chi2 : float
        Chi-square of the slice peaks about the model.
    """

    node_time_s: np.ndarray
    node_gain: np.ndarray
    slice_time_s: np.ndarray = field(default_factory=lambda: np.zeros(0))
    slice_peak: np.ndarray = field(default_factory=lambda: np.zeros(0))
    slice_peak_err: np.ndarray = field(default_factory=lambda: np.zeros(0))
    reference_peak: float = 1.0
    model: str = "spline"
    parameters: dict = field(default_factory=dict)
    chi2: float = float("nan")

    def __post_init__(self):
        t = np.asarray(self.node_time_s, dtype=float)
        g = np.asarray(self.node_gain, dtype=float)
        if t.ndim != 1 or t.shape != g.shape or t.size < 1 or np.any(np.diff(t) <= 0):
            raise ValueError(f"'node_time_s' must be increasing and match 'node_gain' (got shapes {t.shape}, "
                             f"{g.shape})")
        if np.any(~(g > 0)):
            raise ValueError("'node_gain' must be > 0 everywhere")
        object.__setattr__(self, "node_time_s", t)
        object.__setattr__(self, "node_gain", g)
        for name in ("slice_time_s", "slice_peak", "slice_peak_err"):
            object.__setattr__(self, name, np.asarray(getattr(self, name), dtype=float))

    def gain_at(self, time_s) -> np.ndarray:
        """Relative gain at each time (1 for NaN times)."""
        t = np.asarray(time_s, dtype=float)
        return np.where(np.isfinite(t), np.interp(np.nan_to_num(t), self.node_time_s, self.node_gain), 1.0)

    def correct(self, pulse_height, time_s) -> np.ndarray:
        """``PH / G_rel(t)``."""
        return np.asarray(pulse_height, dtype=float) / self.gain_at(time_s)

    @property
    def quality(self) -> FitQuality:
        """Chi-square of the slice peaks about the model against ``slices - 3`` for the charging model (the
        smoothing spline has no fixed number of parameters: not testable)."""
        ndof = self.slice_peak.size - 3 if self.model == "charging" else 0  # g0, depth, tau_s free; t0_s fixed
        return fit_quality(self.chi2, ndof, "chi2")

    def __repr__(self):
        span = f"{self.node_time_s[0]:.4g}–{self.node_time_s[-1]:.4g} s"
        drift = f"{self.node_gain.min():.4f}–{self.node_gain.max():.4f}"
        params = ", ".join(f"{k} = {v:.4g}" for k, v in self.parameters.items())
        return (f"GainDrift ({self.model}{'; ' + params if params else ''}): {self.slice_time_s.size} slices over "
                f"{span}, relative gain {drift}; {self.quality}")

    def _repr_html_(self):
        return f"<pre>{html.escape(repr(self))}</pre>"


def _charging(t, g0, depth, tau, t0):
    return g0 * (1.0 - depth * (1.0 - np.exp(-(t - t0) / tau)))


def fit_gain_drift(time_s, pulse_height, *, n_slices: int = 20, model: str = "charging", line: str = "fe55",
                   bins: int = 60, fit_range=None, n_nodes: int = 200) -> GainDrift:
    """Fit the line peak in time slices of equal counts and a smooth model through them.

    Parameters
    ----------
    time_s, pulse_height : array_like, shape (n,)
        Event times and pulse heights of a run of one line source.
    n_slices : int
        Number of time slices (>= 3; >= 5 for the charging model).
    model : {"charging", "spline"}
        Smooth model (see the module docstring).
    line : {"fe55", "gaussian"}
        Line model.
    fit_range : (float, float), optional
        Pulse-height range of the fits; default 0.5-1.5 times the global peak.
    n_nodes : int
        Points of the tabulated model.
    """
    if model not in ("charging", "spline"):
        raise ValueError(f"'model' must be 'charging' or 'spline' (got {model!r})")
    if line not in ("fe55", "gaussian"):
        raise ValueError(f"'line' must be 'fe55' or 'gaussian' (got {line!r})")
    min_slices = 5 if model == "charging" else 4
    if int(n_slices) != n_slices or n_slices < min_slices:
        raise ValueError(f"'n_slices' must be an integer >= {min_slices} for the {model} model (got {n_slices!r})")
    t = np.asarray(time_s, dtype=float)
    ph = np.asarray(pulse_height, dtype=float)
    good = np.isfinite(t) & np.isfinite(ph) & (ph > 0)
    t, ph = t[good], ph[good]
    if t.size < 50 * n_slices:
        raise ValueError(f"gain versus time needs at least 50 events per slice ({50 * n_slices} for "
                         f"{n_slices} slices; got {t.size})")
    order = np.argsort(t, kind="stable")
    t, ph = t[order], ph[order]
    if fit_range is None:
        fit_range = (0.5 * fit_line(ph, bins=100).peak, 1.5 * fit_line(ph, bins=100).peak)
    slices = np.array_split(np.arange(t.size), int(n_slices))
    peaks, errors = grouped_peaks(ph, slices, line=line, bins=bins, fit_range=fit_range)[:2]
    times = np.array([t[idx].mean() for idx in slices])
    ok = np.isfinite(peaks)
    times, peaks, errors = times[ok], peaks[ok], errors[ok]
    if times.size < min_slices:
        raise ValueError(f"only {times.size} of {n_slices} time slices gave a peak; need {min_slices}")
    grid = np.linspace(t[0], t[-1], int(n_nodes))
    parameters = {}
    if model == "charging":
        t0 = float(t[0])
        p0 = [peaks[0], max(1.0 - peaks[-1] / peaks[0], 1e-3), 0.3 * (t[-1] - t0) + 1e-9]

        def f(tt, g0, depth, tau):
            return _charging(tt, g0, depth, tau, t0)

        try:
            popt, _ = optimize.curve_fit(f, times, peaks, p0=p0, sigma=errors, absolute_sigma=True,
                                         bounds=([0, -1, 1e-9], [np.inf, 1, np.inf]), maxfev=20000)
        except RuntimeError as err:
            raise ValueError(f"the charging model did not converge ({err}); try model='spline'") from None
        parameters = {"g0": float(popt[0]), "depth": float(popt[1]), "tau_s": float(popt[2]), "t0_s": t0}
        curve = f(grid, *popt)
        at_slices = f(times, *popt)
    else:
        spline = interpolate.UnivariateSpline(times, peaks, w=1.0 / errors, s=float(times.size),
                                              k=min(3, times.size - 1))
        curve = spline(grid)  # extrapolates over the outer half slices
        at_slices = spline(times)
    reference = float(np.mean(np.interp(t, grid, curve)))
    chi2 = float(np.sum(((peaks - at_slices) / errors) ** 2))
    return GainDrift(node_time_s=grid, node_gain=curve / reference, slice_time_s=times, slice_peak=peaks,
                     slice_peak_err=errors, reference_peak=reference, model=model, parameters=parameters, chi2=chi2)
