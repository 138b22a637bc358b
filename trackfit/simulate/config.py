"""Configuration of the track simulator: frozen dataclasses, TOML in and out, named presets.

A :class:`SimConfig` holds one table per stage of the detector: ``source``, ``window``, ``gas``, ``drift``,
``multiplier`` and ``readout``. Change a value with :func:`dataclasses.replace`; read and write TOML with
:meth:`SimConfig.from_toml` / :meth:`SimConfig.to_toml`. Unknown keys are rejected with the list of valid ones.

Presets are TOML files shipped in ``trackfit/presets/``: :func:`list_presets`, :func:`load_preset`.
"""

import dataclasses
import math
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

from .. import _toml
from ..hexgrid import HexGrid

__all__ = [
    "SourceConfig",
    "WindowConfig",
    "GasConfig",
    "DriftConfig",
    "MultiplierConfig",
    "ReadoutConfig",
    "SimConfig",
    "ConfigError",
    "list_presets",
    "load_preset",
    "SPECTRA",
    "BEAMS",
]

SPECTRA = ("lines", "flat", "powerlaw", "table")
#: photoabsorption tables of xraydb (the same tuple as ``gas.CROSS_SECTION_TABLES``; config does not import xraydb)
CROSS_SECTION_TABLES = ("elam", "chantler")
BEAMS = ("pencil", "gaussian", "flat")


class ConfigError(ValueError):
    """A simulation config that cannot be used; the message names the offending key (``table.key``)."""


def _check(condition, name, requirement, value):
    if not condition:
        raise ConfigError(f"'{name}' must be {requirement} (got {value!r})")


def _finite(name, value, *, positive=False, non_negative=False):
    _check(isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value),
           name, "a finite number", value)
    if positive:
        _check(value > 0, name, "> 0", value)
    if non_negative:
        _check(value >= 0, name, ">= 0", value)


def _set(obj, name, value):
    object.__setattr__(obj, name, value)


@dataclass(frozen=True, kw_only=True)
class SourceConfig:
    """Photon source: spectrum, polarization, beam shape and rate.

    Parameters
    ----------
    spectrum : {"lines", "flat", "powerlaw", "table"}
        ``lines``: the ``line_energies_kev`` with relative ``line_weights`` (photons emitted);
        ``flat`` / ``powerlaw``: a continuum ``dN/dE = const`` or ``∝ E**-photon_index`` between ``e_min_kev`` and
        ``e_max_kev``; ``table``: a piecewise-linear ``dN/dE`` through ``(table_energies_kev, table_weights)``.
    polarization_degree : float
        0 (unpolarized) to 1.
    polarization_angle_deg : float
        Direction of the polarization vector in the detector frame, from +x towards +y, degrees.
    beam : {"pencil", "gaussian", "flat"}
        Pencil beam at ``beam_centre_mm``; Gaussian spot of ``beam_sigma_mm``; or flat field over a rectangle of
        ``field_size_mm`` (width, height) centred on ``beam_centre_mm``. The beam is at normal incidence.
    rate_hz : float
        Rate of photons reaching the window, s⁻¹ (event times are a Poisson process thinned by the efficiency).
    """

    spectrum: str = "lines"
    line_energies_kev: tuple[float, ...] = (5.9,)
    line_weights: tuple[float, ...] = (1.0,)
    e_min_kev: float = 2.0
    e_max_kev: float = 8.0
    photon_index: float = 2.0
    table_energies_kev: tuple[float, ...] = ()
    table_weights: tuple[float, ...] = ()
    polarization_degree: float = 0.0
    polarization_angle_deg: float = 0.0
    beam: str = "pencil"
    beam_centre_mm: tuple[float, ...] = (0.0, 0.0)
    beam_sigma_mm: float = 0.1
    field_size_mm: tuple[float, ...] = (10.0, 10.0)
    rate_hz: float = 1000.0

    def __post_init__(self):
        _check(self.spectrum in SPECTRA, "source.spectrum", f"one of {SPECTRA}", self.spectrum)
        _check(self.beam in BEAMS, "source.beam", f"one of {BEAMS}", self.beam)
        for name in ("line_energies_kev", "line_weights", "table_energies_kev", "table_weights",
                     "beam_centre_mm", "field_size_mm"):
            values = tuple(float(v) for v in getattr(self, name))
            for v in values:
                _finite(f"source.{name}", v)
            _set(self, name, values)
        if self.spectrum == "lines":
            _check(len(self.line_energies_kev) >= 1, "source.line_energies_kev", "a non-empty list",
                   self.line_energies_kev)
            _check(len(self.line_weights) == len(self.line_energies_kev), "source.line_weights",
                   f"a list of {len(self.line_energies_kev)} weights (one per line)", self.line_weights)
            _check(all(e > 0 for e in self.line_energies_kev), "source.line_energies_kev", "all > 0",
                   self.line_energies_kev)
            _check(all(w >= 0 for w in self.line_weights) and sum(self.line_weights) > 0,
                   "source.line_weights", ">= 0 with a positive sum", self.line_weights)
        if self.spectrum in ("flat", "powerlaw"):
            _finite("source.e_min_kev", self.e_min_kev, positive=True)
            _finite("source.e_max_kev", self.e_max_kev, positive=True)
            _check(self.e_max_kev > self.e_min_kev, "source.e_max_kev", f"> e_min_kev = {self.e_min_kev}",
                   self.e_max_kev)
            _finite("source.photon_index", self.photon_index)
        if self.spectrum == "table":
            e, w = self.table_energies_kev, self.table_weights
            _check(len(e) >= 2 and len(w) == len(e), "source.table_weights",
                   f"a list as long as table_energies_kev ({len(e)} >= 2 entries)", w)
            _check(all(b > a for a, b in zip(e, e[1:], strict=False)) and e[0] > 0,
                   "source.table_energies_kev", "positive and increasing", e)
            _check(all(v >= 0 for v in w) and sum(w) > 0, "source.table_weights", ">= 0 with a positive sum", w)
        _finite("source.polarization_degree", self.polarization_degree)
        _check(0 <= self.polarization_degree <= 1, "source.polarization_degree", "between 0 and 1",
               self.polarization_degree)
        _finite("source.polarization_angle_deg", self.polarization_angle_deg)
        _check(len(self.beam_centre_mm) == 2, "source.beam_centre_mm", "a list [x_mm, y_mm]", self.beam_centre_mm)
        _check(len(self.field_size_mm) == 2 and min(self.field_size_mm) >= 0, "source.field_size_mm",
               "a list [width_mm, height_mm] of sizes >= 0", self.field_size_mm)
        _finite("source.beam_sigma_mm", self.beam_sigma_mm, non_negative=True)
        _finite("source.rate_hz", self.rate_hz, positive=True)

    @property
    def energy_range_kev(self) -> tuple[float, float]:
        """Lowest and highest photon energy the source can emit."""
        if self.spectrum == "lines":
            return min(self.line_energies_kev), max(self.line_energies_kev)
        if self.spectrum == "table":
            return self.table_energies_kev[0], self.table_energies_kev[-1]
        return self.e_min_kev, self.e_max_kev


@dataclass(frozen=True, kw_only=True)
class WindowConfig:
    """Entrance window: a layer of ``material`` (chemical formula, or ``"none"``) of ``thickness_um``."""

    material: str = "Be"
    density_g_cm3: float = 1.848
    thickness_um: float = 50.0

    def __post_init__(self):
        _check(isinstance(self.material, str) and self.material.strip() != "", "window.material",
               "a chemical formula or 'none'", self.material)
        _finite("window.density_g_cm3", self.density_g_cm3, positive=True)
        _finite("window.thickness_um", self.thickness_um, non_negative=True)


@dataclass(frozen=True, kw_only=True)
class GasConfig:
    """Gas mixture and absorption gap.

    Parameters
    ----------
    molecules : list of str
        Molecular formulas (``"He"``, ``"C2H6O"``, ``"Ar"``, ``"CO2"``, ...).
    fractions : list of float
        Molar (volume) fractions, one per molecule; they must add up to 1.
    pressure_atm, temperature_k : float
        Ideal gas.
    gap_cm : float
        Thickness of the absorption and drift gap between window and multiplier.
    w_value_ev : float
        Mean energy per ionization electron of the mixture.
    fano_factor : float
        Fano factor of the ionization count (0 <= F < 1).
    cross_sections : {"elam", "chantler"}
        Photoabsorption table of xraydb used for the gas (conversion and fluorescence absorption); the two
        differ by a few per cent (``docs/simulator.md``). The window always uses Elam's.
    """

    molecules: tuple[str, ...] = ("He", "C2H6O")
    fractions: tuple[float, ...] = (0.2, 0.8)
    pressure_atm: float = 1.0
    temperature_k: float = 293.15
    gap_cm: float = 1.0
    w_value_ev: float = 24.5
    fano_factor: float = 0.2
    cross_sections: str = "elam"

    def __post_init__(self):
        _set(self, "molecules", tuple(str(m) for m in self.molecules))
        _set(self, "fractions", tuple(float(f) for f in self.fractions))
        _check(len(self.molecules) >= 1, "gas.molecules", "a non-empty list of formulas", self.molecules)
        _check(len(self.fractions) == len(self.molecules), "gas.fractions",
               f"a list of {len(self.molecules)} fractions (one per molecule)", self.fractions)
        _check(all(f > 0 for f in self.fractions), "gas.fractions", "all > 0", self.fractions)
        _check(abs(sum(self.fractions) - 1.0) < 1e-6, "gas.fractions", "fractions adding up to 1",
               self.fractions)
        _finite("gas.pressure_atm", self.pressure_atm, positive=True)
        _finite("gas.temperature_k", self.temperature_k, positive=True)
        _finite("gas.gap_cm", self.gap_cm, positive=True)
        _finite("gas.w_value_ev", self.w_value_ev, positive=True)
        _finite("gas.fano_factor", self.fano_factor, non_negative=True)
        _check(self.fano_factor < 1, "gas.fano_factor", "< 1", self.fano_factor)
        _check(self.cross_sections in CROSS_SECTION_TABLES, "gas.cross_sections", f"one of {CROSS_SECTION_TABLES}",
               self.cross_sections)


@dataclass(frozen=True, kw_only=True)
class DriftConfig:
    """Drift to the multiplier: transverse diffusion ``sigma = D_T * sqrt(drift length)``.

    ``D_T`` follows from the drift field, the gas temperature and the characteristic energy ε_k of the mixture,
    ``D_T = sqrt(2 ε_k / (e E))``, never below the thermal limit ε_k = kT
    (:func:`trackfit.simulate.transport.transverse_diffusion`).

    Parameters
    ----------
    field_v_per_cm : float
        Drift field, V/cm.
    characteristic_energy_ratio : float
        ε_k / kT of the mixture (>= 1); 0 takes the value of the mixture's entry in
        :data:`trackfit.simulate.transport.MIXTURE_TRANSPORT`.
    diffusion_um_per_sqrt_cm : float
        Transverse diffusion coefficient set by hand, µm/√cm (for toy studies; it is not floored at the thermal
        limit); 0 computes it from the field as above.
    """

    field_v_per_cm: float = 2000.0
    characteristic_energy_ratio: float = 0.0
    diffusion_um_per_sqrt_cm: float = 0.0

    def __post_init__(self):
        _finite("drift.field_v_per_cm", self.field_v_per_cm, positive=True)
        _finite("drift.characteristic_energy_ratio", self.characteristic_energy_ratio, non_negative=True)
        _check(self.characteristic_energy_ratio == 0 or self.characteristic_energy_ratio >= 1,
               "drift.characteristic_energy_ratio", "0 (from the mixture) or >= 1 (the thermal limit is 1)",
               self.characteristic_energy_ratio)
        _finite("drift.diffusion_um_per_sqrt_cm", self.diffusion_um_per_sqrt_cm, non_negative=True)


@dataclass(frozen=True, kw_only=True)
class MultiplierConfig:
    """Electron multiplier and the gap to the chip.

    Parameters
    ----------
    gain : float
        Mean avalanche size per drift electron.
    polya_theta : float
        Polya parameter θ (relative gain variance 1/(1+θ)).
    transfer_spread_um : float
        Gaussian spread (sigma) added to every electron between the multiplier and the chip.
    gain_map_rms : float
        Relative RMS of a smooth per-pixel gain map (0: uniform gain). The map is drawn once per run.
    gain_map_scale_mm : float
        Correlation length of the gain map.
    gain_cell_rms : float
        Relative RMS of a cell structure of the gain (independent deviations on square cells); 0: none.
    gain_cell_mm : float
        Side of the cells.
    gain_map_seed : int
        Seed of the gain map (smooth part and cells): the map belongs to the detector, so runs with different
        seeds share it.
    gain_drift_fraction, gain_drift_time_s : float
        Slow gain drift ``G(t) = G0 * (1 - gain_drift_fraction * (1 - exp(-t / gain_drift_time_s)))``
        (charging of the multiplier towards an equilibrium); 0 switches it off.

    The gain model is described in :mod:`trackfit.simulate.gain`.
    """

    gain: float = 2000.0
    polya_theta: float = 1.0
    transfer_spread_um: float = 10.0
    gain_map_rms: float = 0.0
    gain_map_scale_mm: float = 1.0
    gain_cell_rms: float = 0.0
    gain_cell_mm: float = 2.0
    gain_map_seed: int = 0
    gain_drift_fraction: float = 0.0
    gain_drift_time_s: float = 3600.0

    def __post_init__(self):
        _finite("multiplier.gain", self.gain, positive=True)
        _finite("multiplier.polya_theta", self.polya_theta)
        _check(self.polya_theta > -1, "multiplier.polya_theta", "> -1", self.polya_theta)
        _finite("multiplier.transfer_spread_um", self.transfer_spread_um, non_negative=True)
        _finite("multiplier.gain_map_rms", self.gain_map_rms, non_negative=True)
        _check(self.gain_map_rms < 0.5, "multiplier.gain_map_rms", "< 0.5", self.gain_map_rms)
        _finite("multiplier.gain_map_scale_mm", self.gain_map_scale_mm, positive=True)
        _finite("multiplier.gain_cell_rms", self.gain_cell_rms, non_negative=True)
        _check(self.gain_cell_rms < 0.5, "multiplier.gain_cell_rms", "< 0.5", self.gain_cell_rms)
        _finite("multiplier.gain_cell_mm", self.gain_cell_mm, positive=True)
        _check(isinstance(self.gain_map_seed, int) and not isinstance(self.gain_map_seed, bool)
               and self.gain_map_seed >= 0, "multiplier.gain_map_seed", "an integer >= 0", self.gain_map_seed)
        _finite("multiplier.gain_drift_fraction", self.gain_drift_fraction, non_negative=True)
        _check(self.gain_drift_fraction < 1, "multiplier.gain_drift_fraction", "< 1", self.gain_drift_fraction)
        _finite("multiplier.gain_drift_time_s", self.gain_drift_time_s, positive=True)


@dataclass(frozen=True, kw_only=True)
class ReadoutConfig:
    """The pixel chip and its readout.

    Parameters
    ----------
    pitch_mm, n_columns, n_rows, shifted_rows
        Chip geometry, as :class:`~trackfit.HexGrid`.
    noise_electrons : float
        Electronic noise per pixel (ENC, electrons RMS).
    electrons_per_adc : float
        Conversion of collected charge to ADC counts.
    trigger_threshold_electrons : float
        A pixel whose charge (with noise) exceeds this takes part in the trigger.
    trigger_min_pixels : int
        The chip triggers when at least this many pixels are above the trigger threshold.
    roi_margin_pixels : int
        The region of interest is the bounding rectangle of the triggering pixels widened by this margin on
        every side, clipped to the chip.
    zero_suppression_electrons : float
        ROI pixels whose charge (with noise) is below this are written as 0 (0: off, every pixel keeps its noise).
        Data-acquisition-side sparsification that makes files much smaller.
    """

    pitch_mm: float = 0.050
    n_columns: int = 300
    n_rows: int = 352
    shifted_rows: str = "odd"
    noise_electrons: float = 50.0
    electrons_per_adc: float = 25.0
    trigger_threshold_electrons: float = 1000.0
    trigger_min_pixels: int = 1
    roi_margin_pixels: int = 3
    zero_suppression_electrons: float = 0.0

    def __post_init__(self):
        try:
            HexGrid(pitch_mm=self.pitch_mm, n_columns=self.n_columns, n_rows=self.n_rows,
                    shifted_rows=self.shifted_rows)
        except ValueError as err:
            raise ConfigError(f"readout: {err}") from None
        _finite("readout.noise_electrons", self.noise_electrons, non_negative=True)
        _finite("readout.electrons_per_adc", self.electrons_per_adc, positive=True)
        _finite("readout.trigger_threshold_electrons", self.trigger_threshold_electrons, positive=True)
        _finite("readout.zero_suppression_electrons", self.zero_suppression_electrons, non_negative=True)
        for name, minimum in (("trigger_min_pixels", 1), ("roi_margin_pixels", 0)):
            value = getattr(self, name)
            _check(isinstance(value, int) and not isinstance(value, bool) and value >= minimum,
                   f"readout.{name}", f"an integer >= {minimum}", value)

    @property
    def grid(self) -> HexGrid:
        return HexGrid(pitch_mm=self.pitch_mm, n_columns=self.n_columns, n_rows=self.n_rows,
                       shifted_rows=self.shifted_rows)


#: table name -> dataclass, in file order
SECTIONS = {
    "source": SourceConfig,
    "window": WindowConfig,
    "gas": GasConfig,
    "drift": DriftConfig,
    "multiplier": MultiplierConfig,
    "readout": ReadoutConfig,
}


def _coerce(table: str, cls, values: dict):
    """Build section ``cls`` from a dict of TOML values, rejecting unknown keys and wrong types."""
    if not isinstance(values, dict):
        raise ConfigError(f"[{table}] must be a table (got {values!r})")
    fields = {f.name: f for f in dataclasses.fields(cls)}
    unknown = sorted(set(values) - set(fields))
    if unknown:
        raise ConfigError(f"unknown key{'s' if len(unknown) > 1 else ''} "
                          f"{', '.join(f'{table}.{k}' for k in unknown)}; valid keys of [{table}]: "
                          f"{', '.join(fields)}")
    kwargs = {}
    for key, value in values.items():
        name = f"{table}.{key}"
        kind = fields[key].type
        if kind is float:
            _check(isinstance(value, int | float) and not isinstance(value, bool), name, "a number", value)
            value = float(value)
        elif kind is int:
            _check(isinstance(value, int) and not isinstance(value, bool), name, "an integer", value)
        elif kind is str:
            _check(isinstance(value, str), name, "a string", value)
        elif kind == tuple[float, ...]:
            _check(isinstance(value, list | tuple)
                   and all(isinstance(v, int | float) and not isinstance(v, bool) for v in value),
                   name, "a list of numbers", value)
            value = tuple(float(v) for v in value)
        elif kind == tuple[str, ...]:
            _check(isinstance(value, list | tuple) and all(isinstance(v, str) for v in value), name,
                   "a list of strings", value)
            value = tuple(value)
        kwargs[key] = value
    return cls(**kwargs)


@dataclass(frozen=True, kw_only=True)
class SimConfig:
    """Complete configuration of a simulation run.

    Examples
    --------
    >>> import dataclasses
    >>> config = load_preset("hedme-1atm-1cm")
    >>> config.gas.molecules
    ('He', 'C2H6O')
    >>> polarized = config.with_monochromatic(energy_kev=3.7, polarization_degree=1.0)
    >>> SimConfig.from_toml(polarized.to_toml()) == polarized
    True
    """

    description: str = ""
    source: SourceConfig = field(default_factory=SourceConfig)
    window: WindowConfig = field(default_factory=WindowConfig)
    gas: GasConfig = field(default_factory=GasConfig)
    drift: DriftConfig = field(default_factory=DriftConfig)
    multiplier: MultiplierConfig = field(default_factory=MultiplierConfig)
    readout: ReadoutConfig = field(default_factory=ReadoutConfig)

    def __post_init__(self):
        _check(isinstance(self.description, str), "description", "a string", self.description)
        for name, cls in SECTIONS.items():
            _check(isinstance(getattr(self, name), cls), name, f"a {cls.__name__}", getattr(self, name))

    # ------------------------------------------------------------------ dict / TOML
    def to_dict(self) -> dict:
        """Nested dict of plain Python values (lists for tuples), in TOML table order."""
        out = {"description": self.description}
        for name in SECTIONS:
            out[name] = {k: list(v) if isinstance(v, tuple) else v
                         for k, v in dataclasses.asdict(getattr(self, name)).items()}
        return out

    @classmethod
    def from_dict(cls, data: dict) -> "SimConfig":
        """Inverse of :meth:`to_dict`; missing keys take their defaults, unknown keys raise :class:`ConfigError`."""
        valid = ["description", *SECTIONS]
        unknown = sorted(set(data) - set(valid))
        if unknown:
            raise ConfigError(f"unknown key{'s' if len(unknown) > 1 else ''} {', '.join(unknown)}; "
                              f"valid top-level keys and tables: {', '.join(valid)}")
        kwargs = {name: _coerce(name, section, data[name]) for name, section in SECTIONS.items() if name in data}
        if "description" in data:
            kwargs["description"] = data["description"]
        return cls(**kwargs)

    def to_toml(self) -> str:
        """The config as TOML text (every key written, defaults included)."""
        return _toml.dumps(self.to_dict())

    @classmethod
    def from_toml(cls, text: str) -> "SimConfig":
        return cls.from_dict(_toml.parse(text, source="simulation config", error=ConfigError))

    @classmethod
    def load(cls, path) -> "SimConfig":
        """Read a TOML file."""
        path = Path(path)
        if not path.exists():
            raise FileNotFoundError(f"simulation config '{path}' does not exist")
        try:
            return cls.from_toml(path.read_text())
        except ConfigError as err:
            raise ConfigError(f"{path}: {err}") from None

    def save(self, path) -> Path:
        path = Path(path)
        path.write_text(self.to_toml())
        return path

    # ------------------------------------------------------------------ convenience
    def with_monochromatic(self, *, energy_kev=None, polarization_degree=None,
                           polarization_angle_deg=None) -> "SimConfig":
        """A copy whose source is replaced where a value is given (a single line when ``energy_kev`` is set)."""
        changes = {}
        if energy_kev is not None:
            changes.update(spectrum="lines", line_energies_kev=(float(energy_kev),), line_weights=(1.0,))
        if polarization_degree is not None:
            changes["polarization_degree"] = float(polarization_degree)
        if polarization_angle_deg is not None:
            changes["polarization_angle_deg"] = float(polarization_angle_deg)
        if not changes:
            return self
        return dataclasses.replace(self, source=dataclasses.replace(self.source, **changes))

    @property
    def grid(self) -> HexGrid:
        """The chip of the readout."""
        return self.readout.grid

    @property
    def nominal_counts_per_kev(self) -> float:
        """ADC counts per keV of deposited energy that the design gives on average: gas gain x 1000 / W (eV) /
        electrons per ADC count (pixel gain maps and gain drift average to 1; charge below the reconstruction
        threshold makes the measured scale a little lower)."""
        return self.multiplier.gain * 1000.0 / self.gas.w_value_ev / self.readout.electrons_per_adc


# ---------------------------------------------------------------------- presets
def _preset_files() -> dict:
    folder = resources.files("trackfit") / "presets"
    return {p.name[:-5]: p for p in folder.iterdir() if p.name.endswith(".toml")}


def list_presets() -> list[str]:
    """Names of the presets shipped with trackfit (``trackfit/presets/*.toml``)."""
    return sorted(_preset_files())


def load_preset(name: str) -> SimConfig:
    """The :class:`SimConfig` of a named preset.

    Raises
    ------
    KeyError
        Unknown name; the message lists the known ones.
    """
    files = _preset_files()
    if name not in files:
        raise KeyError(f"unknown preset {name!r}; known presets: {', '.join(sorted(files))}")
    try:
        return SimConfig.from_toml(files[name].read_text())
    except ConfigError as err:
        raise ConfigError(f"preset {name!r}: {err}") from None
