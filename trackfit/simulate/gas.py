"""Gas mixtures and windows: densities, photoabsorption, shells, stopping and scattering constants.

Photoelectric cross sections come from ``xraydb`` (Elam tables, an optional extra: ``pip install
"trackfit[xray]"``). xraydb is slow per call, so every element (and window material) is tabulated once per process
on a fixed logarithmic energy grid with points on both sides of each absorption edge, and later look-ups are
log-log interpolations (:func:`element_photo_cm2_g`).

References
----------
Elam, Ravel & Sieber 2002, Radiat. Phys. Chem. 63, 121 (the cross sections and edges behind xraydb).
Joy & Luo 1989, Scanning 11, 176 (low-energy stopping power); ICRU Report 37 (mean excitation energies).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from .config import CROSS_SECTION_TABLES

__all__ = [
    "GasMixture",
    "window_transmission",
    "element_photo_cm2_g",
    "CROSS_SECTION_TABLES",
    "LOSCHMIDT_CM3",
    "SHELL_NAMES",
    "require_xraydb",
    "relaxation_data",
]

#: Boltzmann constant, J/K; standard atmosphere, Pa; Avogadro constant, 1/mol (CODATA)
BOLTZMANN_J_K = 1.380649e-23
ATM_PA = 101325.0
AVOGADRO = 6.02214076e23
#: molecules per cm³ of an ideal gas at 1 atm and 293.15 K
LOSCHMIDT_CM3 = ATM_PA / (BOLTZMANN_J_K * 293.15) * 1e-6

#: shell codes used in the truth column ``absorber_shell``; "outer" = any shell without a listed edge
SHELL_NAMES = ("K", "L1", "L2", "L3", "M1", "M2", "M3", "M4", "M5", "outer")

#: Mean excitation energies, eV [memory: ICRU Report 37 values for the elements in gas mixtures]
MEAN_EXCITATION_EV = {1: 19.2, 2: 41.8, 6: 78.0, 7: 82.0, 8: 95.0, 9: 115.0, 10: 137.0, 18: 188.0,
                      36: 352.0, 54: 482.0}

_GRID_KEV = np.geomspace(0.1, 300.0, 3000)  # xraydb warns that Elam tables are unreliable < 100 eV


def require_xraydb():
    """The ``xraydb`` module, or ImportError saying how to install it."""
    try:
        import xraydb
    except ImportError:
        raise ImportError('the track simulator needs the optional package xraydb: pip install "trackfit[xray]"'
                          ) from None
    return xraydb


def _grid_with_edges(edges_kev) -> np.ndarray:
    """The energy grid plus points just below and above each edge (interpolation smears an edge over 0.1 eV)."""
    # xraydb puts a jump up to ~0.1 eV away from the listed edge energy: bracket each edge by +-0.1 eV
    extra = [v for e in edges_kev for v in (e - 1e-4, e + 1e-4) if v >= _GRID_KEV[0]]
    return np.unique(np.concatenate([_GRID_KEV, extra]))


@functools.cache
def _element_table(symbol: str, table: str = "elam"):
    xraydb = require_xraydb()
    edges = [edge.energy / 1000.0 for edge in xraydb.xray_edges(symbol).values()]
    grid = _grid_with_edges(edges)
    if table == "elam":
        mu = xraydb.mu_elam(symbol, grid * 1000.0, kind="photo")
    elif table == "chantler":
        mu = xraydb.mu_chantler(symbol, grid * 1000.0, photo=True)
    else:
        raise ValueError(f"unknown cross-section table {table!r}; expected one of {CROSS_SECTION_TABLES}")
    mu = np.asarray(mu, dtype=np.float64)
    return np.log(grid), np.log(np.maximum(mu, 1e-300))


def element_photo_cm2_g(symbol: str, energy_kev, table: str = "elam") -> np.ndarray:
    """Photoelectric mass attenuation coefficient of an element, cm²/g.

    ``table="elam"``: xraydb ``mu_elam(kind='photo')`` (Elam, Ravel & Sieber 2002; the default);
    ``"chantler"``: xraydb ``mu_chantler(photo=True)`` (Chantler 2000, J. Phys. Chem. Ref. Data 29, 597).
    Tabulated once per element and interpolated log-log; equal to xraydb to 5e-3 relative or better (0.1 eV
    away from edges).
    """
    log_e, log_mu = _element_table(symbol, table)
    return np.exp(np.interp(np.log(np.asarray(energy_kev, dtype=np.float64)), log_e, log_mu))


@functools.cache
def _window_table(material: str, density_g_cm3: float):
    xraydb = require_xraydb()
    edges = []
    for symbol in xraydb.chemparse(material):
        edges += [edge.energy / 1000.0 for edge in xraydb.xray_edges(symbol).values()]
    grid = _grid_with_edges(edges)
    mu = np.asarray(xraydb.material_mu(material, grid * 1000.0, density=density_g_cm3, kind="total"))
    return np.log(grid), np.log(np.maximum(mu, 1e-300))


def window_transmission(material: str, density_g_cm3: float, thickness_um: float, energy_kev) -> np.ndarray:
    """Fraction of photons crossing the window, ``exp(-mu_total * thickness)`` (Beer-Lambert, all interactions).

    ``material = "none"`` or zero thickness transmit everything.
    """
    energy_kev = np.asarray(energy_kev, dtype=np.float64)
    if material.lower() == "none" or thickness_um == 0:
        return np.ones_like(energy_kev)
    log_e, log_mu = _window_table(material, float(density_g_cm3))
    mu_per_cm = np.exp(np.interp(np.log(energy_kev), log_e, log_mu))
    return np.exp(-mu_per_cm * thickness_um * 1e-4)


@functools.cache
def _shell_data(symbol: str):
    """Shells of an element with listed edges, deepest first: (codes, edges_kev, jump_ratios, fluorescence)."""
    xraydb = require_xraydb()
    items = [(name, edge) for name, edge in xraydb.xray_edges(symbol).items() if name in SHELL_NAMES]
    items.sort(key=lambda item: -item[1].energy)
    codes = np.array([SHELL_NAMES.index(name) for name, _ in items], dtype=np.int8)
    edges = np.array([edge.energy / 1000.0 for _, edge in items])
    jumps = np.array([edge.jump_ratio for _, edge in items])
    yields = np.array([edge.fyield for _, edge in items])
    return codes, edges, jumps, yields


@functools.cache
def relaxation_data(symbol: str):
    """How a vacancy of each shell relaxes (approximations documented in ``docs/simulator.md``).

    Returns
    -------
    dict
        ``shell code -> (auger_kev, fluorescence_yield, line_energies_kev, line_probabilities)``.
        K vacancies: Auger electron of ``E_K - 2 E_L3`` (KL2,3L2,3, the main transition of light elements)
        with probability ``1 - fluorescence_yield``, otherwise a K fluorescence photon drawn from xraydb's K lines.
        L vacancies: Auger electron of ``E_L - 2 E_M3`` when the element has an M3 edge. Other shells: none
        (the binding energy is deposited at the conversion point).
    """
    xraydb = require_xraydb()
    codes, edges, _, yields = _shell_data(symbol)
    by_code = {int(c): e for c, e in zip(codes, edges, strict=True)}
    out = {}
    for code, edge, fyield in zip(codes, edges, yields, strict=True):
        code = int(code)
        name = SHELL_NAMES[code]
        if name == "K":
            auger = edge - 2 * by_code[3] if 3 in by_code else 0.0
            lines = xraydb.xray_lines(symbol, "K") if fyield > 0 else {}
            energies = np.array([line.energy / 1000.0 for line in lines.values()])
            weights = np.array([line.intensity for line in lines.values()])
            probs = weights / weights.sum() if len(weights) else weights
            out[code] = (float(auger), float(fyield) if len(energies) else 0.0, energies, probs)
        elif name in ("L1", "L2", "L3"):
            auger = edge - 2 * by_code[6] if 6 in by_code else 0.0
            out[code] = (float(max(auger, 0.0)), 0.0, np.zeros(0), np.zeros(0))
    return out


def _mean_excitation_kev(z: int) -> float:
    if z in MEAN_EXCITATION_EV:
        return MEAN_EXCITATION_EV[z] / 1000.0
    # Berger & Seltzer approximation for elements outside the table [memory]
    return (9.76 * z + 58.8 * z ** -0.19) / 1000.0


@dataclass(frozen=True)
class GasMixture:
    """An ideal-gas mixture of molecules: element densities and photoabsorption.

    Build it with :meth:`from_config`. All per-element arrays follow the order of :attr:`elements`.

    Attributes
    ----------
    elements : tuple of str
    atomic_number : ndarray of int64
    atomic_mass : ndarray of float64, g/mol
    atom_density_cm3 : ndarray of float64
        Atoms of each element per cm³.
    mass_density_g_cm3 : ndarray of float64
        Partial mass density of each element.
    mean_excitation_kev : ndarray of float64
    gap_cm : float
    """

    elements: tuple
    atomic_number: np.ndarray
    atomic_mass: np.ndarray
    atom_density_cm3: np.ndarray
    mass_density_g_cm3: np.ndarray
    mean_excitation_kev: np.ndarray
    molecule_density_cm3: float
    gap_cm: float
    cross_sections: str = "elam"

    @classmethod
    def from_config(cls, gas) -> GasMixture:
        """From a :class:`~trackfit.simulate.GasConfig` (molecules, fractions, pressure, temperature, gap)."""
        xraydb = require_xraydb()
        n_molecules = gas.pressure_atm * ATM_PA / (BOLTZMANN_J_K * gas.temperature_k) * 1e-6
        atoms: dict[str, float] = {}
        for formula, fraction in zip(gas.molecules, gas.fractions, strict=True):
            try:
                counts = xraydb.chemparse(formula)
            except Exception as err:  # xraydb raises plain ValueError / KeyError for bad formulas
                raise ValueError(f"'gas.molecules' entry {formula!r} is not a chemical formula ({err})") from None
            if not counts:
                raise ValueError(f"'gas.molecules' entry {formula!r} is not a chemical formula")
            for symbol, count in counts.items():
                atoms[symbol] = atoms.get(symbol, 0.0) + fraction * count * n_molecules
        elements = tuple(sorted(atoms, key=xraydb.atomic_number))
        z = np.array([xraydb.atomic_number(s) for s in elements], dtype=np.int64)
        a = np.array([xraydb.atomic_mass(s) for s in elements], dtype=np.float64)
        n = np.array([atoms[s] for s in elements], dtype=np.float64)
        return cls(
            elements=elements,
            atomic_number=z,
            atomic_mass=a,
            atom_density_cm3=n,
            mass_density_g_cm3=n * a / AVOGADRO,
            mean_excitation_kev=np.array([_mean_excitation_kev(int(v)) for v in z]),
            molecule_density_cm3=float(n_molecules),
            gap_cm=float(gas.gap_cm),
            cross_sections=getattr(gas, "cross_sections", "elam"),
        )

    @property
    def density_g_cm3(self) -> float:
        return float(self.mass_density_g_cm3.sum())

    def element_absorption_per_cm(self, energy_kev) -> np.ndarray:
        """Photoabsorption coefficient of each element in the mixture, 1/cm, shape ``(n_elements, *E.shape)``."""
        energy_kev = np.asarray(energy_kev, dtype=np.float64)
        return np.stack([rho * element_photo_cm2_g(s, energy_kev, self.cross_sections)
                         for s, rho in zip(self.elements, self.mass_density_g_cm3, strict=True)])

    def absorption_per_cm(self, energy_kev) -> np.ndarray:
        """Photoabsorption coefficient of the mixture, 1/cm."""
        return self.element_absorption_per_cm(energy_kev).sum(axis=0)

    def absorption_probability(self, energy_kev) -> np.ndarray:
        """Fraction of photons entering the gap that convert in it, ``1 - exp(-mu * gap)`` (Beer-Lambert)."""
        return -np.expm1(-self.absorption_per_cm(energy_kev) * self.gap_cm)

    def shell_probabilities(self, element_index: int, energy_kev):
        """Which shell of an element absorbs a photon of the given energies.

        The fraction of absorptions in a shell just above its edge is ``1 - 1/jump_ratio`` of what the deeper
        shells leave; the shallowest shell below the photon energy takes the rest (xraydb edge jump ratios).

        Returns
        -------
        codes : ndarray of int8, shape (S,)
            Shell codes (:data:`SHELL_NAMES`), deepest first.
        binding_kev : ndarray, shape (S,)
        probabilities : ndarray, shape (*E.shape, S)
        """
        codes, edges, jumps, _ = _shell_data(self.elements[element_index])
        energy_kev = np.asarray(energy_kev, dtype=np.float64)
        open_ = energy_kev[..., None] > edges                      # shells the photon can ionize
        take = np.where(open_, 1.0 - 1.0 / jumps, 0.0)
        # the shallowest open shell takes whatever is left
        last_open = open_ & ~np.concatenate([open_[..., 1:], np.zeros_like(open_[..., :1])], axis=-1)
        take = np.where(last_open, 1.0, take)
        left = np.cumprod(np.concatenate([np.ones_like(take[..., :1]), 1.0 - take[..., :-1]], axis=-1), axis=-1)
        return codes, edges, take * left

    def stopping_constants(self):
        """Arrays for the stopping-power and elastic-scattering kernels.

        Returns
        -------
        z : ndarray of float64
            Atomic numbers.
        atom_density_cm3 : ndarray
        rho_z_over_a : ndarray
            ``rho_j * Z_j / A_j`` (g/cm³ · mol/g) of the Joy-Luo formula.
        mean_excitation_kev : ndarray
        """
        z = self.atomic_number.astype(np.float64)
        return z, self.atom_density_cm3.copy(), self.mass_density_g_cm3 * z / self.atomic_mass, \
            self.mean_excitation_kev.copy()
