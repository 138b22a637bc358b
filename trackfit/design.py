"""Simulated performance of a detector design, and sweeps of one design value, for planning detectors.

What to use when
----------------
* :func:`simulate_performance` - for one :class:`~trackfit.simulate.SimConfig`, at each photon energy: the
  detection efficiency (window x gap, Beer-Lambert), the modulation factor μ of reconstructed tracks of a 100 %
  polarized beam, the energy resolution (FWHM of the pulse-height peak) and the escape-peak fraction.
* :func:`sweep_design` - the same for a list of values of one design value (``"drift.field_v_per_cm"``,
  ``"gas.pressure_atm"``, ``"gas.gap_cm"``, ``"multiplier.polya_theta"``, ...), everything else fixed.
* :func:`simulate_beam` - the shared step: one simulated and reconstructed run of a 100 %-polarized beam
  (:func:`polarized_beam`); :func:`pulse_height_resolution` its line width. The detector response of a design
  (:mod:`trackfit.response_builder`, ``trackfit response``) is built on them.

Each point simulates ``n_events`` triggered events of a monochromatic, 100 %-polarized beam (Gaussian spot at the
chip centre) and reconstructs them with a :class:`~trackfit.ReconConfig`; μ is the modulation amplitude of the
emission angles (of the config's ``emission_estimator``, docs/methods.md §11) of fully reconstructed events,
``2 sqrt(<cos 2φ>² + <sin 2φ>²)`` (Kislat et al. 2015), with error ``sqrt(2/N)``; the resolution is a Gaussian fit of
the pulse-height peak (:func:`trackfit.analysis.fit_line`) within ±25 % of its median. Results print as a table
(``to_markdown``) and convert to rows of plain values.

The simulator layer gives the physics; this module (on the analysis layer: it reconstructs) only runs it.

Examples
--------
>>> from trackfit.design import sweep_design
>>> from trackfit.simulate import load_preset
>>> sweep = sweep_design(load_preset("hedme-1atm-1cm"), "drift.field_v_per_cm", [1000.0, 3000.0],
...                      energies_kev=[3.7], n_events=500, seed=1)               # doctest: +SKIP
>>> print(sweep.to_markdown())                                                   # doctest: +SKIP
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from .analysis.estimates import with_estimate
from .analysis.spectrum import fit_line
from .io.table import EventTable
from .recon import ReconConfig, reconstruct
from .simulate import SimConfig, SimResult, run
from .simulate.config import SECTIONS
from .simulate.fluorescence import FLUORESCENCE_FATES
from .simulate.transport import transverse_diffusion

__all__ = ["PerformancePoint", "DesignPerformance", "DesignSweep", "simulate_performance", "sweep_design",
           "with_design_value", "polarized_beam", "simulate_beam", "pulse_height_resolution"]

_ESCAPED = (FLUORESCENCE_FATES.index("window"), FLUORESCENCE_FATES.index("multiplier"))


@dataclass(frozen=True, kw_only=True)
class PerformancePoint:
    """Simulated performance at one photon energy.

    Attributes
    ----------
    energy_kev : float
    n_events : int
        Triggered events simulated.
    detection_efficiency : float
        Photons converted in the gap / photons reaching the window.
    modulation_factor, modulation_factor_err : float
        μ of the fully reconstructed events (status 0) and its error.
    kept_fraction : float
        Fraction of triggered events fully reconstructed (the events μ is measured on).
    fwhm_frac, fwhm_frac_err : float
        FWHM / peak of the pulse-height peak (NaN when the fit failed).
    escape_fraction : float
        Fraction of events whose fluorescence photon left the gap (the escape peak).
    diffusion_um_per_sqrt_cm : float
        Transverse diffusion coefficient the simulator used.
    """

    energy_kev: float
    n_events: int
    detection_efficiency: float
    modulation_factor: float
    modulation_factor_err: float
    kept_fraction: float
    fwhm_frac: float
    fwhm_frac_err: float
    escape_fraction: float
    diffusion_um_per_sqrt_cm: float

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


_HEADER = ("E (keV)", "efficiency", "μ", "kept", "FWHM", "escape", "D_T (µm/√cm)")


def _cells(p: PerformancePoint) -> list[str]:
    fwhm = "—" if not math.isfinite(p.fwhm_frac) else f"{100 * p.fwhm_frac:.1f} %"
    return [f"{p.energy_kev:g}", f"{p.detection_efficiency:.4f}",
            f"{p.modulation_factor:.3f} ± {p.modulation_factor_err:.3f}", f"{p.kept_fraction:.3f}", fwhm,
            f"{p.escape_fraction:.4f}", f"{p.diffusion_um_per_sqrt_cm:.1f}"]


def _markdown(header, rows) -> str:
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(row) + " |" for row in rows]
    return "\n".join(lines)


@dataclass(frozen=True)
class DesignPerformance:
    """:class:`PerformancePoint` of one design at several energies (``points``), with the config used."""

    config: SimConfig
    points: tuple[PerformancePoint, ...]

    def to_markdown(self) -> str:
        return _markdown(_HEADER, [_cells(p) for p in self.points])

    def __repr__(self):
        return f"DesignPerformance({self.config.description!r})\n{self.to_markdown()}"


@dataclass(frozen=True)
class DesignSweep:
    """Performance versus one design value: ``results[i]`` is the :class:`DesignPerformance` at ``values[i]``."""

    key: str
    values: tuple
    results: tuple[DesignPerformance, ...] = field(repr=False)

    def rows(self) -> list[dict]:
        """One dict per (value, energy): the design value under ``key`` and the :class:`PerformancePoint` fields."""
        return [{self.key: v, **p.as_dict()} for v, r in zip(self.values, self.results, strict=True)
                for p in r.points]

    def to_markdown(self) -> str:
        return _markdown((self.key, *_HEADER), [[f"{v:g}" if isinstance(v, float) else str(v), *_cells(p)]
                                                for v, r in zip(self.values, self.results, strict=True)
                                                for p in r.points])

    def __repr__(self):
        return f"DesignSweep({self.key})\n{self.to_markdown()}"


def with_design_value(config: SimConfig, key: str, value) -> SimConfig:
    """A copy of ``config`` with ``"table.name"`` set to ``value`` (validated like a config file).

    Raises
    ------
    KeyError
        Unknown table or name; the message lists the valid ones.
    """
    table, _, name = key.partition(".")
    if table not in SECTIONS:
        raise KeyError(f"unknown design value {key!r}: expected 'table.name' with a table among {', '.join(SECTIONS)}")
    section = getattr(config, table)
    names = [f.name for f in dataclasses.fields(section)]
    if name not in names:
        raise KeyError(f"unknown design value {key!r}; valid names of [{table}]: {', '.join(names)}")
    return dataclasses.replace(config, **{table: dataclasses.replace(section, **{name: value})})


def polarized_beam(config: SimConfig, energy_kev: float, beam_sigma_mm: float = 0.5) -> SimConfig:
    """``config`` with its source replaced by a monochromatic, 100 %-polarized beam (angle 0: along +x) in a
    Gaussian spot of ``beam_sigma_mm`` at the chip centre, at normal incidence."""
    config = config.with_monochromatic(energy_kev=energy_kev, polarization_degree=1.0, polarization_angle_deg=0.0)
    return dataclasses.replace(config, source=dataclasses.replace(
        config.source, beam="gaussian", beam_sigma_mm=beam_sigma_mm, beam_centre_mm=(0.0, 0.0)))


def pulse_height_resolution(pulse_height) -> tuple[float, float]:
    """FWHM / peak of a monochromatic pulse-height peak and its error: a Gaussian with a linear background
    (:func:`trackfit.analysis.fit_line`) within ±25 % of the median; (NaN, NaN) for fewer than 50 values or a
    failed fit."""
    ph = np.asarray(pulse_height, dtype=np.float64)
    ph = ph[np.isfinite(ph) & (ph > 0)]
    if ph.size < 50:
        return float("nan"), float("nan")
    centre = float(np.median(ph))
    try:
        fit = fit_line(ph, bins=60, range=(0.75 * centre, 1.25 * centre), background=True)
    except (ValueError, RuntimeError):
        return float("nan"), float("nan")
    if not fit.success:
        return float("nan"), float("nan")
    return float(fit.fwhm_frac), float(fit.fwhm_frac_err)


def simulate_beam(config: SimConfig, energy_kev: float, *, n_events: int, seed, recon_config: ReconConfig | None = None,
                  beam_sigma_mm: float = 0.5) -> tuple[SimResult, EventTable]:
    """Simulate ``n_events`` triggered events of :func:`polarized_beam` and reconstruct them.

    The one step every design study shares (:func:`simulate_performance` here, the detector response of
    :mod:`trackfit.response_builder`).

    Parameters
    ----------
    config : SimConfig
        The design; its source is replaced by the beam.
    energy_kev : float
    n_events : int
        Triggered events.
    seed : int or numpy.random.Generator
        Random numbers of the simulation.
    recon_config : ReconConfig, optional
        Default ``ReconConfig()``.
    beam_sigma_mm : float

    Returns
    -------
    result : SimResult
        The simulated run (``result.batch`` holds the raw events, ``result.n_converted`` the converted photons).
    table : EventTable
        One row per triggered event; energies on the design's nominal scale unless ``recon_config`` sets one.
    """
    result = run(polarized_beam(config, float(energy_kev), beam_sigma_mm), n_events, rng=seed)
    # the run's /run attributes give the design's nominal energy scale when the settings set none
    return result, reconstruct(result.batch, recon_config or ReconConfig(), run_info=result.run_info())


def simulate_performance(config: SimConfig, energies_kev: Sequence[float], *, n_events: int = 20_000, seed: int = 0,
                         recon_config: ReconConfig | None = None, beam_sigma_mm: float = 0.5) -> DesignPerformance:
    """Simulate and reconstruct a 100 %-polarized beam at each energy; see the module docstring.

    Parameters
    ----------
    config : SimConfig
        The design; its source is replaced by the beam.
    energies_kev : sequence of float
    n_events : int
        Triggered events per energy (μ error ≈ sqrt(2 / n_events)).
    seed : int
        Seed of the first energy; energy ``i`` uses ``seed + i``.
    recon_config : ReconConfig, optional
        Default ``ReconConfig()``.
    beam_sigma_mm : float
        Gaussian spot at the chip centre.

    Returns
    -------
    DesignPerformance
    """
    diffusion = transverse_diffusion(config.gas, config.drift).um_per_sqrt_cm
    points = []
    for i, energy in enumerate(energies_kev):
        result, table = simulate_beam(config, float(energy), n_events=n_events, seed=seed + i,
                                      recon_config=recon_config, beam_sigma_mm=beam_sigma_mm)
        good = np.asarray(table["status"]) == 0
        phi = np.asarray(with_estimate(table)["emission_rad"], dtype=np.float64)[good]  # the config's estimate
        n_good = int(good.sum())
        if n_good:
            q, u = np.mean(np.cos(2 * phi)), np.mean(np.sin(2 * phi))
            mu, mu_err = float(2 * np.hypot(q, u)), float(np.sqrt(2.0 / n_good))
        else:
            mu = mu_err = float("nan")
        fwhm, fwhm_err = pulse_height_resolution(np.asarray(table["pulse_height"])[good])
        fate = np.asarray(result.truth["fluorescence_fate"])
        points.append(PerformancePoint(
            energy_kev=float(energy), n_events=len(result.batch), detection_efficiency=result.detection_efficiency,
            modulation_factor=mu, modulation_factor_err=mu_err, kept_fraction=n_good / max(len(result.batch), 1),
            fwhm_frac=fwhm, fwhm_frac_err=fwhm_err, escape_fraction=float(np.isin(fate, _ESCAPED).mean()),
            diffusion_um_per_sqrt_cm=float(diffusion)))
    return DesignPerformance(config=config, points=tuple(points))


def sweep_design(config: SimConfig, key: str, values: Sequence, *, energies_kev: Sequence[float],
                 n_events: int = 20_000, seed: int = 0, recon_config: ReconConfig | None = None,
                 beam_sigma_mm: float = 0.5) -> DesignSweep:
    """:func:`simulate_performance` for each value of one design value ``key`` (``"table.name"``).

    Every value uses the same seeds, so differences between values are not blurred by different random draws
    more than the physics makes them.

    Raises
    ------
    KeyError
        ``key`` is not a config value.
    trackfit.simulate.ConfigError
        A value is not valid for ``key``.
    """
    results = tuple(simulate_performance(with_design_value(config, key, v), energies_kev, n_events=n_events,
                                         seed=seed, recon_config=recon_config, beam_sigma_mm=beam_sigma_mm)
                    for v in values)
    return DesignSweep(key=key, values=tuple(values), results=results)
