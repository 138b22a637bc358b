"""Plan an observation with one or more detector responses: counts, MDP99, exposure to a target MDP, bytes per day.

What to use when
----------------
* :class:`Observation` - the source (a power law ``F(E) = F0 E^-Γ`` in photons cm⁻² s⁻¹ keV⁻¹ with ``F0`` at 1 keV,
  or a table of energy and photon flux; optionally absorbed by a column of interstellar gas,
  :mod:`trackfit.interstellar`), the collecting area (a number in cm² or a table versus energy: a mirror, or the
  window of a bare detector), the background (selected events per cm² of the source region per s per keV), the
  energy band, the exposure and an optional target MDP. A frozen dataclass; TOML ``[observation]`` table in and
  out.
* :func:`plan_observation` - for each :class:`~trackfit.response.DetectorResponse`: source and background counts in
  the band, the effective modulation factor (μ weighted by the detected source spectrum), MDP99 for the exposure
  with background (Weisskopf et al. 2010), the exposure that reaches the target MDP, MDP99 per sub-band, and the
  data volume the readout produces (events/s, bytes/s, bytes and GB per day, raw and at a stated compressed
  size). Returns an :class:`ObservationPlan` (``to_dict()`` is what ``trackfit plan --json`` writes).
* :func:`read_two_column_csv` - a table of energy and a value (spectrum, area) from a CSV file.
* Figures: :mod:`trackfit.planner_figures`.

Method (``docs/methods.md`` §4 and §10)
--------------------------------------
Detected source counts ``S = T ∫ F(E) A(E) ε(E) dE`` over the band, ``ε`` the response's efficiency with the
selection; background counts ``B = T b Ω ΔE`` (rate ``b`` per cm² s keV of selected events, source region ``Ω``,
band width ``ΔE``); ``μ_eff = ∫ μ F A ε dE / ∫ F A ε dE``;
``MDP99 = 4.29 / (μ_eff S) sqrt(S + B)``. Both counts grow with ``T``, so ``MDP ∝ T^-1/2`` and the exposure for a
target ``M`` is ``T (MDP99 / M)²``. The data volume counts every *triggered* source event over the whole range the
response covers (the readout writes events of every energy, selected or not) with its energy's mean raw-format
size, plus background events at the given rate, flat over that range.

Examples
--------
>>> obs = Observation(flux_at_1kev=0.1, photon_index=2.0, area_cm2=100.0, band_kev=(2.0, 8.0), exposure_s=1e5,
...                   target_mdp=0.05)
>>> round(float(obs.photon_flux(2.0)[()]), 4)                 # photons cm^-2 s^-1 keV^-1 at 2 keV
0.025
"""

from __future__ import annotations

import dataclasses
import html
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import _toml
from .analysis.stokes import MDP99_CONSTANT, mdp99
from .response import DetectorResponse

__all__ = ["Observation", "BandResult", "DesignPlan", "ObservationPlan", "plan_observation", "plan_design",
           "read_two_column_csv", "SECONDS_PER_DAY", "DEFAULT_COMPRESSED_FRACTION", "MDP99_CONSTANT"]

SECONDS_PER_DAY = 86_400.0
#: compressed / raw size of raw event files with the zstd filter, measured on pedestal-noise events
#: (docs/raw-format.md, "Why the default is none"); state your own with ``compressed_fraction``
DEFAULT_COMPRESSED_FRACTION = 0.44


def _finite(name, value, *, positive=False, non_negative=False):
    if isinstance(value, bool) or not isinstance(value, int | float | np.floating | np.integer) \
            or not math.isfinite(value):
        raise ValueError(f"'{name}' must be a finite number (got {value!r})")
    if positive and not value > 0:
        raise ValueError(f"'{name}' must be > 0 (got {value!r})")
    if non_negative and not value >= 0:
        raise ValueError(f"'{name}' must be >= 0 (got {value!r})")
    return float(value)


def _table(name_x, xs, name_y, ys) -> tuple[tuple[float, ...], tuple[float, ...]]:
    xs = tuple(float(v) for v in xs)
    ys = tuple(float(v) for v in ys)
    if len(xs) != len(ys):
        raise ValueError(f"'{name_x}' and '{name_y}' must have the same length (got {len(xs)} and {len(ys)})")
    if xs:
        if len(xs) < 2:
            raise ValueError(f"'{name_x}' needs at least 2 entries (got {len(xs)})")
        if any(not math.isfinite(x) or x <= 0 for x in xs) or any(b <= a for a, b in zip(xs, xs[1:], strict=False)):
            raise ValueError(f"'{name_x}' must be positive and increasing (got {list(xs)[:6]} ...)")
        if any(not math.isfinite(y) or y < 0 for y in ys):
            raise ValueError(f"'{name_y}' must be finite and >= 0 (got {list(ys)[:6]} ...)")
    return xs, ys


@dataclass(frozen=True, kw_only=True)
class Observation:
    """An observation to plan: source, collecting area, background, band, exposure.

    Parameters
    ----------
    band_kev : (float, float)
        Energy band of the analysis, keV.
    exposure_s : float
        Exposure, s.
    flux_at_1kev : float, optional
        Power law: photon flux density at 1 keV, photons cm⁻² s⁻¹ keV⁻¹ (give this or the spectrum table).
    photon_index : float
        Power law: ``F(E) = flux_at_1kev * E**-photon_index`` (default 2).
    spectrum_energies_kev, spectrum_flux : tuple of float
        Table: photon flux density (photons cm⁻² s⁻¹ keV⁻¹) at increasing energies, interpolated linearly.
    absorption_column_cm2 : float
        Hydrogen column density of interstellar gas in front of the source, atoms cm⁻² (default 0).
    area_cm2 : float, optional
        Effective collecting area, cm² (give this or the area table).
    area_energies_kev, area_values_cm2 : tuple of float
        Table of the collecting area versus energy, interpolated linearly.
    background_per_cm2_s_kev : float
        Background events that pass the selection, per cm² of the source region per s per keV (default 0).
    background_region_cm2 : float, optional
        Area of the source region on the detector, cm² (default: each design's whole chip).
    target_mdp : float, optional
        MDP99 to reach (a fraction, e.g. 0.05).
    band_edges_kev : tuple of float
        Edges of the sub-bands with their own MDP99, from the band's low to high end (default: four bands of equal
        width in ln E).
    compressed_fraction : float
        Compressed / raw size of the data, for the compressed data volume (default 0.44: zstd on pedestal-noise
        events, docs/raw-format.md).
    """

    band_kev: tuple[float, float]
    exposure_s: float
    flux_at_1kev: float | None = None
    photon_index: float = 2.0
    spectrum_energies_kev: tuple[float, ...] = ()
    spectrum_flux: tuple[float, ...] = ()
    absorption_column_cm2: float = 0.0
    area_cm2: float | None = None
    area_energies_kev: tuple[float, ...] = ()
    area_values_cm2: tuple[float, ...] = ()
    background_per_cm2_s_kev: float = 0.0
    background_region_cm2: float | None = None
    target_mdp: float | None = None
    band_edges_kev: tuple[float, ...] = ()
    compressed_fraction: float = DEFAULT_COMPRESSED_FRACTION

    def __post_init__(self):
        band = tuple(float(v) for v in self.band_kev)
        if len(band) != 2 or not all(math.isfinite(v) and v > 0 for v in band) or band[1] <= band[0]:
            raise ValueError(f"'band_kev' must be two energies 0 < low < high (got {self.band_kev!r})")
        object.__setattr__(self, "band_kev", band)
        object.__setattr__(self, "exposure_s", _finite("exposure_s", self.exposure_s, positive=True))
        object.__setattr__(self, "photon_index", _finite("photon_index", self.photon_index))
        energies, flux = _table("spectrum_energies_kev", self.spectrum_energies_kev, "spectrum_flux",
                                self.spectrum_flux)
        object.__setattr__(self, "spectrum_energies_kev", energies)
        object.__setattr__(self, "spectrum_flux", flux)
        if (self.flux_at_1kev is None) == (not energies):
            raise ValueError("give the source either as a power law ('flux_at_1kev', 'photon_index') or as a table "
                             "('spectrum_energies_kev', 'spectrum_flux'), not both or neither")
        if self.flux_at_1kev is not None:
            object.__setattr__(self, "flux_at_1kev", _finite("flux_at_1kev", self.flux_at_1kev, positive=True))
        object.__setattr__(self, "absorption_column_cm2",
                           _finite("absorption_column_cm2", self.absorption_column_cm2, non_negative=True))
        a_energies, a_values = _table("area_energies_kev", self.area_energies_kev, "area_values_cm2",
                                      self.area_values_cm2)
        object.__setattr__(self, "area_energies_kev", a_energies)
        object.__setattr__(self, "area_values_cm2", a_values)
        if (self.area_cm2 is None) == (not a_energies):
            raise ValueError("give the collecting area either as a number ('area_cm2') or as a table "
                             "('area_energies_kev', 'area_values_cm2'), not both or neither")
        if self.area_cm2 is not None:
            object.__setattr__(self, "area_cm2", _finite("area_cm2", self.area_cm2, positive=True))
        object.__setattr__(self, "background_per_cm2_s_kev",
                           _finite("background_per_cm2_s_kev", self.background_per_cm2_s_kev, non_negative=True))
        if self.background_region_cm2 is not None:
            object.__setattr__(self, "background_region_cm2",
                               _finite("background_region_cm2", self.background_region_cm2, positive=True))
        if self.target_mdp is not None:
            target = _finite("target_mdp", self.target_mdp)
            if not 0 < target < 1:
                raise ValueError(f"'target_mdp' must be a fraction in (0, 1) (got {self.target_mdp!r})")
            object.__setattr__(self, "target_mdp", target)
        edges = tuple(float(v) for v in self.band_edges_kev)
        if edges:
            if len(edges) < 2 or any(b <= a for a, b in zip(edges, edges[1:], strict=False)) \
                    or abs(edges[0] - band[0]) > 1e-9 * band[0] or abs(edges[-1] - band[1]) > 1e-9 * band[1]:
                raise ValueError(f"'band_edges_kev' must increase from the band's low end {band[0]:g} to its high "
                                 f"end {band[1]:g} (got {list(edges)})")
        object.__setattr__(self, "band_edges_kev", edges)
        fraction = _finite("compressed_fraction", self.compressed_fraction)
        if not 0 < fraction <= 1:
            raise ValueError(f"'compressed_fraction' must be in (0, 1] (got {self.compressed_fraction!r})")
        object.__setattr__(self, "compressed_fraction", fraction)

    # ------------------------------------------------------------------------------------------ model
    @property
    def sub_band_edges_kev(self) -> np.ndarray:
        """Edges of the sub-bands (:attr:`band_edges_kev`, or four of equal width in ln E)."""
        if self.band_edges_kev:
            return np.array(self.band_edges_kev)
        return np.geomspace(*self.band_kev, 5)

    @property
    def spectrum_range_kev(self) -> tuple[float, float]:
        """Where the source spectrum is defined (a table's range; everywhere for a power law)."""
        if self.spectrum_energies_kev:
            return self.spectrum_energies_kev[0], self.spectrum_energies_kev[-1]
        return 0.0, math.inf

    @property
    def area_range_kev(self) -> tuple[float, float]:
        if self.area_energies_kev:
            return self.area_energies_kev[0], self.area_energies_kev[-1]
        return 0.0, math.inf

    def photon_flux(self, energy_kev) -> np.ndarray:
        """Source photon flux density reaching the instrument, photons cm⁻² s⁻¹ keV⁻¹ (after absorption)."""
        energy = np.asarray(energy_kev, dtype=np.float64)
        if self.flux_at_1kev is not None:
            flux = self.flux_at_1kev * energy ** -self.photon_index
        else:
            flux = np.interp(energy, self.spectrum_energies_kev, self.spectrum_flux, left=0.0, right=0.0)
        if self.absorption_column_cm2 > 0:
            from .interstellar import absorbed_fraction_transmitted

            flux = flux * absorbed_fraction_transmitted(energy, self.absorption_column_cm2)
        return flux

    def area(self, energy_kev) -> np.ndarray:
        """Collecting area at each energy, cm²."""
        energy = np.asarray(energy_kev, dtype=np.float64)
        if self.area_cm2 is not None:
            return np.full(energy.shape, self.area_cm2)
        return np.interp(energy, self.area_energies_kev, self.area_values_cm2, left=0.0, right=0.0)

    # ------------------------------------------------------------------------------------------ TOML
    @classmethod
    def field_names(cls) -> list[str]:
        return [f.name for f in dataclasses.fields(cls)]

    def to_dict(self) -> dict:
        """Plain values; unset optional values (None, empty tables) are left out."""
        out = {}
        for name in self.field_names():
            value = getattr(self, name)
            if value is None or value == ():
                continue
            out[name] = list(value) if isinstance(value, tuple) else value
        return out

    @classmethod
    def check_keys(cls, values: dict, *, source: str = "observation") -> dict:
        """The content of an ``[observation]`` table (or the dict itself), with unknown keys refused (the message
        lists the valid ones); values are not checked until the :class:`Observation` is built."""
        if isinstance(values.get("observation"), dict):
            if set(values) != {"observation"}:
                raise ValueError(f"{source}: unknown table(s) {sorted(set(values) - {'observation'})}; expected "
                                 "only [observation]")
            values = values["observation"]
        unknown = sorted(set(values) - set(cls.field_names()))
        if unknown:
            raise ValueError(f"{source}: unknown key(s) {unknown}; valid keys are {cls.field_names()}")
        return dict(values)

    @classmethod
    def from_dict(cls, values: dict, *, source: str = "observation") -> Observation:
        """From a dict (an ``[observation]`` table or its content); unknown keys are refused with the valid ones."""
        values = cls.check_keys(values, source=source)
        missing = [k for k in ("band_kev", "exposure_s") if k not in values]
        if missing:
            raise ValueError(f"{source}: missing key(s) {missing}")
        try:
            return cls(**values)
        except (TypeError, ValueError) as err:
            raise ValueError(f"{source}: {err}") from None

    def to_toml(self) -> str:
        return _toml.dumps({"observation": self.to_dict()}, header="trackfit observation to plan")

    @staticmethod
    def _toml_values(path) -> dict:
        return _toml.read_file(path, what="observation file")[0]

    @classmethod
    def read_toml(cls, path) -> Observation:
        return cls.from_dict(cls._toml_values(path), source=f"observation file '{path}'")

    @classmethod
    def read_toml_values(cls, path) -> dict:
        """The keys of an observation file, checked for unknown names only (for merging with other values)."""
        return cls.check_keys(cls._toml_values(path), source=f"observation file '{path}'")

    def describe(self) -> str:
        """One line: source, area, background, band, exposure."""
        if self.flux_at_1kev is not None:
            source = f"power law F0 = {self.flux_at_1kev:g} /cm²/s/keV at 1 keV, index {self.photon_index:g}"
        else:
            source = f"tabulated spectrum ({len(self.spectrum_energies_kev)} points)"
        if self.absorption_column_cm2:
            source += f", N_H = {self.absorption_column_cm2:.3g} /cm²"
        area = f"{self.area_cm2:g} cm²" if self.area_cm2 is not None else \
            f"area table ({len(self.area_energies_kev)} points)"
        return (f"{source}; area {area}; background {self.background_per_cm2_s_kev:g} /cm²/s/keV; band "
                f"{self.band_kev[0]:g}-{self.band_kev[1]:g} keV; exposure {self.exposure_s:g} s")


def read_two_column_csv(path, *, what: str = "table") -> tuple[np.ndarray, np.ndarray]:
    """Read a table of energy (keV) and a value from a text file: comma- or whitespace-separated columns, ``#``
    comments, blank lines and one header line allowed; energies positive and increasing, values finite and >= 0.

    Raises
    ------
    FileNotFoundError
    ValueError
        Naming the file, the line and what was expected.
    """
    path = Path(path)
    if not path.exists():
        raise FileNotFoundError(f"{what} file '{path}' does not exist")
    xs, ys = [], []
    seen_data = False
    for number, line in enumerate(path.read_text().splitlines(), start=1):
        text = line.split("#", 1)[0].strip()
        if not text:
            continue
        cells = [c.strip() for c in (text.split(",") if "," in text else text.split())]
        try:
            values = [float(c) for c in cells]
        except ValueError:
            if not seen_data and not xs:
                seen_data = True  # the header line
                continue
            raise ValueError(f"{what} file '{path}', line {number}: expected two numbers (energy_kev, value), "
                             f"found {line.strip()!r}") from None
        seen_data = True
        if len(values) != 2:
            raise ValueError(f"{what} file '{path}', line {number}: expected two columns (energy_kev, value), found "
                             f"{len(values)}")
        if not (math.isfinite(values[0]) and values[0] > 0 and math.isfinite(values[1]) and values[1] >= 0):
            raise ValueError(f"{what} file '{path}', line {number}: expected an energy > 0 and a value >= 0, found "
                             f"{line.strip()!r}")
        if xs and values[0] <= xs[-1]:
            raise ValueError(f"{what} file '{path}', line {number}: energies must increase ({xs[-1]:g} then "
                             f"{values[0]:g} keV)")
        xs.append(values[0])
        ys.append(values[1])
    if len(xs) < 2:
        raise ValueError(f"{what} file '{path}': expected at least two rows of energy_kev, value (found {len(xs)})")
    return np.array(xs), np.array(ys)


# ---------------------------------------------------------------------------------------------- results
def _clean(value):
    """JSON-safe: NaN and infinities become None."""
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    return value


@dataclass(frozen=True, kw_only=True)
class BandResult:
    """Counts, effective modulation factor and MDP99 in one energy band."""

    low_kev: float
    high_kev: float
    source_counts: float
    background_counts: float
    effective_modulation_factor: float
    mdp99: float

    def to_dict(self) -> dict:
        return _clean(dataclasses.asdict(self))


@dataclass(frozen=True, kw_only=True)
class DesignPlan:
    """What one design gives for the observation (every rate per second of exposure, counts over the exposure).

    Attributes
    ----------
    name, description, origin, response_file : str
    source_counts, background_counts : float
        Selected source and background events in the band during the exposure.
    source_rate_hz, background_rate_hz : float
    effective_modulation_factor, effective_modulation_factor_err : float
        μ weighted by the detected source spectrum in the band, and its standard error from the errors of the
        response's μ points (the MDP99's relative error is the same).
    mdp99 : float
        MDP at 99 % confidence for the exposure (a fraction; NaN when it cannot be reached: no counts, μ <= 0).
    exposure_s, target_mdp, exposure_for_target_s : float
        The exposure, the target (NaN: none given) and the exposure that reaches it.
    bands : tuple of BandResult
        MDP99 per sub-band.
    events_per_s, bytes_per_event, bytes_per_s, bytes_per_day, gb_per_day : float
        Data written by the readout (every triggered event over ``data_range_kev``, and background).
    compressed_fraction, bytes_per_day_compressed, gb_per_day_compressed : float
    data_range_kev : (float, float)
    background_region_cm2 : float
    notes : tuple of str
    energy_kev, detected_counts_per_kev : ndarray
        The detected source spectrum in the band (for figures; not in :meth:`to_dict`).
    response : DetectorResponse
        The response used (not in :meth:`to_dict`).
    """

    name: str
    description: str
    origin: str
    response_file: str
    source_counts: float
    background_counts: float
    source_rate_hz: float
    background_rate_hz: float
    effective_modulation_factor: float
    effective_modulation_factor_err: float
    mdp99: float
    exposure_s: float
    target_mdp: float
    exposure_for_target_s: float
    bands: tuple
    events_per_s: float
    bytes_per_event: float
    bytes_per_s: float
    bytes_per_day: float
    gb_per_day: float
    compressed_fraction: float
    bytes_per_day_compressed: float
    gb_per_day_compressed: float
    data_range_kev: tuple
    background_region_cm2: float
    notes: tuple = ()
    energy_kev: np.ndarray = field(repr=False, default=None)
    detected_counts_per_kev: np.ndarray = field(repr=False, default=None)
    response: DetectorResponse = field(repr=False, default=None)

    def mdp99_at(self, exposure_s) -> np.ndarray:
        """MDP99 for other exposures (source and background counts both grow with the exposure: ∝ T^-1/2)."""
        return self.mdp99 * np.sqrt(self.exposure_s / np.asarray(exposure_s, dtype=np.float64))

    def exposure_for(self, mdp) -> np.ndarray:
        """Exposure, s, that reaches each MDP99."""
        return self.exposure_s * (self.mdp99 / np.asarray(mdp, dtype=np.float64)) ** 2

    def to_dict(self) -> dict:
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
               if f.name not in ("energy_kev", "detected_counts_per_kev", "response", "bands")}
        out["bands"] = [b.to_dict() for b in self.bands]
        return _clean(out)


@dataclass(frozen=True)
class ObservationPlan:
    """The plan of one observation for several designs: ``designs[i]`` is a :class:`DesignPlan`."""

    observation: Observation
    designs: tuple

    def __getitem__(self, name: str) -> DesignPlan:
        for plan in self.designs:
            if plan.name == name:
                return plan
        raise KeyError(f"no design {name!r}; designs: {[p.name for p in self.designs]}")

    def to_dict(self) -> dict:
        """What ``trackfit plan --json`` writes: the observation and, per design name, its :class:`DesignPlan`."""
        from . import __version__
        from .io._partial import now_utc

        return {"trackfit_version": __version__, "created_utc": now_utc(),
                "observation": _clean(self.observation.to_dict()),
                "designs": {plan.name: plan.to_dict() for plan in self.designs}}

    def write_json(self, path) -> Path:
        from .io.whole_files import write_text_whole

        return write_text_whole(path, json.dumps(self.to_dict(), indent=2))

    def to_markdown(self) -> str:
        target = self.observation.target_mdp
        header = ["design", "source counts", "background counts", "μ_eff", "MDP99",
                  f"exposure for MDP99 {100 * target:g} %" if target else "exposure for target", "events/s",
                  "GB/day (raw)", f"GB/day (×{self.observation.compressed_fraction:g})"]
        lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        for p in self.designs:
            mdp = "—" if not math.isfinite(p.mdp99) else f"{100 * p.mdp99:.2f} %"
            t = "—" if not math.isfinite(p.exposure_for_target_s) else f"{p.exposure_for_target_s:.3g} s"
            mu = f"{p.effective_modulation_factor:.3f} ± {p.effective_modulation_factor_err:.3f}"
            lines.append("| " + " | ".join([p.name, f"{p.source_counts:.4g}", f"{p.background_counts:.4g}", mu, mdp, t,
                                            f"{p.events_per_s:.3g}", f"{p.gb_per_day:.3g}",
                                            f"{p.gb_per_day_compressed:.3g}"]) + " |")
        return "\n".join(lines)

    def bands_markdown(self) -> str:
        """MDP99 per sub-band and design."""
        edges = self.observation.sub_band_edges_kev
        header = ["design"] + [f"{a:.3g}-{b:.3g} keV" for a, b in zip(edges[:-1], edges[1:], strict=True)]
        lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        for p in self.designs:
            cells = ["—" if not math.isfinite(b.mdp99) else f"{100 * b.mdp99:.2f} %" for b in p.bands]
            lines.append("| " + " | ".join([p.name, *cells]) + " |")
        return "\n".join(lines)

    def summary(self) -> str:
        lines = [f"Observation: {self.observation.describe()}", self.to_markdown(), "", "MDP99 per band:",
                 self.bands_markdown()]
        for p in self.designs:
            lines += [f"note ({p.name}): {note}" for note in p.notes]
        return "\n".join(lines)

    def __repr__(self):
        return self.summary()

    def _repr_html_(self):
        return f"<pre>{html.escape(self.summary())}</pre>"


# ---------------------------------------------------------------------------------------------- computing
def _grid(lo: float, hi: float, *extra) -> np.ndarray:
    """Integration energies: 2000 log-spaced points plus every tabulated point inside (edges stay sharp)."""
    points = [np.geomspace(lo, hi, 2000)]
    points += [np.asarray(e, dtype=np.float64)[(np.asarray(e) > lo) & (np.asarray(e) < hi)] for e in extra]
    return np.unique(np.concatenate(points))


def _integral(y, x) -> float:
    from scipy.integrate import trapezoid

    return float(trapezoid(y, x))


def _mdp(mu: float, source: float, background: float) -> float:
    if not (source > 0 and mu > 0):
        return math.nan
    return mdp99(modulation_factor=min(mu, 1.0), rate_src_hz=source, rate_bkg_hz=background, exposure_s=1.0)


def _band(response: DetectorResponse, obs: Observation, lo: float, hi: float, region_cm2: float):
    energy = _grid(lo, hi, response.absorption["energy_kev"], obs.spectrum_energies_kev, obs.area_energies_kev)
    rate = obs.photon_flux(energy) * obs.area(energy) * response.efficiency(energy)   # counts s^-1 keV^-1
    source_rate = _integral(rate, energy)
    mu = _integral(rate * response.modulation_factor(energy), energy) / source_rate if source_rate > 0 else math.nan
    background_rate = obs.background_per_cm2_s_kev * region_cm2 * (hi - lo)
    return energy, rate, source_rate, background_rate, mu


def _mu_error(response: DetectorResponse, energy, rate) -> float:
    """Standard error of μ_eff from the errors of the grid points: μ_eff is linear in the grid values μ_k,
    μ_eff = Σ_k c_k μ_k, with c_k the spectrum-weighted integral of grid point k's interpolation weight."""
    total = _integral(rate, energy)
    if not total > 0:
        return math.nan
    log_e, grid = np.log(energy), np.log(response.energy_kev)
    coefficients = np.array([_integral(rate * np.interp(log_e, grid, np.eye(grid.size)[k]), energy)
                             for k in range(grid.size)]) / total
    errors = np.nan_to_num(response["modulation_factor_err"], nan=0.0)
    return float(np.sqrt(np.sum((coefficients * errors) ** 2)))


def _check_covers(obs: Observation, response: DetectorResponse, label: str):
    lo, hi = obs.band_kev
    r_lo, r_hi = response.energy_range_kev
    if lo < r_lo * (1 - 1e-9) or hi > r_hi * (1 + 1e-9):
        raise ValueError(f"band {lo:g}-{hi:g} keV is not inside the {r_lo:g}-{r_hi:g} keV that response {label} "
                         "covers: choose a band inside it or rebuild the response with energies that cover the band")
    for what, (t_lo, t_hi) in (("spectrum table", obs.spectrum_range_kev), ("area table", obs.area_range_kev)):
        if lo < t_lo or hi > t_hi:
            raise ValueError(f"band {lo:g}-{hi:g} keV is not inside the {t_lo:g}-{t_hi:g} keV of the {what}")


def plan_design(response: DetectorResponse, obs: Observation, *, label: str | None = None,
                response_file: str = "") -> DesignPlan:
    """The :class:`DesignPlan` of one response (see the module docstring for the method).

    Raises
    ------
    ValueError
        The band is not inside the response's range or a table's range.
    """
    label = label or response.name
    _check_covers(obs, response, f"'{response_file or label}'")
    T = obs.exposure_s
    notes = list(response.notes)
    region = obs.background_region_cm2 if obs.background_region_cm2 is not None else response.chip_area_cm2
    if obs.background_region_cm2 is None and obs.background_per_cm2_s_kev > 0:
        notes.append(f"background region: the whole chip, {region:.3g} cm² (set background_region_cm2 for a smaller "
                     "source region)")
    energy, rate, source_rate, background_rate, mu = _band(response, obs, *obs.band_kev, region)
    mu_err = _mu_error(response, energy, rate)
    mdp = _mdp(mu, source_rate * T, background_rate * T)
    if not math.isfinite(mdp):
        notes.append("no MDP: no detected source counts or an effective modulation factor <= 0 in the band")
    elif mu < 3 * mu_err:
        notes.append(f"μ_eff = {mu:.3f} ± {mu_err:.3f} is within 3 errors of zero: the MDP99 is not determined by this "
                     "response's statistics (more events per energy, or a band where the design modulates)")
    target = obs.target_mdp
    exposure_target = T * (mdp / target) ** 2 if target is not None and math.isfinite(mdp) else math.nan
    edges = obs.sub_band_edges_kev
    bands = []
    for a, b in zip(edges[:-1], edges[1:], strict=True):
        _, _, s, bg, m = _band(response, obs, float(a), float(b), region)
        bands.append(BandResult(low_kev=float(a), high_kev=float(b), source_counts=s * T, background_counts=bg * T,
                                effective_modulation_factor=m, mdp99=_mdp(m, s * T, bg * T)))
    # data volume: every triggered event over the range the response, spectrum and area all cover
    d_lo = max(response.energy_range_kev[0], obs.spectrum_range_kev[0], obs.area_range_kev[0])
    d_hi = min(response.energy_range_kev[1], obs.spectrum_range_kev[1], obs.area_range_kev[1])
    d_energy = _grid(d_lo, d_hi, response.absorption["energy_kev"], response.energy_kev, obs.spectrum_energies_kev,
                     obs.area_energies_kev)
    triggered = obs.photon_flux(d_energy) * obs.area(d_energy) * response.efficiency(d_energy, selected=False)
    size = response.bytes_per_event(d_energy)
    bkg_events = obs.background_per_cm2_s_kev * region * (d_hi - d_lo)
    bkg_size = _integral(size, d_energy) / (d_hi - d_lo)
    events_per_s = _integral(triggered, d_energy) + bkg_events
    bytes_per_s = _integral(triggered * size, d_energy) + bkg_events * bkg_size
    per_day = bytes_per_s * SECONDS_PER_DAY
    return DesignPlan(
        name=label, description=response.description, origin=response.origin, response_file=str(response_file),
        source_counts=source_rate * T, background_counts=background_rate * T, source_rate_hz=source_rate,
        background_rate_hz=background_rate, effective_modulation_factor=mu,
        effective_modulation_factor_err=mu_err, mdp99=mdp, exposure_s=T,
        target_mdp=math.nan if target is None else target, exposure_for_target_s=exposure_target,
        bands=tuple(bands), events_per_s=events_per_s,
        bytes_per_event=bytes_per_s / events_per_s if events_per_s > 0 else math.nan, bytes_per_s=bytes_per_s,
        bytes_per_day=per_day, gb_per_day=per_day / 1e9, compressed_fraction=obs.compressed_fraction,
        bytes_per_day_compressed=per_day * obs.compressed_fraction,
        gb_per_day_compressed=per_day * obs.compressed_fraction / 1e9, data_range_kev=(d_lo, d_hi),
        background_region_cm2=region, notes=tuple(notes), energy_kev=energy, detected_counts_per_kev=rate * T,
        response=response)


def plan_observation(responses: Sequence, observation: Observation, *, names: Sequence[str] | None = None
                     ) -> ObservationPlan:
    """Plan ``observation`` with each response (a :class:`~trackfit.response.DetectorResponse` or a response file).

    Parameters
    ----------
    responses : sequence of DetectorResponse or path
    observation : Observation
    names : sequence of str, optional
        Labels (default: each response's name; repeated names get ``-2``, ``-3``, ...).

    Returns
    -------
    ObservationPlan

    Raises
    ------
    ValueError
        A band a response (or a table of the observation) does not cover; names the response file.
    """
    if not responses:
        raise ValueError("give at least one detector response")
    loaded, files = [], []
    for item in responses:
        if isinstance(item, DetectorResponse):
            loaded.append(item)
            files.append("")
        else:
            loaded.append(DetectorResponse.load(item))
            files.append(str(item))
    labels = list(names) if names is not None else [r.name for r in loaded]
    if len(labels) != len(loaded):
        raise ValueError(f"{len(labels)} names for {len(loaded)} responses")
    seen: dict[str, int] = {}
    unique = []
    for label in labels:
        seen[label] = seen.get(label, 0) + 1
        unique.append(label if seen[label] == 1 else f"{label}-{seen[label]}")
    plans = tuple(plan_design(r, observation, label=label, response_file=f)
                  for r, label, f in zip(loaded, unique, files, strict=True))
    return ObservationPlan(observation=observation, designs=plans)

