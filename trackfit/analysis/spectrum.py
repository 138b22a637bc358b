"""Pulse-height spectra: Gaussian line fits on a linear background, and the energy scale.

* :func:`fit_line` - one Gaussian line (any calibration source).
* :func:`fit_fe55` - the blended Mn K-alpha / K-beta pair of an Fe-55 source: one common resolution parameter
  (sigma proportional to sqrt(E)), the K-beta centroid fixed at :data:`FE55_KB_KA_RATIO` times the K-alpha one.
* :class:`EnergyScale` - pulse height to energy from one or more fitted lines (linear or quadratic).

Fits use the binned Poisson likelihood of :mod:`trackfit.analysis._fitting` with the Gaussian integrated over
each bin (differences of :func:`scipy.stats.norm.cdf`).
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np
from scipy import special, stats

from ._fitting import fit_binned_poisson
from .fitquality import FitQuality, fit_quality

__all__ = [
    "FE55_LINES_KEV",
    "FE55_INTENSITIES",
    "FE55_KALPHA_KEV",
    "FE55_KBETA_KEV",
    "FE55_KB_KA_RATIO",
    "FWHM_PER_SIGMA",
    "LineFit",
    "fit_line",
    "fit_fe55",
    "EnergyScale",
]

#: Mn K lines emitted after Fe-55 decay, keV (X-ray Data Booklet values; see docs/methods.md section 6)
FE55_LINES_KEV = {"Ka1": 5.89875, "Ka2": 5.88765, "Kb": 6.49045}
#: emission probability per decay, % (same source)
FE55_INTENSITIES = {"Ka1": 16.2, "Ka2": 8.2, "Kb": 2.85}
#: intensity-weighted K-alpha centroid, keV
FE55_KALPHA_KEV = (FE55_LINES_KEV["Ka1"] * FE55_INTENSITIES["Ka1"]
                   + FE55_LINES_KEV["Ka2"] * FE55_INTENSITIES["Ka2"]) / (
    FE55_INTENSITIES["Ka1"] + FE55_INTENSITIES["Ka2"])
FE55_KBETA_KEV = FE55_LINES_KEV["Kb"]
#: K-beta / K-alpha centroid ratio (1.1010)
FE55_KB_KA_RATIO = FE55_KBETA_KEV / FE55_KALPHA_KEV
#: FWHM of a Gaussian in units of sigma, 2 sqrt(2 ln 2)
FWHM_PER_SIGMA = float(2.0 * np.sqrt(2.0 * np.log(2.0)))


def _histogram(values, bins, range_):
    values = np.asarray(values, dtype=float)
    values = values[np.isfinite(values)]
    if values.size == 0:
        raise ValueError("the spectrum is empty: expected finite pulse heights, found none")
    if range_ is None:
        range_ = tuple(np.percentile(values, [0.5, 99.5]))
        if not range_[0] < range_[1]:
            range_ = (range_[0] - 0.5, range_[0] + 0.5)
    counts, edges = np.histogram(values, bins=bins, range=range_)
    return counts.astype(float), edges


def _gauss_integral(edges, mean, sigma):
    return np.diff(special.ndtr((edges - mean) / sigma))


def _linear_background(edges, level, slope):
    """Integral over each bin of ``level + slope * (x - centre_of_range)``, per unit of x."""
    centre = 0.5 * (edges[0] + edges[-1])
    a, b = edges[:-1] - centre, edges[1:] - centre
    return level * (b - a) + 0.5 * slope * (b**2 - a**2)


@dataclass(frozen=True, kw_only=True)
class LineFit:
    """Result of a line fit of a pulse-height spectrum.

    Attributes
    ----------
    peak, peak_err : float
        Centroid of the main line (K-alpha for Fe-55) in the units of the spectrum, and its error.
    fwhm_frac, fwhm_frac_err : float
        FWHM / peak of the main line.
    counts, counts_err : float
        Events in the main line (for Fe-55: K-alpha only; ``counts_kbeta`` has the other).
    counts_kbeta, counts_kbeta_err : float
        Events in the K-beta line (NaN for single-line fits).
    background_level, background_slope : float
        Background density per unit of the spectrum at the centre of the range, and its slope.
    deviance, chi2 : float
        Poisson deviance and Pearson chi-square at the minimum; ``ndof`` degrees of freedom.
    n_events : int
        Entries in the fitted range.
    edges, data, expected : ndarray
        The histogram and the fitted model per bin (for figures).
    model : str
        ``"gaussian"`` or ``"fe55"``.
    """

    model: str
    peak: float
    peak_err: float
    fwhm_frac: float
    fwhm_frac_err: float
    counts: float
    counts_err: float
    counts_kbeta: float = float("nan")
    counts_kbeta_err: float = float("nan")
    background_level: float = 0.0
    background_slope: float = 0.0
    deviance: float
    chi2: float
    ndof: int
    n_events: int
    success: bool
    edges: np.ndarray = field(repr=False)
    data: np.ndarray = field(repr=False)
    expected: np.ndarray = field(repr=False)
    params: np.ndarray = field(repr=False)
    cov: np.ndarray = field(repr=False)

    @property
    def sigma(self) -> float:
        """Gaussian width of the main line."""
        return self.fwhm_frac * self.peak / FWHM_PER_SIGMA

    @property
    def peak_rel_err(self) -> float:
        return self.peak_err / self.peak

    @property
    def quality(self) -> FitQuality:
        """Goodness of fit: the Poisson deviance against ``ndof`` (:mod:`trackfit.analysis.fitquality`)."""
        return fit_quality(self.deviance, self.ndof, "deviance")

    @property
    def background_counts(self) -> float:
        """Events of the fitted background in the fit range (the slope integrates to zero over it)."""
        return float(self.background_level * (self.edges[-1] - self.edges[0]))

    def density(self, x) -> np.ndarray:
        """Fitted model as counts per unit of the spectrum at ``x`` (for smooth curves in figures)."""
        x = np.asarray(x, dtype=float)
        p = self.params
        bkg = p[-2] + p[-1] * (x - 0.5 * (self.edges[0] + self.edges[-1]))
        if self.model == "fe55":
            n_a, mean, res, frac_b = p[:4]
            sig_a = res * mean / FWHM_PER_SIGMA
            out = n_a * stats.norm.pdf(x, mean, sig_a)
            out = out + n_a * frac_b * stats.norm.pdf(x, mean * FE55_KB_KA_RATIO, sig_a * np.sqrt(FE55_KB_KA_RATIO))
        else:
            n, mean, res = p[:3]
            out = n * stats.norm.pdf(x, mean, res * mean / FWHM_PER_SIGMA)
        return out + bkg

    def _rows(self):
        rows = [("peak", f"{self.peak:.5g} ± {self.peak_err:.2g}"),
                ("FWHM/peak", f"{100 * self.fwhm_frac:.2f} % ± {100 * self.fwhm_frac_err:.2f} %"),
                ("counts in line", f"{self.counts:.1f} ± {self.counts_err:.1f}")]
        if self.model == "fe55":
            rows.append(("counts in K-beta", f"{self.counts_kbeta:.1f} ± {self.counts_kbeta_err:.1f}"))
        share = 100.0 * self.background_counts / self.n_events if self.n_events else float("nan")
        rows += [("background in range", f"{self.background_counts:.1f} events ({share:.1f} % of the range)"),
                 ("events in range", f"{self.n_events}"),
                 ("fit quality", str(self.quality)),
                 ("minimiser", "converged" if self.success else "did not converge")]
        return rows

    def __repr__(self):
        title = "Fe-55 K-alpha/K-beta fit" if self.model == "fe55" else "Gaussian line fit"
        return title + "\n" + "\n".join(f"  {k:<22}{v}" for k, v in self._rows())

    def _repr_html_(self):
        body = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>" for k, v in self._rows())
        return f"<table><caption>{html.escape(self.model)} line fit</caption>{body}</table>"


def _start_values(counts, edges):
    centres = 0.5 * (edges[:-1] + edges[1:])
    peak = centres[np.argmax(counts)]
    width = edges[-1] - edges[0]
    edge_level = max(0.5 * (counts[:3].mean() + counts[-3:].mean()), 0.1) / np.diff(edges).mean()
    return peak, width, edge_level


def fit_line(values, *, bins: int = 100, range=None, start_resolution: float = 0.2,  # noqa: A002
             background: bool = True) -> LineFit:
    """Fit one Gaussian line on a linear background to a spectrum.

    Parameters
    ----------
    values : array_like, shape (n,)
        Pulse heights (or energies) of the events.
    bins : int
        Number of histogram bins.
    range : (float, float), optional
        Fit range; default the 0.5-99.5 percentiles.
    start_resolution : float
        Starting FWHM/peak.
    background : bool
        Fit a linear background (otherwise none).

    Returns
    -------
    LineFit
    """
    counts, edges = _histogram(values, bins, range)
    peak0, width, level0 = _start_values(counts, edges)
    total = counts.sum()

    def model(p):
        n, mean, res, level, slope = p
        sigma = max(res * mean / FWHM_PER_SIGMA, 1e-9 * width)
        out = n * _gauss_integral(edges, mean, sigma)
        if background:
            out = out + _linear_background(edges, level, slope)
        return out

    p0 = [max(total - level0 * width, 0.5 * total), peak0, start_resolution, level0 if background else 0.0, 0.0]
    bounds = [(0.0, None), (edges[0], edges[-1]), (1e-4, 5.0), (0.0, None), (None, None)]
    scale = [max(total, 1.0), abs(peak0) or 1.0, 0.1, max(level0, 1e-3), max(level0, 1e-3) / width]
    fixed = () if background else (3, 4)
    fit = fit_binned_poisson(model, counts, p0, bounds=bounds, scale=scale, fixed=fixed)
    return _make_result("gaussian", fit, fit.cov, counts, edges, model, fit.ndof)


def _make_result(kind, fit, cov, counts, edges, model, ndof):
    p = fit.params
    err = np.sqrt(np.clip(np.diag(cov), 0, None))
    expected = model(p)
    extra = {}
    if kind == "fe55":
        n_a, mean, res, frac_b = p[:4]
        var_nb = (frac_b * err[0]) ** 2 + (n_a * err[3]) ** 2 + 2 * frac_b * n_a * cov[0, 3]
        extra = dict(counts_kbeta=float(n_a * frac_b), counts_kbeta_err=float(np.sqrt(max(var_nb, 0.0))))
    else:
        n_a, mean, res = p[:3]
    return LineFit(model=kind, peak=float(mean), peak_err=float(err[1]), fwhm_frac=float(res),
                   fwhm_frac_err=float(err[2]), counts=float(n_a), counts_err=float(err[0]),
                   background_level=float(p[-2]), background_slope=float(p[-1]),
                   deviance=fit.deviance, chi2=fit.chi2, ndof=int(ndof),
                   n_events=int(counts.sum()), success=fit.success, edges=edges, data=counts,
                   expected=expected, params=p, cov=cov, **extra)


def fit_fe55(values, *, bins: int = 100, range=None, start_resolution: float = 0.2,  # noqa: A002
             kbeta_fraction: float | None = None, background: bool = True) -> LineFit:
    """Fit the blended Mn K-alpha / K-beta lines of an Fe-55 source.

    Model: ``N_a G(x; m, s) + N_a f_b G(x; 1.1010 m, s sqrt(1.1010)) + linear background``, with
    ``s = r m / 2.3548`` (``r`` = FWHM/E at K-alpha, common to both lines through sigma proportional to sqrt(E)).

    Parameters
    ----------
    values : array_like
        Pulse heights (or energies).
    bins, range, start_resolution, background
        As in :func:`fit_line`.
    kbeta_fraction : float, optional
        Fix the K-beta/K-alpha count ratio ``f_b`` (e.g. 2.85/24.4 times the detection-efficiency ratio);
        default: a free parameter in [0, 0.5].

    Returns
    -------
    LineFit
        ``peak`` is the K-alpha centroid (5.895 keV).

    References
    ----------
    Line energies and intensities: X-ray Data Booklet (docs/methods.md section 6).
    """
    counts, edges = _histogram(values, bins, range)
    peak0, width, level0 = _start_values(counts, edges)
    total = counts.sum()
    fixed_fb = kbeta_fraction is not None
    if fixed_fb and not 0 <= kbeta_fraction < 1:
        raise ValueError(f"'kbeta_fraction' must be in [0, 1) (got {kbeta_fraction!r})")

    def model(p):
        n_a, mean, res, frac_b, level, slope = p
        sig_a = max(res * mean / FWHM_PER_SIGMA, 1e-9 * width)
        out = n_a * (_gauss_integral(edges, mean, sig_a)
                     + frac_b * _gauss_integral(edges, mean * FE55_KB_KA_RATIO, sig_a * np.sqrt(FE55_KB_KA_RATIO)))
        if background:
            out = out + _linear_background(edges, level, slope)
        return out

    fb0 = kbeta_fraction if fixed_fb else 0.1
    p0 = [0.8 * total, peak0, start_resolution, fb0, level0 if background else 0.0, 0.0]
    bounds = [(0.0, None), (edges[0], edges[-1]), (1e-4, 5.0), (0.0, 0.5), (0.0, None), (None, None)]
    scale = [max(total, 1.0), abs(peak0) or 1.0, 0.1, 0.1, max(level0, 1e-3), max(level0, 1e-3) / width]
    fixed = ((3,) if fixed_fb else ()) + (() if background else (4, 5))
    fit = fit_binned_poisson(model, counts, p0, bounds=bounds, scale=scale, fixed=fixed)
    return _make_result("fe55", fit, fit.cov, counts, edges, model, fit.ndof)


@dataclass(frozen=True, kw_only=True)
class EnergyScale:
    """Energy from (gain-corrected) pulse height: ``E = c0 + c1 PH (+ c2 PH^2)``.

    Build it with :meth:`from_lines`; apply it with :meth:`energy_kev`.

    Attributes
    ----------
    coefficients : tuple of float
        ``(c0, c1[, c2])``, lowest order first.
    line_pulse_heights, line_energies_kev : tuple of float
        The lines it was made from.
    """

    coefficients: tuple[float, ...]
    line_pulse_heights: tuple[float, ...] = ()
    line_energies_kev: tuple[float, ...] = ()

    def __post_init__(self):
        coefficients = tuple(float(c) for c in self.coefficients)
        if len(coefficients) not in (2, 3):
            raise ValueError(f"'coefficients' must have 2 (linear) or 3 (quadratic) entries (got {coefficients})")
        object.__setattr__(self, "coefficients", coefficients)

    @property
    def degree(self) -> int:
        return len(self.coefficients) - 1

    @classmethod
    def from_lines(cls, pulse_heights, energies_kev, *, degree: int = 1, pulse_height_errors=None,
                   through_origin: bool | None = None) -> EnergyScale:
        """Fit the scale to lines of known energy.

        Parameters
        ----------
        pulse_heights, energies_kev : array_like, shape (k,)
            Fitted line positions and their energies.
        degree : {1, 2}
            Linear or quadratic.
        pulse_height_errors : array_like, optional
            Errors of the line positions (weights of the fit).
        through_origin : bool, optional
            Force ``c0 = 0``; default: only when there are too few lines for a free offset (one line, linear).
        """
        ph = np.atleast_1d(np.asarray(pulse_heights, dtype=float))
        energy = np.atleast_1d(np.asarray(energies_kev, dtype=float))
        if degree not in (1, 2):
            raise ValueError(f"'degree' must be 1 or 2 (got {degree!r})")
        if ph.shape != energy.shape or ph.size == 0:
            raise ValueError(f"expected as many pulse heights as energies, >= 1 (got {ph.size} and {energy.size})")
        if through_origin is None:
            through_origin = ph.size < degree + 1
        n_free = degree + (0 if through_origin else 1)
        if ph.size < n_free:
            raise ValueError(f"a degree-{degree} energy scale needs at least {n_free} lines (got {ph.size})")
        weights = np.ones_like(ph) if pulse_height_errors is None else 1.0 / np.asarray(pulse_height_errors, float)
        powers = range(0 if not through_origin else 1, degree + 1)
        design = np.column_stack([ph**k for k in powers]) * weights[:, None]
        solution, *_ = np.linalg.lstsq(design, energy * weights, rcond=None)
        coefficients = ([0.0] if through_origin else []) + list(solution)
        return cls(coefficients=tuple(coefficients), line_pulse_heights=tuple(ph), line_energies_kev=tuple(energy))

    def energy_kev(self, pulse_height) -> np.ndarray:
        """Energy for each (gain-corrected) pulse height."""
        return np.polynomial.polynomial.polyval(np.asarray(pulse_height, dtype=float), self.coefficients)

    def __repr__(self):
        terms = " + ".join(f"{c:.6g}·PH^{k}" if k else f"{c:.6g}" for k, c in enumerate(self.coefficients))
        lines = ", ".join(f"{p:.4g}→{e:.4g} keV" for p, e in zip(self.line_pulse_heights, self.line_energies_kev,
                                                               strict=True))
        return f"EnergyScale(E/keV = {terms}; lines: {lines or 'none'})"

    def _repr_html_(self):
        return f"<pre>{html.escape(repr(self))}</pre>"
