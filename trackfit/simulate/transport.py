"""Electron drift in the gas: transverse diffusion from the drift field, temperature, pressure and the mixture.

A cloud of drift electrons that has drifted a length z in a field E spreads transversely by

    σ_T = sqrt(2 ε_k z / (e E)),         ε_k = e D_T / μ   (the characteristic energy, Einstein relation)

so the transverse diffusion coefficient is ``D_T = sqrt(2 ε_k / (e E))`` (µm/√cm with E in V/cm, ε_k in eV).
Electrons in thermal equilibrium with the gas have ε_k = kT: this is the thermal limit, a floor no gas goes
below. The characteristic energy depends on the reduced field E/N (N the molecule density), so for a given gas
it changes with the field, the pressure and the temperature.

"Cold" gases - polyatomic molecules such as dimethyl ether (DME, C2H6O) that take energy out of the drifting
electrons through vibrational excitation - keep ε_k close to kT up to a reduced field of ~10 Td. This module holds
the characteristic energy of the mixtures the shipped designs use (:data:`MIXTURE_TRANSPORT`, each with the value
range and where it comes from); :func:`transverse_diffusion` turns it into ``D_T`` for a gas and a drift field,
never below the thermal limit.

References
----------
Einstein relation and characteristic energy: Huxley & Crompton 1974, *The Diffusion and Drift of Electrons in
Gases* (Wiley). DME near-thermal diffusion: Villa 1983, NIM 217, 273 [from memory]. Values and their spread:
``docs/simulator.md`` (Transport).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from .physics import BOLTZMANN_EV_K

__all__ = ["MixtureTransport", "MIXTURE_TRANSPORT", "DiffusionEstimate", "transverse_diffusion",
           "thermal_diffusion_um_per_sqrt_cm", "reduced_field_td", "mixture_transport"]

#: molecules per cm³ of an ideal gas at 1 atm and 1 K (divide by T): P / k with CODATA constants
_MOLECULES_CM3_K_PER_ATM = 101325.0 / 1.380649e-23 * 1e-6


@dataclass(frozen=True, kw_only=True)
class MixtureTransport:
    """Characteristic energy of a family of gas mixtures, as a multiple of kT.

    Attributes
    ----------
    name : str
        Human name of the family.
    molecules : tuple of str
        The molecules of the mixture (formulas as in ``[gas] molecules``), order free.
    quencher : str
        The molecule whose molar fraction must lie in ``quencher_fraction``.
    quencher_fraction : (float, float)
        Range of its molar fraction for which the values hold.
    ratio, ratio_low, ratio_high : float
        ε_k / kT: nominal value and the range it is believed to lie in (all >= 1).
    max_reduced_field_td : float
        Highest reduced field E/N (Td) the values are meant for; above it they are an extrapolation.
    source : str
        Where the values come from, with their status (measured, model choice, memory).
    """

    name: str
    molecules: tuple[str, ...]
    quencher: str
    quencher_fraction: tuple[float, float]
    ratio: float
    ratio_low: float
    ratio_high: float
    max_reduced_field_td: float
    source: str

    def matches(self, molecules, fractions) -> bool:
        if sorted(molecules) != sorted(self.molecules):
            return False
        share = dict(zip(molecules, fractions, strict=True))[self.quencher]
        return self.quencher_fraction[0] - 1e-9 <= share <= self.quencher_fraction[1] + 1e-9


#: the mixtures with known characteristic energy (``docs/simulator.md``, Transport, discusses each value)
MIXTURE_TRANSPORT = (
    MixtureTransport(
        name="DME", molecules=("C2H6O",), quencher="C2H6O", quencher_fraction=(1.0, 1.0),
        ratio=1.7, ratio_low=1.0, ratio_high=2.5, max_reduced_field_td=12.0,
        source="near-thermal transverse diffusion of DME up to ~2-3 kV/cm at 1 atm [from memory: Villa 1983, "
               "NIM 217, 273]: range 1.0-2.5; the nominal 1.7 is calibrated on the published modulation factors "
               "of He/DME cells at 2.7-5.9 keV (docs/simulator.md), not measured"),
    MixtureTransport(
        name="He/DME", molecules=("He", "C2H6O"), quencher="C2H6O", quencher_fraction=(0.5, 1.0),
        ratio=1.7, ratio_low=1.0, ratio_high=2.5, max_reduced_field_td=12.0,
        source="model choice: the DME value (DME dominates the energy exchange of slow electrons; helium's "
               "elastic energy loss per collision is small), same range"),
    MixtureTransport(
        name="Ar/DME", molecules=("Ar", "C2H6O"), quencher="C2H6O", quencher_fraction=(0.3, 0.7),
        ratio=1.7, ratio_low=1.0, ratio_high=3.0, max_reduced_field_td=8.0,
        source="model choice: the DME value; argon warms the electrons where DME is diluted, so the range is "
               "widened to 1.0-3.0 (no measurement at hand)"),
)


def mixture_transport(molecules, fractions) -> MixtureTransport:
    """The :class:`MixtureTransport` entry of a mixture.

    Raises
    ------
    ValueError
        No entry covers the mixture; the message lists the known families and the keys that set the
        diffusion by hand.
    """
    for entry in MIXTURE_TRANSPORT:
        if entry.matches(tuple(molecules), tuple(fractions)):
            return entry
    known = "; ".join(f"{e.name} ({e.quencher} fraction {e.quencher_fraction[0]:g}-{e.quencher_fraction[1]:g})"
                      for e in MIXTURE_TRANSPORT)
    raise ValueError(f"no transport data for the gas {'/'.join(molecules)} "
                     f"{'/'.join(f'{f:g}' for f in fractions)}: set drift.characteristic_energy_ratio or "
                     f"drift.diffusion_um_per_sqrt_cm (known mixtures: {known})")


def reduced_field_td(field_v_per_cm: float, pressure_atm: float, temperature_k: float) -> float:
    """Reduced field E/N in townsend (1 Td = 1e-17 V cm²) of an ideal gas."""
    n_cm3 = pressure_atm * _MOLECULES_CM3_K_PER_ATM / temperature_k
    return field_v_per_cm / n_cm3 * 1e17


def thermal_diffusion_um_per_sqrt_cm(field_v_per_cm: float, temperature_k: float) -> float:
    """Thermal limit of the transverse diffusion coefficient, ``sqrt(2 k T / (e E))``, µm/√cm."""
    if not field_v_per_cm > 0 or not temperature_k > 0:
        raise ValueError(f"field and temperature must be > 0 (got {field_v_per_cm} V/cm, {temperature_k} K)")
    return math.sqrt(2.0 * BOLTZMANN_EV_K * temperature_k / field_v_per_cm) * 1e4


@dataclass(frozen=True, kw_only=True)
class DiffusionEstimate:
    """Transverse diffusion coefficient of a gas in a drift field, with its range.

    Attributes
    ----------
    um_per_sqrt_cm : float
        The value the simulator uses.
    low_um_per_sqrt_cm, high_um_per_sqrt_cm : float
        The range from the characteristic-energy range (equal to the value when it was set by hand).
    thermal_um_per_sqrt_cm : float
        The thermal limit at this field and temperature.
    reduced_field_td : float
        E/N of the drift field.
    characteristic_energy_ev : float
        ε_k used (NaN when the diffusion was set by hand).
    origin : str
        ``"fixed"`` (``diffusion_um_per_sqrt_cm`` given), ``"ratio"`` (``characteristic_energy_ratio`` given) or
        the name of the :data:`MIXTURE_TRANSPORT` family used.
    extrapolated : bool
        E/N is above the range the family's values are meant for.
    """

    um_per_sqrt_cm: float
    low_um_per_sqrt_cm: float
    high_um_per_sqrt_cm: float
    thermal_um_per_sqrt_cm: float
    reduced_field_td: float
    characteristic_energy_ev: float
    origin: str
    extrapolated: bool = False


def transverse_diffusion(gas, drift) -> DiffusionEstimate:
    """Transverse diffusion coefficient for a ``[gas]`` and ``[drift]`` config.

    Parameters
    ----------
    gas : GasConfig
        Molecules, fractions, pressure, temperature.
    drift : DriftConfig
        ``field_v_per_cm``; ``diffusion_um_per_sqrt_cm`` (> 0: used as given); else
        ``characteristic_energy_ratio`` (> 0: ε_k = ratio × kT); else the mixture's entry in
        :data:`MIXTURE_TRANSPORT`.

    Returns
    -------
    DiffusionEstimate

    Raises
    ------
    ValueError
        The mixture has no entry and neither value was given.

    Examples
    --------
    >>> from trackfit.simulate import load_preset
    >>> config = load_preset("hedme-1atm-1cm")
    >>> d = transverse_diffusion(config.gas, config.drift)
    >>> round(d.thermal_um_per_sqrt_cm, 1), d.um_per_sqrt_cm >= d.thermal_um_per_sqrt_cm
    (50.3, True)
    """
    thermal = thermal_diffusion_um_per_sqrt_cm(drift.field_v_per_cm, gas.temperature_k)
    e_over_n = reduced_field_td(drift.field_v_per_cm, gas.pressure_atm, gas.temperature_k)
    kt_ev = BOLTZMANN_EV_K * gas.temperature_k
    if drift.diffusion_um_per_sqrt_cm > 0:
        value = drift.diffusion_um_per_sqrt_cm
        return DiffusionEstimate(um_per_sqrt_cm=value, low_um_per_sqrt_cm=value, high_um_per_sqrt_cm=value,
                                 thermal_um_per_sqrt_cm=thermal, reduced_field_td=e_over_n,
                                 characteristic_energy_ev=float("nan"), origin="fixed")
    if drift.characteristic_energy_ratio > 0:
        ratio = low = high = drift.characteristic_energy_ratio
        origin, extrapolated = "ratio", False
    else:
        entry = mixture_transport(gas.molecules, gas.fractions)
        ratio, low, high = entry.ratio, entry.ratio_low, entry.ratio_high
        origin, extrapolated = entry.name, e_over_n > entry.max_reduced_field_td
    # the thermal limit is a floor: ε_k >= kT
    ratio, low, high = (max(r, 1.0) for r in (ratio, low, high))
    return DiffusionEstimate(um_per_sqrt_cm=thermal * math.sqrt(ratio), low_um_per_sqrt_cm=thermal * math.sqrt(low),
                             high_um_per_sqrt_cm=thermal * math.sqrt(high), thermal_um_per_sqrt_cm=thermal,
                             reduced_field_td=e_over_n, characteristic_energy_ev=ratio * kt_ev, origin=origin,
                             extrapolated=extrapolated)
