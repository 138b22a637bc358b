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
from ..io.kinds import open_kind
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


class CalibrationFormatError(ValueError):
    """A calibration file that does not follow ``docs/calibration-format.md``."""

    def __init__(self, path, message, *, dataset=None):
        where = f"{path}" + (f" [{dataset}]" if dataset else "")
        super().__init__(f"{where}: {message}")


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
    def load(cls, path) -> Calibration:
        """Read a calibration file; unknown groups are rejected with the list of known ones."""
        path = Path(path)
        f, attrs = open_kind(path, CALIBRATION_FORMAT, what="calibration file", error=CalibrationFormatError)
        with f:
            version = int(attrs.get("format_version", -1))
            if version != CALIBRATION_FORMAT_VERSION:
                raise CalibrationFormatError(path, f"format_version {version} is not supported (this trackfit "
                                                   f"reads version {CALIBRATION_FORMAT_VERSION})")
            unknown = sorted(set(f) - set(_PARTS))
            if unknown:
                raise CalibrationFormatError(path, f"unknown group(s) {unknown}; known: {list(_PARTS)}")
            parts, provenance = {}, {}
            for name in f:
                group = f[name]
                try:
                    parts[name] = _READERS[name](group)
                except (KeyError, ValueError, TypeError) as err:
                    raise CalibrationFormatError(path, f"cannot read: {err}", dataset=f"/{name}") from None
                provenance[name] = json.loads(group.attrs.get("provenance", "{}"))
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


def _read_energy_scale(group) -> EnergyScale:
    return EnergyScale(coefficients=tuple(np.asarray(group.attrs["coefficients"], dtype=float)),
                       line_pulse_heights=tuple(group["line_pulse_height"][()]),
                       line_energies_kev=tuple(group["line_energy_kev"][()]))


def _write_gain_map(group, gain: GainMap):
    for name in ("x_edges_mm", "y_edges_mm", "relative_gain", "relative_gain_err", "counts"):
        group.create_dataset(name, data=np.asarray(getattr(gain, name), dtype=float))
    group.attrs["reference_peak"] = gain.reference_peak
    group.attrs["min_counts"] = gain.min_counts
    group.attrs["line"] = gain.line
    group.attrs["position"] = gain.position


def _position(value) -> str:
    """A map's position name; files of trackfit 0.1 call the centroid 'barycentre'."""
    value = _str(value)
    return "centroid" if value == "barycentre" else value


def _str(value):
    return value.decode() if isinstance(value, bytes) else str(value)


def _read_gain_map(group) -> GainMap:
    return GainMap(**{name: group[name][()] for name in ("x_edges_mm", "y_edges_mm", "relative_gain",
                                                          "relative_gain_err", "counts")},
                   reference_peak=float(group.attrs["reference_peak"]), min_counts=int(group.attrs["min_counts"]),
                   line=_str(group.attrs["line"]), position=_position(group.attrs["position"]))


def _write_gain_drift(group, drift: GainDrift):
    for name in ("node_time_s", "node_gain", "slice_time_s", "slice_peak", "slice_peak_err"):
        group.create_dataset(name, data=np.asarray(getattr(drift, name), dtype=float))
    group.attrs["reference_peak"] = drift.reference_peak
    group.attrs["model"] = drift.model
    group.attrs["parameters"] = json.dumps(drift.parameters, default=_json_default)
    group.attrs["chi2"] = drift.chi2


def _read_gain_drift(group) -> GainDrift:
    return GainDrift(**{name: group[name][()] for name in ("node_time_s", "node_gain", "slice_time_s",
                                                            "slice_peak", "slice_peak_err")},
                     reference_peak=float(group.attrs["reference_peak"]), model=_str(group.attrs["model"]),
                     parameters=json.loads(group.attrs["parameters"]), chi2=float(group.attrs["chi2"]))


def _write_modulation_factor(group, curve: ModulationFactorCurve):
    group.attrs["model"] = "polynomial in ln(E/keV), energy clamped to range"
    group.attrs["coefficients"] = np.asarray(curve.coefficients, dtype=float)
    group.attrs["energy_range_kev"] = np.asarray(curve.energy_range_kev, dtype=float)
    group.create_dataset("point_energy_kev", data=np.asarray(curve.points_energy_kev, dtype=float))
    group.create_dataset("point_value", data=np.asarray(curve.points_value, dtype=float))
    group.create_dataset("point_error", data=np.asarray(curve.points_error, dtype=float))


def _read_modulation_factor(group) -> ModulationFactorCurve:
    return ModulationFactorCurve(coefficients=tuple(np.asarray(group.attrs["coefficients"], dtype=float)),
                                 energy_range_kev=tuple(np.asarray(group.attrs["energy_range_kev"], dtype=float)),
                                 points_energy_kev=tuple(group["point_energy_kev"][()]),
                                 points_value=tuple(group["point_value"][()]),
                                 points_error=tuple(group["point_error"][()]))


_SPURIOUS_DATASETS = ("energy_kev", "x_edges_mm", "y_edges_mm", "q", "u", "q_err", "u_err", "counts")


def _write_spurious(group, spurious: SpuriousMap):
    for name in _SPURIOUS_DATASETS:
        group.create_dataset(name, data=np.asarray(getattr(spurious, name), dtype=float))
    group.attrs["position"] = spurious.position
    group.attrs["interpolation"] = "linear in energy between nodes, constant beyond; nearest spatial cell"


def _read_spurious(group) -> SpuriousMap:
    return SpuriousMap(**{name: group[name][()] for name in _SPURIOUS_DATASETS},
                       position=_position(group.attrs["position"]))


_RESPONSE_ATTRIBUTES = ("coefficients", "feature_low", "feature_high", "feature_mean", "feature_scale")


def _write_modulation_response(group, response: ModulationResponse):
    group.attrs["model"] = "clip(polynomial of the standardised, clipped features, 0, 1)"
    group.attrs["features"] = ",".join(response.features)
    group.attrs["degree"] = int(response.degree)
    group.attrs["n_events"] = int(response.n_events)
    for name in _RESPONSE_ATTRIBUTES:
        group.attrs[name] = np.asarray(getattr(response, name), dtype=float)


def _read_modulation_response(group) -> ModulationResponse:
    return ModulationResponse(**{name: tuple(np.asarray(group.attrs[name], dtype=float))
                                 for name in _RESPONSE_ATTRIBUTES},
                              degree=int(group.attrs["degree"]), n_events=int(group.attrs["n_events"]),
                              features=tuple(_str(group.attrs["features"]).split(",")))


_WRITERS = {"energy_scale": _write_energy_scale, "gain_map": _write_gain_map, "gain_drift": _write_gain_drift,
            "modulation_factor": _write_modulation_factor, "spurious_modulation": _write_spurious,
            "modulation_response": _write_modulation_response}
_READERS = {"energy_scale": _read_energy_scale, "gain_map": _read_gain_map, "gain_drift": _read_gain_drift,
            "modulation_factor": _read_modulation_factor, "spurious_modulation": _read_spurious,
            "modulation_response": _read_modulation_response}
