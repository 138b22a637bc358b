"""Photoelectric absorption of X-rays by a column of interstellar gas, for planning observations.

``transmission = exp(-N_H σ(E))`` with ``σ(E) = Σ_Z a_Z σ_Z(E)`` the photoelectric cross section per hydrogen
atom of a gas of solar composition: ``a_Z`` the abundance of element Z relative to hydrogen, ``σ_Z`` its
photoelectric cross section per atom from xraydb (Elam tables, an optional extra: ``pip install "trackfit[xray]"``).
A simplification of the models used in X-ray astronomy (no molecules, no dust grains, no depletion, atoms only),
good to about 10-20 % for planning (``docs/methods.md`` §10).

Examples
--------
>>> from trackfit.interstellar import absorbed_fraction_transmitted
>>> round(float(absorbed_fraction_transmitted(1.0, 1e21)), 3)
0.772
"""

from __future__ import annotations

import functools

import numpy as np

from .simulate.gas import AVOGADRO, require_xraydb

__all__ = ["SOLAR_ABUNDANCES_LOG12", "cross_section_per_hydrogen_cm2", "absorbed_fraction_transmitted"]

#: Abundances by number, log10(N_Z / N_H) + 12 [memory: Anders & Grevesse 1989, photospheric solar values]
SOLAR_ABUNDANCES_LOG12 = {
    "H": 12.00, "He": 10.99, "C": 8.56, "N": 8.05, "O": 8.93, "Ne": 8.09, "Na": 6.33, "Mg": 7.58, "Al": 6.47,
    "Si": 7.55, "S": 7.21, "Cl": 5.50, "Ar": 6.56, "Ca": 6.36, "Cr": 5.67, "Fe": 7.67, "Ni": 6.25,
}


@functools.cache
def _per_atom_table():
    """(ln E grid, ln σ per H atom) on a fine grid with both sides of every edge, tabulated once per process."""
    xraydb = require_xraydb()
    edges = [edge.energy / 1000.0 for symbol in SOLAR_ABUNDANCES_LOG12
             for edge in xraydb.xray_edges(symbol).values()]
    grid = np.geomspace(0.1, 200.0, 4000)
    grid = np.unique(np.concatenate([grid, [e + d for e in edges for d in (-1e-4, 1e-4) if 0.1 < e < 200.0]]))
    sigma = np.zeros_like(grid)
    for symbol, log12 in SOLAR_ABUNDANCES_LOG12.items():
        per_gram = np.asarray(xraydb.mu_elam(symbol, grid * 1000.0, kind="photo"), dtype=np.float64)
        sigma += 10.0 ** (log12 - 12.0) * per_gram * xraydb.atomic_mass(symbol) / AVOGADRO
    return np.log(grid), np.log(sigma)


def cross_section_per_hydrogen_cm2(energy_kev) -> np.ndarray:
    """Photoelectric cross section of solar-composition gas per hydrogen atom, cm², at each energy (0.1-200 keV).

    Raises
    ------
    ValueError
        An energy outside 0.1-200 keV.
    """
    energy = np.asarray(energy_kev, dtype=np.float64)
    bad = ~(np.isfinite(energy) & (energy >= 0.1) & (energy <= 200.0))
    if np.any(bad):
        raise ValueError(f"the absorption cross section is tabulated for 0.1-200 keV (got {energy[bad].flat[0]!r} keV)")
    log_e, log_sigma = _per_atom_table()
    return np.exp(np.interp(np.log(energy), log_e, log_sigma))


def absorbed_fraction_transmitted(energy_kev, column_cm2: float) -> np.ndarray:
    """Fraction of photons that cross a hydrogen column density ``column_cm2`` (atoms per cm²): ``exp(-N_H σ)``.

    Raises
    ------
    ValueError
        A negative or non-finite column.
    """
    column = float(column_cm2)
    if not np.isfinite(column) or column < 0:
        raise ValueError(f"the absorbing column must be a finite number of H atoms per cm² >= 0 (got {column_cm2!r})")
    energy = np.asarray(energy_kev, dtype=np.float64)
    if column == 0:
        return np.ones_like(energy)
    return np.exp(-column * cross_section_per_hydrogen_cm2(energy))
