"""Modulation curve: histogram of emission angles and the fit of ``A + B cos^2(phi - phi0)``.

The curve ``N(phi) = A + B cos^2(phi - phi0)`` (Strohmayer & Kallman 2013) is rewritten as
``(N/2pi) [1 + c cos 2phi + s sin 2phi]`` with ``m = sqrt(c^2 + s^2)`` and ``phi0 = atan2(s, c) / 2``, integrated
exactly over each bin, and fitted by binned Poisson likelihood (weighted histograms: least squares with the sum of
squared weights as variance). The (c, s) parametrisation is regular at ``m = 0``.

Use the unbinned Stokes analysis (:func:`trackfit.analysis.stokes_parameters`) for the polarization itself; the
binned fit is a cross-check and a figure.
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from ._fitting import fit_binned_poisson
from .fitquality import FitQuality, fit_quality

__all__ = ["ModulationFit", "modulation_curve", "AngleHistogram", "angle_histogram", "fit_angle_histogram"]


def _bin_integrals(edges):
    """Integrals over each bin of 1, cos 2phi and sin 2phi."""
    a, b = edges[:-1], edges[1:]
    return b - a, 0.5 * (np.sin(2 * b) - np.sin(2 * a)), -0.5 * (np.cos(2 * b) - np.cos(2 * a))


@dataclass(frozen=True, kw_only=True)
class ModulationFit:
    """Fit of a modulation curve.

    Attributes
    ----------
    modulation, modulation_err : float
        ``m = (N_max - N_min)/(N_max + N_min) = B/(2A + B)`` and its error.
    phase_rad, phase_err_rad : float
        ``phi0`` in (-pi/2, pi/2] and its error.
    a, b : float
        ``A`` and ``B`` of ``A + B cos^2(phi - phi0)`` in events per radian.
    n_fit, n_fit_err : float
        Fitted total number of events (sum of weights for weighted curves).
    chi2, ndof : float, int
        Pearson chi-square of the fit and its degrees of freedom (``n_bins - 3``).
    edges, counts, variances : ndarray
        The histogram (``variances`` = sum of squared weights per bin).
    """

    modulation: float
    modulation_err: float
    phase_rad: float
    phase_err_rad: float
    a: float
    b: float
    n_fit: float
    n_fit_err: float
    chi2: float
    ndof: int
    weighted: bool
    success: bool
    edges: np.ndarray = field(repr=False)
    counts: np.ndarray = field(repr=False)
    variances: np.ndarray = field(repr=False)
    cov: np.ndarray = field(repr=False)

    @property
    def p_value(self) -> float:
        from scipy import stats

        return float(stats.chi2.sf(self.chi2, self.ndof))

    @property
    def quality(self) -> FitQuality:
        """Goodness of fit: the chi-square against ``ndof`` (:mod:`trackfit.analysis.fitquality`)."""
        return fit_quality(self.chi2, self.ndof, "chi2")

    def density(self, phi_rad) -> np.ndarray:
        """Fitted curve in events per radian."""
        return self.a + self.b * np.cos(np.asarray(phi_rad) - self.phase_rad) ** 2

    def expected_counts(self) -> np.ndarray:
        one, cos2, sin2 = _bin_integrals(self.edges)
        c = self.modulation * np.cos(2 * self.phase_rad)
        s = self.modulation * np.sin(2 * self.phase_rad)
        return self.n_fit / (2 * np.pi) * (one + c * cos2 + s * sin2)

    def _rows(self):
        return [("modulation", f"{self.modulation:.5f} ± {self.modulation_err:.5f}"),
                ("phase", f"{np.rad2deg(self.phase_rad):.2f}° ± {np.rad2deg(self.phase_err_rad):.2f}°"),
                ("A, B (per rad)", f"{self.a:.6g}, {self.b:.6g}"),
                ("events (fit)", f"{self.n_fit:.6g} ± {self.n_fit_err:.3g}"),
                ("fit quality", str(self.quality)),
                ("bins", f"{self.counts.size}{' (weighted)' if self.weighted else ''}")]

    def __repr__(self):
        return "Modulation curve fit: A + B cos²(φ − φ0)\n" + "\n".join(f"  {k:<16}{v}" for k, v in self._rows())

    def _repr_html_(self):
        body = "".join(f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>" for k, v in self._rows())
        return f"<table><caption>modulation curve fit</caption>{body}</table>"


def modulation_curve(angles_rad, *, n_bins: int = 36, weights=None) -> ModulationFit:
    """Histogram emission angles over (-pi, pi] and fit ``A + B cos^2(phi - phi0)``.

    Parameters
    ----------
    angles_rad : array_like, shape (n,)
        Emission angles (NaN entries are dropped).
    n_bins : int
        Number of bins over 2 pi; must be a multiple of 12 so that the 6-fold harmonics of the hexagonal grid
        are orthogonal to cos 2phi (docs/methods.md section 1).
    weights : array_like, shape (n,), optional
        Per-event weights; the fit is then a least-squares fit with variance = sum of squared weights.

    Returns
    -------
    ModulationFit

    Raises
    ------
    ValueError
        If ``n_bins`` is not a positive multiple of 12, or fewer than 2 events are usable.
    """
    histogram = angle_histogram(angles_rad, n_bins=n_bins, weights=weights)
    if histogram.n_events < 2:
        raise ValueError(f"a modulation curve needs at least 2 events with a finite angle (got "
                         f"{histogram.n_events})")
    return fit_angle_histogram(histogram)


@dataclass(frozen=True)
class AngleHistogram:
    """Histogram of emission angles over [-pi, pi): counts (sums of weights) and variances (sums of squared
    weights) per bin, and the events in it. Histograms of the same binning add (``+``), so a modulation curve of
    many runs is fitted from the sum of their histograms (:func:`fit_angle_histogram`)."""

    edges: np.ndarray
    counts: np.ndarray
    variances: np.ndarray
    n_events: int
    weighted: bool

    def __add__(self, other: AngleHistogram) -> AngleHistogram:
        if not isinstance(other, AngleHistogram):
            return NotImplemented
        if self.edges.shape != other.edges.shape or self.weighted != other.weighted:
            raise ValueError("only histograms with the same bins and weighting add")
        return AngleHistogram(self.edges, self.counts + other.counts, self.variances + other.variances,
                              self.n_events + other.n_events, self.weighted)


def angle_histogram(angles_rad, *, n_bins: int = 36, weights=None) -> AngleHistogram:
    """The histogram :func:`modulation_curve` fits (NaN angles and weights dropped)."""
    if isinstance(n_bins, bool) or int(n_bins) != n_bins or n_bins < 12 or n_bins % 12:
        raise ValueError(f"'n_bins' must be a positive multiple of 12 (got {n_bins!r})")
    angles = np.asarray(angles_rad, dtype=float)
    good = np.isfinite(angles)
    w = None
    if weights is not None:
        w = np.asarray(weights, dtype=float)
        if w.shape != angles.shape:
            raise ValueError(f"'weights' must have the shape of the angles {angles.shape} (got {w.shape})")
        good &= np.isfinite(w)
        w = w[good]
    angles = angles[good]
    wrapped = np.mod(angles + np.pi, 2 * np.pi) - np.pi  # [-pi, pi)
    edges = np.linspace(-np.pi, np.pi, int(n_bins) + 1)
    counts, _ = np.histogram(wrapped, bins=edges, weights=w)
    variances = counts.copy() if w is None else np.histogram(wrapped, bins=edges, weights=w**2)[0]
    return AngleHistogram(edges, counts, variances, int(angles.size), w is not None)


def fit_angle_histogram(histogram: AngleHistogram) -> ModulationFit:
    """Fit ``A + B cos^2(phi - phi0)`` to a histogram (as :func:`modulation_curve` does)."""
    edges, counts, variances = histogram.edges, histogram.counts, histogram.variances
    n_bins = counts.size
    w = True if histogram.weighted else None
    one, cos2, sin2 = _bin_integrals(edges)
    total = counts.sum()

    def model(p):
        n, c, s = p
        return n / (2 * np.pi) * (one + c * cos2 + s * sin2)

    # linear least squares gives the start values (and the answer for weighted curves)
    design = np.column_stack([one, cos2, sin2]) / (2 * np.pi)
    p_lin = np.linalg.lstsq(design, counts, rcond=None)[0]
    start = np.array([p_lin[0], p_lin[1] / p_lin[0], p_lin[2] / p_lin[0]])
    if w is None:
        fit = fit_binned_poisson(model, counts, start, scale=[max(total, 1.0), 0.1, 0.1])
        params, cov, success = fit.params, fit.cov, fit.success
        expected = model(params)
        chi2 = float(np.sum((counts - expected) ** 2 / np.maximum(expected, 1e-12)))
    else:
        sigma = np.sqrt(np.where(variances > 0, variances, np.max(variances[variances > 0], initial=1.0)))
        res = optimize.least_squares(lambda p: (model(p) - counts) / sigma, start, method="lm")
        params = res.x
        jac = res.jac
        cov = np.linalg.pinv(jac.T @ jac)
        success = bool(res.success)
        chi2 = float(np.sum(res.fun**2))
    n, c, s = params
    m = float(np.hypot(c, s))
    phase = 0.5 * np.arctan2(s, c)
    if phase <= -np.pi / 2:
        phase += np.pi
    # propagate (c, s) -> (m, phi0)
    cs = cov[1:, 1:]
    if m > 0:
        jm = np.array([c, s]) / m
        jp = 0.5 * np.array([-s, c]) / m**2
        m_err = float(np.sqrt(max(jm @ cs @ jm, 0.0)))
        p_err = float(np.sqrt(max(jp @ cs @ jp, 0.0)))
    else:
        m_err, p_err = float(np.sqrt(max(cs[0, 0], 0.0))), float("nan")
    a = n * (1 - m) / (2 * np.pi)
    b = n * m / np.pi
    return ModulationFit(modulation=m, modulation_err=m_err, phase_rad=float(phase), phase_err_rad=p_err,
                         a=float(a), b=float(b), n_fit=float(n), n_fit_err=float(np.sqrt(max(cov[0, 0], 0.0))),
                         chi2=chi2, ndof=int(n_bins) - 3, weighted=w is not None, success=success,
                         edges=edges, counts=counts, variances=variances, cov=cov)
