"""Modulation factor versus energy, from 100 %-polarized calibration (or simulated) runs.

Measure each run with :func:`measure_modulation_factor` (same cuts and weights as the science analysis), then
fit a smooth curve with :func:`fit_modulation_factor_curve`; the :class:`ModulationFactorCurve` gives the
per-event modulation factor ``curve(energy_kev)`` used by :func:`trackfit.analysis.stokes_parameters`.

The curve is a weighted least-squares polynomial in ``ln E`` (degree up to 2 by default, lower when fewer
points), evaluated with the energy clamped to the measured range (no extrapolation).
"""

from __future__ import annotations

import html
from dataclasses import dataclass

import numpy as np

from .fitquality import FitQuality, fit_quality
from .stokes import StokesResult, stokes_sums

__all__ = ["ModulationFactorPoint", "ModulationFactorCurve", "measure_modulation_factor",
           "fit_modulation_factor_curve"]


@dataclass(frozen=True, kw_only=True)
class ModulationFactorPoint:
    """Modulation factor measured at one energy.

    Attributes
    ----------
    energy_kev : float
        Mean (weighted) energy of the selected events.
    value, error : float
        Modulation factor and its error.
    n_events : int
    """

    energy_kev: float
    value: float
    error: float
    n_events: int


def measure_modulation_factor(angles_rad, energy_kev, *, polarization_degree: float = 1.0,
                              polarization_angle_rad: float | None = None, weights=None,
                              spurious_q=None, spurious_u=None, extra_variance=(0.0, 0.0)) -> ModulationFactorPoint:
    """Modulation factor of one polarized run: the measured modulation divided by the beam's degree.

    With a known polarization angle the modulation is the projection ``Q cos 2psi + U sin 2psi`` (unbiased);
    otherwise ``sqrt(Q^2 + U^2)`` (biased high by about ``sigma^2/(2 m)``, negligible for calibration runs).

    Parameters
    ----------
    angles_rad, energy_kev : array_like, shape (n,)
        Emission angles and energies of the selected events.
    polarization_degree : float
        Degree of the beam, in (0, 1].
    polarization_angle_rad : float, optional
        Angle of the beam in the detector frame.
    weights, spurious_q, spurious_u : array_like, optional
        As in :func:`trackfit.analysis.stokes_parameters`.
    extra_variance : (float, float)
        Variance of the Q and U sums from other sources than counting, e.g. the errors of a subtracted spurious
        map (:meth:`trackfit.analysis.SpuriousMap.sum_variance` with coefficients ``2 w``).
    """
    if not 0 < polarization_degree <= 1:
        raise ValueError(f"'polarization_degree' must be in (0, 1] (got {polarization_degree!r})")
    phi = np.asarray(angles_rad, dtype=float)
    energy = np.asarray(energy_kev, dtype=float)
    sums = stokes_sums(phi, modulation_factor=1.0, weights=weights, spurious_q=spurious_q, spurious_u=spurious_u)
    result = StokesResult.from_sums(sums.with_extra_variance(*extra_variance), confidence_level=None)
    if polarization_angle_rad is None:
        value, error = result.degree, result.degree_err
    else:
        c, s = np.cos(2 * polarization_angle_rad), np.sin(2 * polarization_angle_rad)
        value = c * result.q + s * result.u
        error = float(np.sqrt(max(c * c * result.q_err**2 + s * s * result.u_err**2 + 2 * c * s * result.qu_cov,
                                  0.0)))
    good = np.isfinite(phi) & np.isfinite(energy)
    w = np.ones(phi.size) if weights is None else np.asarray(weights, dtype=float)
    good &= np.isfinite(w)
    mean_energy = float(np.average(energy[good], weights=w[good])) if np.any(good) and w[good].sum() > 0 else np.nan
    return ModulationFactorPoint(energy_kev=mean_energy, value=float(value) / polarization_degree,
                                 error=float(error) / polarization_degree, n_events=result.n_events)


@dataclass(frozen=True, kw_only=True)
class ModulationFactorCurve:
    """Smooth modulation factor versus energy: ``mu(E) = sum_k c_k (ln E)^k``, E clamped to the fitted range.

    Attributes
    ----------
    coefficients : tuple of float
        Polynomial coefficients in ``ln(E / keV)``, lowest order first.
    energy_range_kev : (float, float)
        Range of the measured points (evaluation clamps to it).
    points_energy_kev, points_value, points_error : tuple of float
        The measured points.
    """

    coefficients: tuple[float, ...]
    energy_range_kev: tuple[float, float]
    points_energy_kev: tuple[float, ...] = ()
    points_value: tuple[float, ...] = ()
    points_error: tuple[float, ...] = ()

    def __post_init__(self):
        lo, hi = (float(v) for v in self.energy_range_kev)
        if not (0 < lo <= hi):
            raise ValueError(f"'energy_range_kev' must satisfy 0 < low <= high (got {self.energy_range_kev})")
        object.__setattr__(self, "energy_range_kev", (lo, hi))
        object.__setattr__(self, "coefficients", tuple(float(c) for c in self.coefficients))

    def __call__(self, energy_kev) -> np.ndarray:
        """Modulation factor at each energy (NaN for NaN energies), clipped to [1e-3, 1]."""
        energy = np.asarray(energy_kev, dtype=float)
        clamped = np.clip(energy, *self.energy_range_kev)
        value = np.polynomial.polynomial.polyval(np.log(clamped), self.coefficients)
        return np.where(np.isfinite(energy), np.clip(value, 1e-3, 1.0), np.nan)

    def error(self, energy_kev) -> np.ndarray:
        """Standard error of the curve at each energy, from the errors of the measured points (weighted least
        squares covariance ``(A^T W A)^-1``); the curve is exact only if its functional form is."""
        energy = np.clip(np.asarray(energy_kev, dtype=float), *self.energy_range_kev)
        x_pts = np.log(np.asarray(self.points_energy_kev, dtype=float))
        err = np.asarray(self.points_error, dtype=float)
        degree = len(self.coefficients) - 1
        if x_pts.size == 0:
            return np.full(energy.shape, np.nan)
        design = np.column_stack([x_pts**k for k in range(degree + 1)]) / err[:, None]
        cov = np.linalg.pinv(design.T @ design)
        basis = np.stack([np.log(energy) ** k for k in range(degree + 1)], axis=-1)
        return np.sqrt(np.einsum("...i,ij,...j->...", basis, cov, basis))

    def residuals(self) -> np.ndarray:
        """(measured - curve) / error at the measured points."""
        return (np.asarray(self.points_value) - self(self.points_energy_kev)) / np.asarray(self.points_error)

    @property
    def quality(self) -> FitQuality:
        """Chi-square of the measured points about the curve against ``n_points - n_coefficients`` (not testable
        when the curve has as many coefficients as points)."""
        residuals = self.residuals()
        return fit_quality(float(np.sum(residuals**2)), len(residuals) - len(self.coefficients), "chi2")

    def __repr__(self):
        order = len(self.coefficients) - 1
        form = "constant" if order == 0 else f"polynomial of order {order} in ln E"
        quality = self.quality
        lines = [f"ModulationFactorCurve: {form} through {len(self.points_value)} point(s), "
                 f"{self.energy_range_kev[0]:g}–{self.energy_range_kev[1]:g} keV"
                 + (f"; {quality}" if quality.ndof > 0 else "")]
        lines.append(f"  {'E (keV)':>9}{'measured':>12}{'error':>9}{'curve':>9}")
        for e, v, s in zip(self.points_energy_kev, self.points_value, self.points_error, strict=True):
            lines.append(f"  {e:>9.3f}{v:>12.4f}{s:>9.4f}{float(self(e)):>9.4f}")
        return "\n".join(lines)

    def _repr_html_(self):
        return f"<pre>{html.escape(repr(self))}</pre>"


def fit_modulation_factor_curve(points, *, degree: int | None = None) -> ModulationFactorCurve:
    """Fit a smooth curve through measured modulation factors.

    Parameters
    ----------
    points : sequence of ModulationFactorPoint
        At least one point (one point gives a constant).
    degree : int, optional
        Polynomial degree in ``ln E``; default ``min(2, n_points - 1)``.
    """
    points = sorted(points, key=lambda p: p.energy_kev)
    if not points:
        raise ValueError("a modulation-factor curve needs at least one measured point (got none)")
    energy = np.array([p.energy_kev for p in points])
    value = np.array([p.value for p in points])
    error = np.array([p.error for p in points])
    if np.any(~np.isfinite(energy) | (energy <= 0)) or np.any(~(error > 0)):
        raise ValueError(f"measured points need energies > 0 and errors > 0 (got energies {energy.tolist()}, "
                         f"errors {error.tolist()})")
    if degree is None:
        degree = min(2, len(np.unique(energy)) - 1)
    if not 0 <= degree < len(np.unique(energy)):
        raise ValueError(f"'degree' must be in [0, {len(np.unique(energy)) - 1}] for {len(points)} points "
                         f"(got {degree})")
    x = np.log(energy)
    design = np.column_stack([x**k for k in range(degree + 1)]) / error[:, None]
    coefficients = np.linalg.lstsq(design, value / error, rcond=None)[0]
    return ModulationFactorCurve(coefficients=tuple(coefficients), energy_range_kev=(energy.min(), energy.max()),
                                 points_energy_kev=tuple(energy), points_value=tuple(value),
                                 points_error=tuple(error))
