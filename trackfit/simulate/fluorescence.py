"""Fluorescence photons through the gas: where a K photon emitted at the conversion point goes.

When the absorbing atom relaxes by fluorescence (probability ω_K, xraydb's fluorescence yields), the photon
leaves the conversion point in an isotropic direction and travels an exponential distance with the gas's
photoabsorption coefficient at its energy (xraydb Elam cross sections, the same tables as the conversion). Then:

* it crosses the window plane (z = gap) or the multiplier plane (z = 0) first: it leaves the cell and its energy
  is lost (the escape peak);
* it is absorbed in the gas above the chip: its energy becomes a second electron cloud at the absorption point
  (the absorption makes a photoelectron of ~ the photon's energy whose range, tens of µm for Ar K photons, is
  small against the diffusion of its charge; it is deposited as a point), which the readout sees as a second
  cluster of the same event, or as the only cluster when the main track did not reach the trigger;
* it is absorbed in the gas beyond the chip edges (the gas is modelled as a laterally infinite slab): its
  charge drifts beside the chip and no pixel collects it (near an edge, the part of the cloud that diffuses
  onto the chip is seen).

Scattering of the fluorescence photon (coherent and Compton, ~2 % of the attenuation of Ar K photons in
argon) is neglected.

References
----------
Beer-Lambert absorption with Elam, Ravel & Sieber 2002, Radiat. Phys. Chem. 63, 121 (via xraydb). The escape
probability of a slab, ½·E₂(μz) per face: docs/simulator.md (Fluorescence).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .physics import isotropic_directions

__all__ = ["FLUORESCENCE_FATES", "FluorescencePaths", "track_fluorescence"]

#: ``fluorescence_fate`` codes of the truth: index into this tuple (run attribute ``fluorescence_fates``)
FLUORESCENCE_FATES = ("none", "absorbed", "window", "multiplier", "beyond_chip")
NONE, ABSORBED, WINDOW, MULTIPLIER, BEYOND_CHIP = range(len(FLUORESCENCE_FATES))


@dataclass(frozen=True)
class FluorescencePaths:
    """Where the fluorescence photons went (arrays of the length of the photon batch).

    Attributes
    ----------
    fate : ndarray of int8
        Code into :data:`FLUORESCENCE_FATES`.
    x_mm, y_mm, z_mm : ndarray
        Absorption point (``absorbed``, ``beyond_chip``) or the point where the photon crossed the window or
        multiplier plane; NaN when there was no fluorescence photon.
    deposit_kev : ndarray
        Energy deposited in the gas at the absorption point (the photon energy when ``absorbed`` or
        ``beyond_chip``, else 0).
    """

    fate: np.ndarray
    x_mm: np.ndarray
    y_mm: np.ndarray
    z_mm: np.ndarray
    deposit_kev: np.ndarray


def track_fluorescence(x_mm, y_mm, height_mm, energy_kev, mixture, grid, rng) -> FluorescencePaths:
    """Follow fluorescence photons from their emission points to absorption or escape.

    Parameters
    ----------
    x_mm, y_mm, height_mm : array_like, shape (n,)
        Emission points (the conversion points; height above the multiplier).
    energy_kev : array_like, shape (n,)
        Photon energies; 0 where there is no fluorescence photon (nothing is drawn for those).
    mixture : GasMixture
        The gas (absorption coefficient and gap).
    grid : HexGrid
        The chip: photons absorbed outside it give charge that no pixel collects.
    rng : numpy.random.Generator

    Returns
    -------
    FluorescencePaths
    """
    energy_kev = np.asarray(energy_kev, dtype=np.float64)
    n = energy_kev.size
    fate = np.zeros(n, dtype=np.int8)
    position = np.full((n, 3), np.nan)
    deposit = np.zeros(n)
    emitted = np.flatnonzero(energy_kev > 0)
    if emitted.size:
        e = energy_kev[emitted]
        start = np.column_stack([np.asarray(x_mm, dtype=np.float64)[emitted],
                                 np.asarray(y_mm, dtype=np.float64)[emitted],
                                 np.asarray(height_mm, dtype=np.float64)[emitted]])
        direction = isotropic_directions(emitted.size, rng)
        distance_mm = rng.exponential(1.0, emitted.size) / mixture.absorption_per_cm(e) * 10.0
        gap_mm = mixture.gap_cm * 10.0
        # distance to the plane the photon is heading for (window above, multiplier below)
        uz = direction[:, 2]
        with np.errstate(divide="ignore"):
            to_plane = np.where(uz > 0, (gap_mm - start[:, 2]) / uz, np.where(uz < 0, -start[:, 2] / uz, np.inf))
        escapes = distance_mm >= to_plane
        travelled = np.where(escapes, to_plane, distance_mm)
        end = start + direction * travelled[:, None]
        end[escapes, 2] = np.where(uz[escapes] > 0, gap_mm, 0.0)
        code = np.where(escapes, np.where(uz > 0, WINDOW, MULTIPLIER), ABSORBED).astype(np.int8)
        column, row = grid.nearest_pixel(end[:, 0], end[:, 1])
        code[(code == ABSORBED) & ~grid.contains(column, row)] = BEYOND_CHIP
        fate[emitted] = code
        position[emitted] = end
        deposit[emitted] = np.where((code == ABSORBED) | (code == BEYOND_CHIP), e, 0.0)
    return FluorescencePaths(fate=fate, x_mm=position[:, 0], y_mm=position[:, 1], z_mm=position[:, 2],
                             deposit_kev=deposit)
