"""The detector response of a design: what it detects, how well it measures polarization, and what it costs in bytes.

A :class:`DetectorResponse` holds, on an energy grid, the detection efficiency (window transmission × gas
absorption from xraydb, × the share of converted photons that trigger, × the share of triggered events that survive
the analysis selection), the modulation factor μ with its error, the energy resolution, the region-of-interest
(ROI) size per event (mean and quantiles) and the bytes per event in the raw format (``docs/raw-format.md``); plus a
finely tabulated window transmission and gas absorption for integrating spectra across absorption edges. It is
made by :func:`trackfit.response_builder.build_response` (simulated beams through a design) or
:func:`trackfit.response_builder.response_from_calibration` (a built detector's calibration file and runs), saved
in our HDF5 layout (``trackfit_format = "response"``, ``docs/response-format.md``) and read back with
:meth:`DetectorResponse.load`. The planner (:mod:`trackfit.planner`) turns it into MDPs, exposures and data volumes.

Between grid points the per-event quantities are interpolated linearly in ln E; the absorption table linearly in
E (it brackets every absorption edge). Outside the grid nothing is extrapolated: the planner refuses bands the
response does not cover.

Examples
--------
>>> from trackfit.response import raw_bytes_per_event
>>> raw_bytes_per_event(100)        # 100 int16 pixel values + roi (4 x int32) + start, time_s, trigger_id (8 B each)
240.0
"""

from __future__ import annotations

import dataclasses
import html
import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .io._partial import PartialFileWriter
from .io.errors import FileFormatError
from .io.kinds import open_kind
from .io.raw import EVENT_DATASETS
from .io.structure import CheckedFile, real_attribute, text_attribute
from .recon import ReconConfig
from .simulate import SimConfig

__all__ = ["RESPONSE_FORMAT", "RESPONSE_FORMAT_VERSION", "PER_ENERGY_COLUMNS", "ABSORPTION_COLUMNS", "ORIGINS",
           "DetectorResponse", "ResponseFormatError", "raw_bytes_per_event", "chip_area_cm2"]

RESPONSE_FORMAT = "response"
RESPONSE_FORMAT_VERSION = 1
#: how a response was made
ORIGINS = ("simulation", "calibration")

#: column of ``/per_energy`` -> (unit, description); every column is float64, one value per grid energy
PER_ENERGY_COLUMNS = {
    "energy_kev": ("keV", "photon energy of the grid point (increasing)"),
    "window_transmission": ("", "fraction of photons crossing the entrance window (xraydb, Beer-Lambert)"),
    "gas_absorption": ("", "fraction of photons entering the gap that convert in it (xraydb, Beer-Lambert)"),
    "trigger_fraction": ("", "converted photons whose event triggered the readout (1 for measured runs)"),
    "selected_fraction": ("", "triggered events that survive the selection"),
    "detection_efficiency": ("", "window_transmission x gas_absorption x trigger_fraction x selected_fraction"),
    "modulation_factor": ("", "modulation factor of the selected events of a 100 %-polarized beam"),
    "modulation_factor_err": ("", "its standard error"),
    "fwhm_frac": ("", "FWHM / peak of the pulse-height peak of the selected events (NaN: not measured)"),
    "fwhm_frac_err": ("", "its standard error"),
    "roi_pixels_mean": ("pixels", "mean ROI size (pixels written per triggered event)"),
    "roi_pixels_p50": ("pixels", "median ROI size"),
    "roi_pixels_p90": ("pixels", "90 % quantile of the ROI size"),
    "roi_pixels_p99": ("pixels", "99 % quantile of the ROI size"),
    "roi_pixels_max": ("pixels", "largest ROI"),
    "bytes_per_event": ("bytes", "mean bytes per triggered event in the raw format (uncompressed)"),
    "n_triggered": ("", "triggered events the point was measured on"),
    "n_selected": ("", "of those, events that survive the selection"),
}
#: column of ``/absorption`` -> (unit, description)
ABSORPTION_COLUMNS = {
    "energy_kev": ("keV", "fine grid over the response's range, with points 0.1 eV either side of each edge"),
    "window_transmission": ("", "fraction of photons crossing the entrance window"),
    "gas_absorption": ("", "fraction of photons entering the gap that convert in it"),
}
_ROOT_TEXT = ("name", "description", "origin", "design_toml", "recon_toml", "selection_json", "settings_json",
              "notes_json")


class ResponseFormatError(FileFormatError):
    """A response file that does not follow ``docs/response-format.md``; names the file, the dataset and the first
    bad entry (``index``, an energy index)."""

    def __init__(self, path, message, *, dataset=None, index=None, event=None):
        super().__init__(path, message, dataset=dataset, event=event)
        self.index = index
        if index is not None:  # "file '<path>', dataset '<name>', energy index N: <message>"
            location = str(self)[:-len(str(message)) - 2]
            self.args = (f"{location}, energy index {index}: {message}",)


def raw_bytes_per_event(roi_pixels) -> np.ndarray | float:
    """Bytes an event with ``roi_pixels`` ROI pixels takes in a raw event file (uncompressed, ``docs/raw-format.md``).

    The per-event datasets of ``/events`` (``roi``, one ``start`` entry, ``time_s``, ``trigger_id``) plus one
    ``signal`` value per ROI pixel, with the dtypes the writer uses (:data:`trackfit.io.raw.EVENT_DATASETS`).
    HDF5's own metadata (a few kB per file) is not counted.
    """
    fixed = sum(dtype.itemsize * int(np.prod(tail)) for name, (dtype, tail) in EVENT_DATASETS.items()
                if name != "signal")
    per_pixel = EVENT_DATASETS["signal"][0].itemsize
    value = fixed + per_pixel * np.asarray(roi_pixels, dtype=np.float64)
    return float(value) if value.ndim == 0 else value


def chip_area_cm2(design: SimConfig) -> float:
    """Sensitive area of the design's chip, cm²: columns × pitch by rows × row pitch."""
    grid = design.grid
    return float(grid.n_columns * grid.pitch_mm * grid.n_rows * grid.row_pitch_mm / 100.0)


def _loglin(x, xp, fp) -> np.ndarray:
    """Linear interpolation in ln E (values at the ends held; callers check the range)."""
    return np.interp(np.log(np.asarray(x, dtype=np.float64)), np.log(xp), fp)


@dataclass(frozen=True, kw_only=True)
class DetectorResponse:
    """Response of one detector design (simulated) or of a built detector (from its calibration).

    Attributes
    ----------
    name : str
        Short label (a preset name, a design file's stem or what the user chose).
    description : str
        The design's description.
    origin : {"simulation", "calibration"}
    design : SimConfig
        The design (window, gas, drift, multiplier, readout); its source is irrelevant.
    recon_config : ReconConfig
        Reconstruction settings of the simulated runs (or of the measured runs' tables).
    selection : dict
        The selection as a plain dict (:func:`trackfit.analysis.selection_to_dict`).
    settings : dict
        How it was made (events per energy, seed, beam; or the calibration and runs used).
    per_energy : dict of str -> ndarray
        :data:`PER_ENERGY_COLUMNS` on the energy grid.
    absorption : dict of str -> ndarray
        :data:`ABSORPTION_COLUMNS` on a fine grid over the same range.
    chip_area_cm2 : float
        Sensitive area of the chip (the default background region of the planner).
    notes : list of str
        What the user should know (values not measured, clamped curves, ...).
    created_by, created_utc : str
        Set when saved or loaded.
    """

    name: str
    description: str = ""
    origin: str = "simulation"
    design: SimConfig
    recon_config: ReconConfig = field(default_factory=ReconConfig)
    selection: dict = field(default_factory=dict)
    settings: dict = field(default_factory=dict)
    per_energy: Mapping
    absorption: Mapping
    chip_area_cm2: float
    notes: tuple = ()
    created_by: str = ""
    created_utc: str = ""

    def __post_init__(self):
        if self.origin not in ORIGINS:
            raise ValueError(f"'origin' must be one of {ORIGINS} (got {self.origin!r})")
        per_energy = _checked_columns(self.per_energy, PER_ENERGY_COLUMNS, "per_energy")
        absorption = _checked_columns(self.absorption, ABSORPTION_COLUMNS, "absorption")
        object.__setattr__(self, "per_energy", per_energy)
        object.__setattr__(self, "absorption", absorption)
        object.__setattr__(self, "notes", tuple(str(n) for n in self.notes))

    # ------------------------------------------------------------------------------------------ access
    def __getitem__(self, name: str) -> np.ndarray:
        """A column of the energy grid (:data:`PER_ENERGY_COLUMNS`)."""
        try:
            return self.per_energy[name]
        except KeyError:
            raise KeyError(f"no column {name!r}; the columns are {list(PER_ENERGY_COLUMNS)}") from None

    @property
    def energy_kev(self) -> np.ndarray:
        return self.per_energy["energy_kev"]

    @property
    def energy_range_kev(self) -> tuple[float, float]:
        """Lowest and highest grid energy: the range the response covers."""
        return float(self.energy_kev[0]), float(self.energy_kev[-1])

    def _check_range(self, energy_kev) -> np.ndarray:
        energy = np.asarray(energy_kev, dtype=np.float64)
        lo, hi = self.energy_range_kev
        outside = ~((energy >= lo * (1 - 1e-9)) & (energy <= hi * (1 + 1e-9)))
        if np.any(outside):
            raise ValueError(f"response '{self.name}' covers {lo:g}-{hi:g} keV; asked at "
                             f"{energy[outside].flat[0]:g} keV")
        return energy

    def window_gas(self, energy_kev) -> np.ndarray:
        """Window transmission × gas absorption at each energy, from the fine table (edges kept sharp)."""
        energy = self._check_range(energy_kev)
        table = self.absorption
        return np.interp(energy, table["energy_kev"], table["window_transmission"] * table["gas_absorption"])

    def efficiency(self, energy_kev, *, selected: bool = True) -> np.ndarray:
        """Detection efficiency at each energy: photons reaching the window -> events kept by the selection
        (``selected=False``: triggered events, what the readout writes)."""
        energy = self._check_range(energy_kev)
        share = self["trigger_fraction"] * (self["selected_fraction"] if selected else 1.0)
        return self.window_gas(energy) * _loglin(energy, self.energy_kev, share)

    def modulation_factor(self, energy_kev) -> np.ndarray:
        """μ at each energy, interpolated in ln E between grid points."""
        return _loglin(self._check_range(energy_kev), self.energy_kev, self["modulation_factor"])

    def bytes_per_event(self, energy_kev) -> np.ndarray:
        """Mean raw-format bytes of a triggered event at each energy, interpolated in ln E."""
        return _loglin(self._check_range(energy_kev), self.energy_kev, self["bytes_per_event"])

    def quality_factor(self) -> np.ndarray:
        """μ·sqrt(ε) at the grid energies: the MDP at a fixed photon count scales as its inverse
        (``docs/methods.md`` §10)."""
        return self["modulation_factor"] * np.sqrt(self["detection_efficiency"])

    # ------------------------------------------------------------------------------------------ printing
    def to_markdown(self) -> str:
        """The energy grid as a Markdown table."""
        header = ("E (keV)", "window×gas", "trigger", "selected", "efficiency", "μ", "FWHM", "ROI pixels (p50/p90)",
                  "bytes/event")
        lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
        c = self.per_energy
        for k in range(len(self.energy_kev)):
            fwhm = "—" if not np.isfinite(c["fwhm_frac"][k]) else f"{100 * c['fwhm_frac'][k]:.1f} %"
            mu = "—" if not np.isfinite(c["modulation_factor"][k]) else \
                f"{c['modulation_factor'][k]:.3f} ± {c['modulation_factor_err'][k]:.3f}"
            cells = [f"{c['energy_kev'][k]:.3g}", f"{c['window_transmission'][k] * c['gas_absorption'][k]:.4f}",
                     f"{c['trigger_fraction'][k]:.3f}", f"{c['selected_fraction'][k]:.3f}",
                     f"{c['detection_efficiency'][k]:.4f}", mu, fwhm,
                     f"{c['roi_pixels_p50'][k]:.0f} / {c['roi_pixels_p90'][k]:.0f}", f"{c['bytes_per_event'][k]:.0f}"]
            lines.append("| " + " | ".join(cells) + " |")
        return "\n".join(lines)

    def summary_dict(self) -> dict:
        """Plain values for ``trackfit info --json``: identity, how it was made, and the grid."""
        return {"name": self.name, "description": self.description, "origin": self.origin,
                "energy_range_kev": list(self.energy_range_kev), "chip_area_cm2": self.chip_area_cm2,
                "settings": self.settings, "selection": self.selection, "notes": list(self.notes),
                "created_by": self.created_by, "created_utc": self.created_utc,
                "per_energy": {k: [None if not np.isfinite(v) else float(v) for v in values]
                               for k, values in self.per_energy.items()}}

    def summary(self) -> str:
        lo, hi = self.energy_range_kev
        made = (f"{self.settings.get('events_per_energy')} events per energy, seed {self.settings.get('seed')}"
                if self.origin == "simulation" else f"calibration {self.settings.get('calibration', '?')}")
        lines = [f"DetectorResponse '{self.name}': {self.description}",
                 f"  origin {self.origin} ({made}); {len(self.energy_kev)} energies, {lo:g}-{hi:g} keV; "
                 f"chip {self.chip_area_cm2:.2f} cm²",
                 self.to_markdown()]
        lines += [f"  note: {note}" for note in self.notes]
        return "\n".join(lines)

    def __repr__(self):
        return self.summary()

    def _repr_html_(self):
        return f"<pre>{html.escape(self.summary())}</pre>"

    # ------------------------------------------------------------------------------------------ files
    def save(self, path, *, overwrite: bool = False) -> Path:
        """Write the response file (``docs/response-format.md``); written as a partial file and renamed.

        Raises
        ------
        FileExistsError
            ``path`` exists and ``overwrite`` is False.
        """
        with _ResponseWriter(path, overwrite=overwrite) as writer:
            f = writer.file
            text = {"name": self.name, "description": self.description, "origin": self.origin,
                    "design_toml": self.design.to_toml(), "recon_toml": self.recon_config.to_toml(),
                    "selection_json": json.dumps(self.selection), "settings_json": json.dumps(self.settings),
                    "notes_json": json.dumps(list(self.notes))}
            for key, value in text.items():
                f.attrs[key] = value
            f.attrs["chip_area_cm2"] = float(self.chip_area_cm2)
            for group_name, columns, spec in (("per_energy", self.per_energy, PER_ENERGY_COLUMNS),
                                              ("absorption", self.absorption, ABSORPTION_COLUMNS)):
                group = f.create_group(group_name)
                for name, (unit, description) in spec.items():
                    ds = group.create_dataset(name, data=np.asarray(columns[name], dtype=np.float64))
                    ds.attrs["unit"] = unit
                    ds.attrs["description"] = description
        return writer.path

    @classmethod
    def load(cls, path, *, allow_external: bool = False) -> DetectorResponse:
        """Read a response file, checking it against ``docs/response-format.md``.

        ``allow_external=True`` accepts data stored in other files (external links, external storage, virtual
        datasets), refused by default.

        Raises
        ------
        FileNotFoundError
        ResponseFormatError
            Not a response file, an unknown version, a missing or malformed dataset (named, with the first bad
            entry).
        """
        path = Path(path)
        f, attrs = open_kind(path, RESPONSE_FORMAT, what="response file", error=ResponseFormatError,
                             versions=(RESPONSE_FORMAT_VERSION,), allow_external=allow_external)
        with f:
            checked = CheckedFile(f, path, ResponseFormatError, allow_external=allow_external)
            fail = checked.failer("/")
            missing = [k for k in (*_ROOT_TEXT, "chip_area_cm2") if k not in attrs]
            if missing:
                raise ResponseFormatError(path, f"missing root attribute(s) {missing}", dataset="/")
            text = {key: text_attribute(attrs, key, fail) for key in (*_ROOT_TEXT, "created_by", "created_utc")
                    if key in _ROOT_TEXT or key in attrs}
            chip_area = real_attribute(attrs, "chip_area_cm2", fail, positive=True)
            columns = {}
            for group_name, spec in (("per_energy", PER_ENERGY_COLUMNS), ("absorption", ABSORPTION_COLUMNS)):
                checked.group(f"/{group_name}")
                columns[group_name] = {}
                for name in spec:
                    ds = checked.dataset(f"/{group_name}/{name}", kinds="f", ndim=1, max_size=10_000_000)
                    columns[group_name][name] = checked.read(ds).astype(np.float64)
        where = {"design_toml": "design", "recon_toml": "reconstruction settings"}
        try:
            design = SimConfig.from_toml(text["design_toml"])
        except (ValueError, TypeError, KeyError) as err:
            raise ResponseFormatError(path, f"root attribute 'design_toml' is not a valid {where['design_toml']} "
                                            f"({err})", dataset="/") from None
        try:
            recon = ReconConfig.from_toml(text["recon_toml"], source=f"'{path}' recon_toml")
        except (ValueError, TypeError, KeyError) as err:
            raise ResponseFormatError(path, f"root attribute 'recon_toml' is not valid {where['recon_toml']} "
                                            f"({err})", dataset="/") from None
        parsed = {}
        for key, kind in (("selection_json", dict), ("settings_json", dict), ("notes_json", list)):
            try:
                parsed[key] = json.loads(text[key])
            except ValueError as err:
                raise ResponseFormatError(path, f"root attribute '{key}' is not JSON text ({err})",
                                          dataset="/") from None
            if not isinstance(parsed[key], kind):
                raise ResponseFormatError(path, f"root attribute '{key}' must hold a JSON "
                                                f"{'object' if kind is dict else 'array'} (got {text[key]!r:.60})",
                                          dataset="/")
        if text["origin"] not in ORIGINS:
            raise ResponseFormatError(path, f"root attribute 'origin' must be one of {ORIGINS} (got "
                                            f"{text['origin']!r})", dataset="/")
        for group_name in ("per_energy", "absorption"):
            _check_lengths_and_energies(path, group_name, columns[group_name])
        return cls(name=text["name"], description=text["description"], origin=text["origin"], design=design,
                   recon_config=recon, selection=parsed["selection_json"], settings=parsed["settings_json"],
                   per_energy=columns["per_energy"], absorption=columns["absorption"], chip_area_cm2=chip_area,
                   notes=parsed["notes_json"], created_by=text.get("created_by", ""),
                   created_utc=text.get("created_utc", ""))

    def replace(self, **changes) -> DetectorResponse:
        """A copy with fields changed (:func:`dataclasses.replace`)."""
        return dataclasses.replace(self, **changes)


def _checked_columns(columns: Mapping, spec: Mapping, what: str) -> dict:
    missing = [name for name in spec if name not in columns]
    if missing:
        raise ValueError(f"'{what}' misses column(s) {missing}; expected {list(spec)}")
    unknown = sorted(set(columns) - set(spec))
    if unknown:
        raise ValueError(f"'{what}' has unknown column(s) {unknown}; expected {list(spec)}")
    out = {name: np.asarray(columns[name], dtype=np.float64) for name in spec}
    lengths = {len(v) for v in out.values()}
    if len(lengths) != 1 or 0 in lengths:
        raise ValueError(f"the '{what}' columns must be non-empty and of one length (got "
                         f"{ {k: len(v) for k, v in out.items()} })")
    energy = out["energy_kev"]
    if np.any(~np.isfinite(energy) | (energy <= 0)) or np.any(np.diff(energy) <= 0):
        raise ValueError(f"'{what}' energies must be positive and increasing (got {energy.tolist()[:8]} ...)")
    return out


def _check_lengths_and_energies(path, group_name, columns):
    lengths = {name: len(v) for name, v in columns.items()}
    n = lengths["energy_kev"]
    for name, length in lengths.items():
        if length != n:
            raise ResponseFormatError(path, f"{length} entries where energy_kev has {n}",
                                      dataset=f"/{group_name}/{name}")
    if n == 0:
        raise ResponseFormatError(path, "no energies", dataset=f"/{group_name}/energy_kev")
    energy = columns["energy_kev"]
    bad = np.flatnonzero(~np.isfinite(energy) | (energy <= 0))
    if bad.size:
        raise ResponseFormatError(path, f"energy {energy[bad[0]]!r} is not a positive number",
                                  dataset=f"/{group_name}/energy_kev", index=int(bad[0]))
    steps = np.flatnonzero(np.diff(energy) <= 0)
    if steps.size:
        k = int(steps[0]) + 1
        raise ResponseFormatError(path, f"energies must increase ({energy[k - 1]!r} then {energy[k]!r})",
                                  dataset=f"/{group_name}/energy_kev", index=k)


class _ResponseWriter(PartialFileWriter):
    format_name = RESPONSE_FORMAT
    format_version = RESPONSE_FORMAT_VERSION

    def __init__(self, path, *, overwrite: bool):
        self.file = self._open(path, overwrite=overwrite)
