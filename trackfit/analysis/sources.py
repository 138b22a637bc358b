"""Polarization of laboratory calibration sources.

A Bragg crystal reflecting near 45 degrees polarizes an unpolarized beam (the Thomson factor suppresses the
component in the scattering plane). For a mosaic crystal (Silver et al. 1990; docs/methods.md section 8)::

    P(theta) = (1 - cos^2 2theta) / (1 + cos^2 2theta),     E45 = n hc / (2 d sin 45 deg)

with ``hc = 12.398 keV A``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["HC_KEV_ANGSTROM", "bragg_mosaic_polarization", "bragg_energy_kev", "bragg_angle_rad"]

#: h c in keV x angstrom
HC_KEV_ANGSTROM = 12.398


def bragg_mosaic_polarization(theta_rad) -> np.ndarray:
    """Degree of polarization of an unpolarized beam after Bragg reflection at angle ``theta_rad`` (mosaic crystal).

    Examples
    --------
    >>> round(float(bragg_mosaic_polarization(np.deg2rad(43.26))), 4)
    0.9927
    """
    c2 = np.cos(2 * np.asarray(theta_rad, dtype=float)) ** 2
    return (1 - c2) / (1 + c2)


def bragg_energy_kev(d_angstrom, theta_rad=np.pi / 4, order: int = 1) -> np.ndarray:
    """Energy reflected in order ``order`` by lattice spacing ``d_angstrom`` at angle ``theta_rad`` (default 45 deg)."""
    d = np.asarray(d_angstrom, dtype=float)
    if np.any(d <= 0) or order < 1:
        raise ValueError(f"'d_angstrom' must be > 0 and 'order' >= 1 (got {d_angstrom!r}, {order!r})")
    return order * HC_KEV_ANGSTROM / (2 * d * np.sin(theta_rad))


def bragg_angle_rad(energy_kev, d_angstrom, order: int = 1) -> np.ndarray:
    """Bragg angle for an energy (NaN where the reflection is impossible)."""
    s = order * HC_KEV_ANGSTROM / (2 * np.asarray(d_angstrom, dtype=float) * np.asarray(energy_kev, dtype=float))
    with np.errstate(invalid="ignore"):
        return np.where(s <= 1, np.arcsin(np.clip(s, -1, 1)), np.nan)
