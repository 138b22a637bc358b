"""Calibration files: energy scale, gain map, gain drift, modulation-factor curve, spurious-modulation map and the
per-event modulation response (the weights ``response``).

:class:`Calibration` bundles whichever parts exist, each with its provenance (runs, cuts, weights, trackfit
version, time), writes them to one HDF5 file (layout: ``docs/calibration-format.md``) and applies them to any
event table (:meth:`Calibration.apply`).
"""

from __future__ import annotations

import dataclasses
import html
import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..io._partial import PartialFileWriter, now_utc
from ..io.errors import FileFormatError
from ..io.kinds import open_kind
from ..io.structure import CheckedFile, integer_attribute, real_attribute, text_attribute
from .gainmap import GainMap
from .gaintime import GainDrift
from .modfactor import ModulationFactorCurve
from .response_weights import ModulationResponse
from .spectrum import EnergyScale
from .spurious import SpuriousMap

__all__ = ["CALIBRATION_FORMAT", "CALIBRATION_FORMAT_VERSION", "Calibration", "CalibrationFormatError",
           "make_provenance"]

CALIBRATION_FORMAT = "calibration"
CALIBRATION_FORMAT_VERSION = 1
_PARTS = ("energy_scale", "gain_map", "gain_drift", "modulation_factor", "spurious_modulation", "modulation_response")
#: parts whose values depend on the emission estimate and the weights they were made with
ESTIMATE_PARTS = ("modulation_factor", "spurious_modulation", "modulation_response")


class CalibrationFormatError(FileFormatError):
    """A calibration file that does not follow ``docs/calibration-format.md``; names the file and the dataset."""


def _version() -> str:
    from .. import __version__

    return __version__


def make_provenance(*, runs=(), cuts=None, weights="none", **extra) -> dict:
    """Provenance of a calibration part: input runs, cuts (plain dict, :meth:`~trackfit.analysis.Cut.to_dict`),
    weights, version, time, and any part-specific entries (e.g. ``selection``, the cuts as printed in a cut flow,
    ``cut_flows``, the cut flow of each input run, and ``estimator``, the emission estimate of the input tables)."""
    return {"runs": [str(r) for r in runs], "cuts": cuts, "weights": weights, "trackfit_version": _version(),
            "created_utc": now_utc(), **extra}


class _CalibrationWriter(PartialFileWriter):
    """The file of :meth:`Calibration.save`: written as a partial file and renamed when complete."""

    format_name = CALIBRATION_FORMAT
    format_version = CALIBRATION_FORMAT_VERSION

    def __init__(self, path, *, overwrite: bool):
        self.file = self._open(path, overwrite=overwrite)


def _json_default(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(f"not JSON serialisable: {type(value).__name__}")


@dataclass(frozen=True, kw_only=True)
class Calibration:
    """Everything needed to turn an event table into calibrated energies, modulation factors and spurious terms.

    Attributes
    ----------
    energy_scale : EnergyScale, optional
        Gain-corrected pulse height to energy.
    gain_map : GainMap, optional
        Relative gain per spatial cell.
    gain_drift : GainDrift, optional
        Relative gain versus time of one run (applied only on request: it belongs to the run it came from).
    modulation_factor : ModulationFactorCurve, optional
        Modulation factor versus energy.
    spurious_modulation : SpuriousMap, optional
        Spurious Q, U versus energy and position.
    modulation_response : ModulationResponse, optional
        Expected modulation response of an event from its shape (the weights ``"response"``).
    provenance : dict
        Per part name, the provenance dict (:func:`make_provenance`).
    """

    energy_scale: EnergyScale | None = None
    gain_map: GainMap | None = None
    gain_drift: GainDrift | None = None
    modulation_factor: ModulationFactorCurve | None = None
    spurious_modulation: SpuriousMap | None = None
    modulation_response: ModulationResponse | None = None
    provenance: dict = field(default_factory=dict)

    def __post_init__(self):
        unknown = sorted(set(self.provenance) - set(_PARTS))
        if unknown:
            raise ValueError(f"provenance for unknown part(s) {unknown}; valid parts: {list(_PARTS)}")

    def parts(self) -> list[str]:
        """Names of the parts present."""
        return [name for name in _PARTS if getattr(self, name) is not None]

    def selection_of(self, name: str):
        """The selection part ``name`` was made with (a :class:`~trackfit.analysis.Cut`, from its provenance), or
        None when the part is absent or its provenance records no cuts."""
        from .selection import SelectionError, cut_from_dict

        cuts = self.provenance.get(name, {}).get("cuts") if getattr(self, name, None) is not None else None
        if not cuts:
            return None
        try:
            return cut_from_dict(cuts)
        except SelectionError:
            return None

    def weights_of(self, name: str) -> str | None:
        """The per-event weighting part ``name`` was made with (None when not recorded)."""
        return self.provenance.get(name, {}).get("weights") if getattr(self, name, None) is not None else None

    def estimator_of(self, name: str) -> str | None:
        """The emission estimate part ``name`` was made with (None when the part is absent; ``"two-stage"`` for
        parts of files written before the estimators existed, which were all made with it)."""
        if getattr(self, name, None) is None:
            return None
        return self.provenance.get(name, {}).get("estimator", "two-stage")

    def with_part(self, name: str, value, provenance: Mapping | None = None) -> Calibration:
        """A copy with part ``name`` set (and its provenance)."""
        if name not in _PARTS:
            raise ValueError(f"unknown calibration part {name!r}; valid parts: {list(_PARTS)}")
        prov = dict(self.provenance)
        if provenance is not None:
            prov[name] = dict(provenance)
        return dataclasses.replace(self, **{name: value}, provenance=prov)

    # ------------------------------------------------------------------------------------------ applying
    def apply(self, table: Mapping, *, use_gain_drift: bool = False) -> dict[str, np.ndarray]:
        """Calibrated columns for an event table.

        Returns a dict with every column of ``table`` and:

        * ``gain_relative``: ``G_map(x, y) [* G_drift(t)]`` (with a gain map or drift);
        * ``energy_kev``: replaced by ``scale(pulse_height / gain_relative)`` (with an energy scale);
        * ``modulation_factor``: ``curve(energy_kev)`` (with a curve);
        * ``spurious_q``, ``spurious_u``: the spurious modulation at each event (with a map);
        * ``response_weight``: the expected modulation response of each event from its shape (with a
          modulation-response part; the weights ``"response"``).

        Parameters
        ----------
        table : mapping of column arrays
            Needs ``pulse_height`` and the position columns of the gain map for the energy; ``time_s`` for the
            drift; ``energy_kev`` and positions for the spurious map.
        use_gain_drift : bool
            Also correct with :attr:`gain_drift` (only for the run it was measured on).
        """
        out = {name: np.asarray(values) for name, values in table.items()}
        n = len(next(iter(out.values()))) if out else 0

        def need(column, part):
            if column not in out:
                raise KeyError(f"applying the {part} needs column '{column}' (table has {sorted(out)})")
            return np.asarray(out[column], dtype=float)

        gain = np.ones(n)
        if self.gain_map is not None:
            xc, yc = self.gain_map.columns
            gain = gain * self.gain_map.gain_at(need(xc, "gain map"), need(yc, "gain map"))
        if use_gain_drift:
            if self.gain_drift is None:
                raise ValueError("use_gain_drift=True but the calibration has no gain_drift part")
            gain = gain * self.gain_drift.gain_at(need("time_s", "gain drift"))
        if self.gain_map is not None or use_gain_drift:
            out["gain_relative"] = gain
        if self.energy_scale is not None:
            ph = need("pulse_height", "energy scale")
            out["energy_kev"] = self.energy_scale.energy_kev(ph / gain).astype(np.float32)
        if self.modulation_factor is not None:
            out["modulation_factor"] = self.modulation_factor(need("energy_kev", "modulation factor"))
        if self.spurious_modulation is not None:
            xc, yc = self.spurious_modulation.columns
            q_sp, u_sp = self.spurious_modulation.at(need("energy_kev", "spurious map"), need(xc, "spurious map"),
                                                     need(yc, "spurious map"))
            out["spurious_q"], out["spurious_u"] = q_sp, u_sp
        if self.modulation_response is not None:
            out["response_weight"] = self.modulation_response(out)
        return out

    # ------------------------------------------------------------------------------------------ files
    def save(self, path, *, overwrite: bool = False) -> Path:
        """Write the calibration to an HDF5 file (``docs/calibration-format.md``)."""
        with _CalibrationWriter(path, overwrite=overwrite) as writer:
            for name in self.parts():
                group = writer.file.create_group(name)
                group.attrs["provenance"] = json.dumps(self.provenance.get(name, {}), default=_json_default)
                _WRITERS[name](group, getattr(self, name))
        return writer.path

    @classmethod
    def load(cls, path, *, allow_external: bool = False) -> Calibration:
        """Read a calibration file; unknown groups are rejected with the list of known ones.

        Every dataset and attribute is checked for its type and shape before use; ``allow_external=True`` accepts
        data stored in other files (external links, external storage, virtual datasets), refused by default.

        Raises
        ------
        FileNotFoundError
        CalibrationFormatError
            Names the file and the group, dataset or attribute.
        """
        path = Path(path)
        f, _ = open_kind(path, CALIBRATION_FORMAT, what="calibration file", error=CalibrationFormatError,
                         versions=(CALIBRATION_FORMAT_VERSION,), allow_external=allow_external)
        with f:
            checked = CheckedFile(f, path, CalibrationFormatError, allow_external=allow_external)
            with checked.guard("/"):
                names = list(f)
            unknown = sorted(set(names) - set(_PARTS))
            if unknown:
                raise CalibrationFormatError(path, f"unknown group(s) {unknown}; known: {list(_PARTS)}", dataset="/")
            parts, provenance = {}, {}
            for name in names:
                part = _Part(checked, name)
                try:
                    parts[name] = _READERS[name](part)
                except CalibrationFormatError:
                    raise
                except (ValueError, TypeError) as err:  # the part's own checks of consistent values
                    raise CalibrationFormatError(path, f"not a valid {name.replace('_', ' ')}: {err}",
                                                 dataset=f"/{name}") from None
                provenance[name] = part.json("provenance", default={})
        return cls(**parts, provenance=provenance)

    # ------------------------------------------------------------------------------------------ display
    def _rows(self):
        rows = []
        for name in _PARTS:
            part = getattr(self, name)
            if part is None:
                rows.append((name, "—", ""))
                continue
            prov = self.provenance.get(name, {})
            runs = ", ".join(Path(r).name for r in prov.get("runs", [])) or "?"
            text = f"runs: {runs}; weights: {prov.get('weights', '?')}"
            if name in ESTIMATE_PARTS:
                text += f"; estimate: {self.estimator_of(name)}"
            selection = prov.get("selection")
            if selection is None and self.selection_of(name) is not None:
                selection = self.selection_of(name).describe()
            if selection is not None:
                text += f"\nselection: {selection}"
            rows.append((name, repr(part).splitlines()[0], text))
        return rows

    def __repr__(self):
        lines = ["Calibration"]
        for name, summary, prov in self._rows():
            lines.append(f"  {name:<20}{summary}")
            lines += [f"  {'':<20}{line}" for line in prov.splitlines()]
        return "\n".join(lines)

    def _repr_html_(self):
        body = "".join(f"<tr><td>{html.escape(a)}</td><td>{html.escape(b)}</td>"
                       f"<td>{'<br>'.join(html.escape(line) for line in c.splitlines())}</td></tr>"
                       for a, b, c in self._rows())
        return f"<table><caption>Calibration</caption>{body}</table>"


# ---------------------------------------------------------------------------------------------- per-part I/O
def _write_energy_scale(group, scale: EnergyScale):
    group.attrs["coefficients"] = np.asarray(scale.coefficients, dtype=float)
    group.create_dataset("line_pulse_height", data=np.asarray(scale.line_pulse_heights, dtype=float))
    group.create_dataset("line_energy_kev", data=np.asarray(scale.line_energies_kev, dtype=float))


def _read_energy_scale(part) -> EnergyScale:
    return EnergyScale(coefficients=part.numbers("coefficients"),
                       line_pulse_heights=tuple(part.array("line_pulse_height")),
                       line_energies_kev=tuple(part.array("line_energy_kev")))


def _write_gain_map(group, gain: GainMap):
    for name in ("x_edges_mm", "y_edges_mm", "relative_gain", "relative_gain_err", "counts"):
        group.create_dataset(name, data=np.asarray(getattr(gain, name), dtype=float))
    group.attrs["reference_peak"] = gain.reference_peak
    group.attrs["min_counts"] = gain.min_counts
    group.attrs["line"] = gain.line
    group.attrs["position"] = gain.position


def _position(value: str) -> str:
    """A map's position name; files of trackfit 0.1 call the centroid 'barycentre'."""
    return "centroid" if value == "barycentre" else value


#: the most values a dataset of a calibration part may hold (maps of a few hundred cells per axis and energy)
_MAX_PART_VALUES = 10_000_000


class _Part:
    """The datasets and attributes of one part's group, each checked for its type before use."""

    def __init__(self, checked: CheckedFile, name: str):
        self.checked = checked
        self.where = f"/{name}"
        self.group = checked.group(self.where)
        self.attrs = checked.attributes(self.group)
        self.fail = checked.failer(self.where)

    def array(self, name: str, ndim: int = 1) -> np.ndarray:
        """A numeric dataset of ``ndim`` dimensions as float64."""
        ds = self.checked.dataset(f"{self.where}/{name}", kinds="biuf", ndim=ndim, max_size=_MAX_PART_VALUES)
        return np.asarray(self.checked.read(ds), dtype=float)

    def numbers(self, key: str) -> tuple:
        value = self.attrs.get(key)
        if key not in self.attrs:
            self.fail(f"missing attribute '{key}'")
        values = value if isinstance(value, list) else [value]
        if not values or not all(isinstance(v, int | float) and not isinstance(v, bool) for v in values):
            self.fail(f"attribute '{key}' must be a non-empty array of numbers (got {value!r:.80})")
        return tuple(float(v) for v in values)

    def real(self, key: str) -> float:
        """A number (NaN and infinities pass: the part's own checks judge values)."""
        value = self.attrs.get(key)
        if isinstance(value, float):
            return value
        return real_attribute(self.attrs, key, self.fail)

    def integer(self, key: str, minimum: int | None = None) -> int:
        return integer_attribute(self.attrs, key, self.fail, minimum=minimum)

    def text(self, key: str) -> str:
        return text_attribute(self.attrs, key, self.fail)

    def json(self, key: str, default=None):
        if key not in self.attrs and default is not None:
            return default
        text = self.text(key)
        try:
            return json.loads(text)
        except ValueError as err:
            self.fail(f"attribute '{key}' must be JSON text ({err})")


def _read_gain_map(part) -> GainMap:
    return GainMap(**{name: part.array(name, ndim=1 if name.endswith("edges_mm") else 2)
                      for name in ("x_edges_mm", "y_edges_mm", "relative_gain", "relative_gain_err", "counts")},
                   reference_peak=part.real("reference_peak"), min_counts=part.integer("min_counts"),
                   line=part.text("line"), position=_position(part.text("position")))


def _write_gain_drift(group, drift: GainDrift):
    for name in ("node_time_s", "node_gain", "slice_time_s", "slice_peak", "slice_peak_err"):
        group.create_dataset(name, data=np.asarray(getattr(drift, name), dtype=float))
    group.attrs["reference_peak"] = drift.reference_peak
    group.attrs["model"] = drift.model
    group.attrs["parameters"] = json.dumps(drift.parameters, default=_json_default)
    group.attrs["chi2"] = drift.chi2


def _read_gain_drift(part) -> GainDrift:
    return GainDrift(**{name: part.array(name) for name in ("node_time_s", "node_gain", "slice_time_s",
                                                            "slice_peak", "slice_peak_err")},
                     reference_peak=part.real("reference_peak"), model=part.text("model"),
                     parameters=part.json("parameters"), chi2=part.real("chi2"))


def _write_modulation_factor(group, curve: ModulationFactorCurve):
    group.attrs["model"] = "polynomial in ln(E/keV), energy clamped to range"
    group.attrs["coefficients"] = np.asarray(curve.coefficients, dtype=float)
    group.attrs["energy_range_kev"] = np.asarray(curve.energy_range_kev, dtype=float)
    group.create_dataset("point_energy_kev", data=np.asarray(curve.points_energy_kev, dtype=float))
    group.create_dataset("point_value", data=np.asarray(curve.points_value, dtype=float))
    group.create_dataset("point_error", data=np.asarray(curve.points_error, dtype=float))


def _read_modulation_factor(part) -> ModulationFactorCurve:
    names = ("point_energy_kev", "point_value", "point_error")
    points = [part.array(name) for name in names]
    if len({len(p) for p in points}) > 1:
        part.fail(f"datasets {', '.join(names)} must have one entry per measured point each (got lengths "
                  f"{[len(p) for p in points]})")
    return ModulationFactorCurve(coefficients=part.numbers("coefficients"),
                                 energy_range_kev=part.numbers("energy_range_kev"),
                                 points_energy_kev=tuple(points[0]), points_value=tuple(points[1]),
                                 points_error=tuple(points[2]))


_SPURIOUS_DATASETS = ("energy_kev", "x_edges_mm", "y_edges_mm", "q", "u", "q_err", "u_err", "counts")


def _write_spurious(group, spurious: SpuriousMap):
    for name in _SPURIOUS_DATASETS:
        group.create_dataset(name, data=np.asarray(getattr(spurious, name), dtype=float))
    group.attrs["position"] = spurious.position
    group.attrs["interpolation"] = "linear in energy between nodes, constant beyond; nearest spatial cell"


def _read_spurious(part) -> SpuriousMap:
    arrays = {name: part.array(name, ndim=1 if name in ("energy_kev", "x_edges_mm", "y_edges_mm") else 3)
              for name in _SPURIOUS_DATASETS}
    counts = arrays["counts"]
    bad = ~(np.isfinite(counts) & (counts >= 0))
    if bad.any():
        part.fail(f"dataset 'counts' must hold event counts, finite and >= 0 (got {float(counts[bad][0])!r})")
    return SpuriousMap(**arrays, position=_position(part.text("position")))


_RESPONSE_ATTRIBUTES = ("coefficients", "feature_low", "feature_high", "feature_mean", "feature_scale")


def _write_modulation_response(group, response: ModulationResponse):
    group.attrs["model"] = "clip(polynomial of the standardised, clipped features, 0, 1)"
    group.attrs["features"] = ",".join(response.features)
    group.attrs["degree"] = int(response.degree)
    group.attrs["n_events"] = int(response.n_events)
    for name in _RESPONSE_ATTRIBUTES:
        group.attrs[name] = np.asarray(getattr(response, name), dtype=float)


def _read_modulation_response(part) -> ModulationResponse:
    return ModulationResponse(**{name: part.numbers(name) for name in _RESPONSE_ATTRIBUTES},
                              degree=part.integer("degree", minimum=0), n_events=part.integer("n_events", minimum=0),
                              features=tuple(part.text("features").split(",")))


_WRITERS = {"energy_scale": _write_energy_scale, "gain_map": _write_gain_map, "gain_drift": _write_gain_drift,
            "modulation_factor": _write_modulation_factor, "spurious_modulation": _write_spurious,
            "modulation_response": _write_modulation_response}
_READERS = {"energy_scale": _read_energy_scale, "gain_map": _read_gain_map, "gain_drift": _read_gain_drift,
            "modulation_factor": _read_modulation_factor, "spurious_modulation": _read_spurious,
            "modulation_response": _read_modulation_response}
