"""Event selections on event tables: small explicit cuts combined with ``&``, ``|`` and ``~``.

A cut is a frozen object that turns a table (any mapping of equal-length column arrays: an
:class:`~trackfit.io.table.EventTable` or a plain ``dict``) into a boolean mask. Combining cuts with ``&`` keeps a
flat list, so :meth:`Cut.cut_flow` can report, step by step, how many events each cut removed.

The default selection
---------------------
Every analysis (``trackfit calibrate``, ``trackfit polarization``, :func:`~trackfit.analysis.build_calibration`,
:func:`~trackfit.analysis.measure_polarization`, the tuning sweeps) keeps **the events with an emission angle and no
failure bit** (:class:`UsableEvents`; the failure and warning bits are listed, with the reason for each, in
:mod:`trackfit.recon.status`). Further cuts are added to it, never substituted for it: :func:`with_default` puts it
first in any selection, so it is the first line of every cut flow. Rejecting the warning bits too (a truncated
track at the ROI edge, a saturated pixel, a first-pass angle) is a separate choice:
``UsableEvents(reject_warnings=True)``, ``--reject-warnings`` on the command line, ``reject_warnings = true`` in a
selection file.

Examples
--------
>>> import numpy as np
>>> table = {"status": np.array([0, 0, 4, 0]), "emission_rad": np.array([0.1, 0.2, 0.3, 0.4]),
...          "energy_kev": np.array([2.0, 5.9, 6.0, 9.5])}
>>> selection = with_default(EnergyWindow(low_kev=3.0, high_kev=8.0))
>>> selection.mask(table).tolist()
[False, True, False, False]
>>> print(selection.cut_flow(table))  # doctest: +NORMALIZE_WHITESPACE
cut                                              kept  removed  kept/input
(input)                                             4        -     100.0 %
default: emission angle, no failure bit             3        1      75.0 %
3 <= energy_kev < 8 keV                             1        2      25.0 %
"""

from __future__ import annotations

import html
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, fields

import numpy as np

__all__ = [
    "Cut",
    "UsableEvents",
    "default_selection",
    "with_default",
    "cut_from_dict",
    "selection_differences",
    "SelectionMismatchWarning",
    "warn_if_selections_differ",
    "NoEventsLeftError",
    "AllOf",
    "AnyOf",
    "Invert",
    "Everything",
    "StatusCut",
    "RangeCut",
    "EnergyWindow",
    "PixelCountCut",
    "ElongationCut",
    "CircleRegion",
    "RectangleRegion",
    "HexagonRegion",
    "CutFlow",
    "SelectionError",
    "select_rows",
    "selection_from_dict",
    "selection_to_dict",
    "read_selection",
    "write_selection",
]


class SelectionError(ValueError):
    """A selection that cannot be built or applied (bad parameter, missing column)."""


class SelectionMismatchWarning(UserWarning):
    """Two selections that should be the same are not (e.g. a measurement and the calibration it uses)."""


class NoEventsLeftError(ValueError):
    """A selection kept no event; the message shows the cut flow, so the cut that removed them is visible."""

    def __init__(self, what: str, flow: CutFlow):
        self.flow = flow
        super().__init__(f"no events left {what} after the selection:\n{flow}")


def _column(table: Mapping, name: str) -> np.ndarray:
    try:
        return np.asarray(table[name])
    except KeyError:
        raise SelectionError(f"the selection needs column '{name}', which the table does not have "
                             f"(columns: {sorted(table)})") from None


def _n_rows(table: Mapping) -> int:
    for name in table:
        return len(table[name])
    return 0


def select_rows(table: Mapping, mask) -> Mapping:
    """Rows of ``table`` where ``mask`` is true: ``table.select(mask)`` if it has one, else a dict of columns."""
    mask = np.asarray(mask)
    if hasattr(table, "select"):
        return table.select(mask)
    return {name: np.asarray(values)[mask] for name, values in table.items()}


def _check_range(name, low, high):
    for label, value in (("low", low), ("high", high)):
        if value is not None and not np.isfinite(value) and not np.isinf(value):
            raise SelectionError(f"'{name}' {label} bound must be a number (got {value!r})")
    if low is not None and high is not None and not low < high:
        raise SelectionError(f"'{name}' needs low < high (got [{low}, {high}])")


def _fmt(value) -> str:
    return f"{value:g}"


class Cut:
    """Base class of all cuts: ``mask(table)`` gives the rows kept; combine with ``&``, ``|``, ``~``."""

    def mask(self, table: Mapping) -> np.ndarray:  # pragma: no cover - abstract
        raise NotImplementedError

    def describe(self) -> str:  # pragma: no cover - abstract
        raise NotImplementedError

    def steps(self) -> tuple[Cut, ...]:
        """The cuts applied one after another (a conjunction lists its parts; anything else is one step)."""
        return (self,)

    def to_dict(self) -> dict:
        """A plain description (for provenance and JSON output)."""
        values = {f.name: getattr(self, f.name) for f in fields(self)}  # type: ignore[arg-type]
        return {"cut": type(self).__name__, **values}

    def __and__(self, other: Cut) -> AllOf:
        return AllOf(parts=self.steps() + other.steps())

    def __or__(self, other: Cut) -> AnyOf:
        return AnyOf(parts=(self, other))

    def __invert__(self) -> Invert:
        return Invert(part=self)

    def apply(self, table: Mapping) -> Mapping:
        """The rows of ``table`` that pass."""
        return select_rows(table, self.mask(table))

    def cut_flow(self, table: Mapping) -> CutFlow:
        """Events kept after each step, and removed by it."""
        n = _n_rows(table)
        keep = np.ones(n, dtype=bool)
        rows = []
        for step in self.steps():
            before = int(np.count_nonzero(keep))
            keep &= step.mask(table)
            after = int(np.count_nonzero(keep))
            rows.append((step.describe(), after, before - after))
        return CutFlow(n_input=n, rows=tuple(rows))

    def __str__(self) -> str:
        return self.describe()


@dataclass(frozen=True, kw_only=True)
class Everything(Cut):
    """Keeps every event (the neutral element of ``&``)."""

    def mask(self, table):
        return np.ones(_n_rows(table), dtype=bool)

    def describe(self):
        return "all events"

    def steps(self):
        return ()


@dataclass(frozen=True, kw_only=True)
class AllOf(Cut):
    """Events passing every part (built by ``a & b``)."""

    parts: tuple[Cut, ...]

    def mask(self, table):
        keep = np.ones(_n_rows(table), dtype=bool)
        for part in self.parts:
            keep &= part.mask(table)
        return keep

    def describe(self):
        if not self.parts:
            return "all events"
        return " and ".join(f"({p.describe()})" if isinstance(p, AllOf | AnyOf | Invert) else p.describe()
                            for p in self.parts)

    def steps(self):
        return tuple(self.parts)

    def to_dict(self):
        return {"cut": "AllOf", "parts": [p.to_dict() for p in self.parts]}


@dataclass(frozen=True, kw_only=True)
class AnyOf(Cut):
    """Events passing at least one part (built by ``a | b``)."""

    parts: tuple[Cut, ...]

    def mask(self, table):
        keep = np.zeros(_n_rows(table), dtype=bool)
        for part in self.parts:
            keep |= part.mask(table)
        return keep

    def describe(self):
        return " or ".join(f"({p.describe()})" for p in self.parts)

    def to_dict(self):
        return {"cut": "AnyOf", "parts": [p.to_dict() for p in self.parts]}


@dataclass(frozen=True, kw_only=True)
class Invert(Cut):
    """Events failing ``part`` (built by ``~a``)."""

    part: Cut

    def mask(self, table):
        return ~self.part.mask(table)

    def describe(self):
        return f"not ({self.part.describe()})"

    def to_dict(self):
        return {"cut": "Invert", "part": self.part.to_dict()}


@dataclass(frozen=True, kw_only=True)
class StatusCut(Cut):
    """Events whose ``status`` has no bit set outside ``allowed_bits``.

    Parameters
    ----------
    allowed_bits : int
        Bits that may be set (default 0: only fully reconstructed events). E.g.
        ``StatusCut(allowed_bits=Status.ROI_BORDER)``.
    """

    allowed_bits: int = 0

    def __post_init__(self):
        if int(self.allowed_bits) != self.allowed_bits or self.allowed_bits < 0:
            raise SelectionError(f"'allowed_bits' must be a non-negative integer (got {self.allowed_bits!r})")
        object.__setattr__(self, "allowed_bits", int(self.allowed_bits))

    def mask(self, table):
        status = _column(table, "status").astype(np.int64)
        return (status & ~np.int64(self.allowed_bits)) == 0

    def describe(self):
        if not self.allowed_bits:
            return "status == 0"
        try:
            from ..recon.status import Status

            names = str(Status(self.allowed_bits)).replace("Status.", "")
        except ImportError:  # pragma: no cover - reconstruction package absent
            names = f"{self.allowed_bits:#x}"
        return f"status only {names}"


def _status_bits_of(kind: str) -> int:
    from ..recon.status import FAILURE_BITS, WARNING_BITS

    return int(FAILURE_BITS) if kind == "failure" else int(WARNING_BITS)


@dataclass(frozen=True, kw_only=True)
class UsableEvents(Cut):
    """The default selection: events with an emission angle and no failure bit.

    Failure bits (:data:`trackfit.recon.status.FAILURE_BITS`) mark events without an emission angle or with one
    the reconstruction declares meaningless; warning bits (:data:`trackfit.recon.status.WARNING_BITS`) mark
    usable events with a caution (a track touching the ROI edge, a saturated pixel, a first-pass angle).

    Parameters
    ----------
    reject_warnings : bool
        Also reject every warning bit (then only ``status == 0`` events with an angle pass). Default False.
    """

    reject_warnings: bool = False

    def __post_init__(self):
        if not isinstance(self.reject_warnings, bool | np.bool_):
            raise SelectionError(f"'reject_warnings' must be true or false (got {self.reject_warnings!r})")
        object.__setattr__(self, "reject_warnings", bool(self.reject_warnings))

    @property
    def rejected_bits(self) -> int:
        """Status bits that remove an event."""
        bits = _status_bits_of("failure")
        return bits | _status_bits_of("warning") if self.reject_warnings else bits

    def mask(self, table):
        status = _column(table, "status").astype(np.int64)
        with np.errstate(invalid="ignore"):
            angle = np.isfinite(_column(table, "emission_rad").astype(float))
        return angle & ((status & np.int64(self.rejected_bits)) == 0)

    def describe(self):
        if self.reject_warnings:
            return "default: emission angle, no failure or warning bit"
        return "default: emission angle, no failure bit"


def default_selection(*, reject_warnings: bool = False) -> UsableEvents:
    """The selection every analysis starts from (see the module docstring)."""
    return UsableEvents(reject_warnings=reject_warnings)


def with_default(selection: Cut | None = None, *, reject_warnings: bool = False) -> Cut:
    """``selection`` with the default selection as its first step.

    A selection that already holds a :class:`UsableEvents` step keeps it (moved first, so it heads the cut flow);
    otherwise ``UsableEvents(reject_warnings=reject_warnings)`` is added in front. ``None`` gives the default alone.
    Cuts are combined with "and", so the order changes the cut flow only, never the events kept.
    """
    if selection is None:
        return AllOf(parts=(default_selection(reject_warnings=reject_warnings),))
    steps = selection.steps()
    base = [step for step in steps if isinstance(step, UsableEvents)]
    rest = tuple(step for step in steps if not isinstance(step, UsableEvents))
    if not base:
        base = [default_selection(reject_warnings=reject_warnings)]
    first = UsableEvents(reject_warnings=any(b.reject_warnings for b in base))
    return AllOf(parts=(first,) + rest)


@dataclass(frozen=True, kw_only=True)
class RangeCut(Cut):
    """``low <= table[column] < high`` (either bound may be ``None``); NaN never passes."""

    column: str
    low: float | None = None
    high: float | None = None
    unit: str = field(default="", compare=False)

    def __post_init__(self):
        _check_range(self.column, self.low, self.high)

    def _values(self, table):
        return _column(table, self.column).astype(float)

    def mask(self, table):
        values = self._values(table)
        keep = np.isfinite(values)
        if self.low is not None:
            keep &= values >= self.low
        if self.high is not None:
            keep &= values < self.high
        return keep

    def _name(self):
        return self.column

    def describe(self):
        unit = f" {self.unit}" if self.unit else ""
        if self.low is not None and self.high is not None:
            return f"{_fmt(self.low)} <= {self._name()} < {_fmt(self.high)}{unit}"
        if self.low is not None:
            return f"{self._name()} >= {_fmt(self.low)}{unit}"
        if self.high is not None:
            return f"{self._name()} < {_fmt(self.high)}{unit}"
        return f"{self._name()} finite"


@dataclass(frozen=True, kw_only=True)
class EnergyWindow(RangeCut):
    """``low_kev <= energy_kev < high_kev``."""

    column: str = "energy_kev"
    unit: str = field(default="keV", compare=False)
    low_kev: float | None = None
    high_kev: float | None = None

    def __post_init__(self):
        object.__setattr__(self, "low", self.low_kev)
        object.__setattr__(self, "high", self.high_kev)
        super().__post_init__()

    def to_dict(self):
        return {"cut": "EnergyWindow", "low_kev": self.low_kev, "high_kev": self.high_kev}


@dataclass(frozen=True, kw_only=True)
class PixelCountCut(RangeCut):
    """``low <= n_pixels < high`` (pixels of the main cluster)."""

    column: str = "n_pixels"


@dataclass(frozen=True, kw_only=True)
class ElongationCut(RangeCut):
    """``low <= m2_major_mm2 / m2_minor_mm2 < high`` (round tracks carry little angular information)."""

    column: str = "m2_major_mm2"

    def _values(self, table):
        long_ = _column(table, "m2_major_mm2").astype(float)
        trans = _column(table, "m2_minor_mm2").astype(float)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(trans > 0, long_ / trans, np.where(long_ > 0, np.inf, np.nan))

    def mask(self, table):
        values = self._values(table)
        keep = ~np.isnan(values)
        if self.low is not None:
            keep &= values >= self.low
        if self.high is not None:
            keep &= values < self.high
        return keep

    def _name(self):
        return "elongation"

    def to_dict(self):
        return {"cut": "ElongationCut", "low": self.low, "high": self.high}


_POSITIONS = {"conversion": ("conv_x_mm", "conv_y_mm"), "centroid": ("centroid_x_mm", "centroid_y_mm")}


def _check_position(position):
    if position == "barycentre":
        raise SelectionError("'position' = 'barycentre' is now 'centroid'")
    if position not in _POSITIONS:
        raise SelectionError(f"'position' must be one of {sorted(_POSITIONS)} (got {position!r})")


def _positive(name, value):
    if not (np.isfinite(value) and value > 0):
        raise SelectionError(f"'{name}' must be > 0 (got {value!r})")


@dataclass(frozen=True, kw_only=True)
class CircleRegion(Cut):
    """Events whose position lies within ``radius_mm`` of ``(x_mm, y_mm)``.

    ``position`` chooses the point of each track: ``"conversion"`` (conv_x_mm, conv_y_mm; default) or
    ``"centroid"`` (centroid_x_mm, centroid_y_mm).
    """

    x_mm: float = 0.0
    y_mm: float = 0.0
    radius_mm: float
    position: str = "conversion"

    def __post_init__(self):
        _positive("radius_mm", self.radius_mm)
        _check_position(self.position)

    def mask(self, table):
        xc, yc = _POSITIONS[self.position]
        x = _column(table, xc).astype(float)
        y = _column(table, yc).astype(float)
        return (x - self.x_mm) ** 2 + (y - self.y_mm) ** 2 <= self.radius_mm**2

    def describe(self):
        return f"{self.position} point within {_fmt(self.radius_mm)} mm of ({_fmt(self.x_mm)}, {_fmt(self.y_mm)})"


@dataclass(frozen=True, kw_only=True)
class RectangleRegion(Cut):
    """Events with ``x_min_mm <= x < x_max_mm`` and ``y_min_mm <= y < y_max_mm``."""

    x_min_mm: float
    x_max_mm: float
    y_min_mm: float
    y_max_mm: float
    position: str = "conversion"

    def __post_init__(self):
        _check_range("x_mm", self.x_min_mm, self.x_max_mm)
        _check_range("y_mm", self.y_min_mm, self.y_max_mm)
        _check_position(self.position)

    def mask(self, table):
        xc, yc = _POSITIONS[self.position]
        x = _column(table, xc).astype(float)
        y = _column(table, yc).astype(float)
        return (x >= self.x_min_mm) & (x < self.x_max_mm) & (y >= self.y_min_mm) & (y < self.y_max_mm)

    def describe(self):
        return (f"{self.position} point in x [{_fmt(self.x_min_mm)}, {_fmt(self.x_max_mm)}) "
                f"y [{_fmt(self.y_min_mm)}, {_fmt(self.y_max_mm)}) mm")


@dataclass(frozen=True, kw_only=True)
class HexagonRegion(Cut):
    """Events inside a regular hexagon of circumradius ``radius_mm`` centred on ``(x_mm, y_mm)``.

    ``rotation_rad`` = 0 puts a vertex on the +x axis (flat top and bottom); pi/6 puts one on +y.
    """

    x_mm: float = 0.0
    y_mm: float = 0.0
    radius_mm: float
    rotation_rad: float = 0.0
    position: str = "conversion"

    def __post_init__(self):
        _positive("radius_mm", self.radius_mm)
        _check_position(self.position)

    def mask(self, table):
        xc, yc = _POSITIONS[self.position]
        dx = _column(table, xc).astype(float) - self.x_mm
        dy = _column(table, yc).astype(float) - self.y_mm
        apothem = self.radius_mm * np.sqrt(3.0) / 2.0
        keep = np.isfinite(dx) & np.isfinite(dy)
        for k in range(3):  # three pairs of parallel edges, normals at rotation + pi/6 + k pi/3
            angle = self.rotation_rad + np.pi / 6 + k * np.pi / 3
            keep &= np.abs(dx * np.cos(angle) + dy * np.sin(angle)) <= apothem
        return keep

    def describe(self):
        return (f"{self.position} point in hexagon r = {_fmt(self.radius_mm)} mm at "
                f"({_fmt(self.x_mm)}, {_fmt(self.y_mm)})")


@dataclass(frozen=True)
class CutFlow:
    """How many events each step of a selection kept and removed."""

    n_input: int
    rows: tuple[tuple[str, int, int], ...]

    @property
    def n_kept(self) -> int:
        return self.rows[-1][1] if self.rows else self.n_input

    def to_dict(self) -> dict:
        return {"n_input": self.n_input,
                "steps": [{"cut": c, "kept": k, "removed": r} for c, k, r in self.rows]}

    def _lines(self):
        width = max([len(c) for c, _, _ in self.rows] + [28]) + 2
        pct = (lambda k: f"{100.0 * k / self.n_input:9.1f} %") if self.n_input else (lambda k: "        - ")
        lines = [f"{'cut':<{width}}{'kept':>6}{'removed':>9}  kept/input",
                 f"{'(input)':<{width}}{self.n_input:>6}{'-':>9}{pct(self.n_input)}"]
        lines += [f"{c:<{width}}{k:>6}{r:>9}{pct(k)}" for c, k, r in self.rows]
        return lines

    def __str__(self):
        return "\n".join(self._lines())

    def __repr__(self):
        return str(self)

    def _repr_html_(self):
        cells = [("(input)", self.n_input, "-")] + list(self.rows)
        body = "".join(f"<tr><td>{html.escape(c)}</td><td>{k}</td><td>{r}</td></tr>" for c, k, r in cells)
        return ("<table><thead><tr><th>cut</th><th>kept</th><th>removed</th></tr></thead>"
                f"<tbody>{body}</tbody></table>")


# ---------------------------------------------------------------------------------------------- TOML selections
_TOML_KEYS = ("reject_warnings", "status", "allowed_status", "energy_kev", "n_pixels", "elongation", "region",
              "range")
_REGION_KEYS = {
    "circle": ("shape", "x_mm", "y_mm", "radius_mm", "position"),
    "rectangle": ("shape", "x_min_mm", "x_max_mm", "y_min_mm", "y_max_mm", "position"),
    "hexagon": ("shape", "x_mm", "y_mm", "radius_mm", "rotation_deg", "position"),
}


def _pair(where, value):
    if not (isinstance(value, list | tuple) and len(value) == 2):
        raise SelectionError(f"{where}: expected [low, high] (use \"inf\" or -inf for an open side; got {value!r})")
    low, high = (None if v is None or (isinstance(v, float) and np.isinf(v)) else float(v) for v in value)
    return low, high


def _status_bits(where, names) -> int:
    from ..recon.status import Status

    bits = 0
    for name in names:
        try:
            bits |= int(Status[name])
        except KeyError:
            raise SelectionError(f"{where}: unknown status bit {name!r}; valid: "
                                 f"{[s.name for s in Status]}") from None
    return bits


def selection_from_dict(config: Mapping, *, source: str = "selection") -> Cut:
    """Build a selection from a plain mapping (the content of a selection TOML file).

    The default selection (:class:`UsableEvents`: an emission angle and no failure bit) is always the first step;
    the keys add to it (all optional; a missing key means no cut):

    ``reject_warnings = true``   also reject events with a warning bit (default false);
    ``status = true``            an explicit status cut: only ``status == 0`` ...
    ``allowed_status = [names]`` ... except these :class:`~trackfit.recon.status.Status` bits;
    ``energy_kev = [lo, hi]``    energy window; ``n_pixels = [lo, hi]``; ``elongation = [lo, hi]``;
    ``[region]``                 ``shape = "circle" | "rectangle" | "hexagon"`` and the parameters of
                                 :class:`CircleRegion`, :class:`RectangleRegion`, :class:`HexagonRegion`
                                 (``rotation_deg`` for the hexagon);
    ``[range]``                  ``column = [lo, hi]`` for any other column.

    Raises
    ------
    SelectionError
        Unknown keys (with the list of valid ones) or bad values, naming ``source``.
    """
    unknown = sorted(set(config) - set(_TOML_KEYS))
    if unknown:
        raise SelectionError(f"{source}: unknown key(s) {unknown}; valid keys: {list(_TOML_KEYS)}")
    reject = config.get("reject_warnings", False)
    if not isinstance(reject, bool):
        raise SelectionError(f"{source}: reject_warnings must be true or false (got {reject!r})")
    parts: list[Cut] = [UsableEvents(reject_warnings=reject)]
    if config.get("status", False) or "allowed_status" in config:
        bits = _status_bits(f"{source}: allowed_status", config.get("allowed_status", []))
        parts.append(StatusCut(allowed_bits=bits))
    if "energy_kev" in config:
        low, high = _pair(f"{source}: energy_kev", config["energy_kev"])
        parts.append(EnergyWindow(low_kev=low, high_kev=high))
    if "n_pixels" in config:
        low, high = _pair(f"{source}: n_pixels", config["n_pixels"])
        parts.append(PixelCountCut(low=low, high=high))
    if "elongation" in config:
        low, high = _pair(f"{source}: elongation", config["elongation"])
        parts.append(ElongationCut(low=low, high=high))
    if "region" in config:
        region = dict(config["region"])
        shape = region.get("shape")
        if shape not in _REGION_KEYS:
            raise SelectionError(f"{source}: region.shape must be one of {sorted(_REGION_KEYS)} (got {shape!r})")
        bad = sorted(set(region) - set(_REGION_KEYS[shape]))
        if bad:
            raise SelectionError(f"{source}: unknown key(s) {bad} in [region] ({shape}); "
                                 f"valid keys: {list(_REGION_KEYS[shape])}")
        region.pop("shape")
        try:
            if shape == "circle":
                parts.append(CircleRegion(**region))
            elif shape == "rectangle":
                parts.append(RectangleRegion(**region))
            else:
                rotation = np.deg2rad(float(region.pop("rotation_deg", 0.0)))
                parts.append(HexagonRegion(rotation_rad=float(rotation), **region))
        except TypeError as err:
            raise SelectionError(f"{source}: [region] ({shape}): {err}") from None
    for column, value in dict(config.get("range", {})).items():
        low, high = _pair(f"{source}: range.{column}", value)
        parts.append(RangeCut(column=column, low=low, high=high))
    return AllOf(parts=tuple(parts))


def read_selection(path) -> Cut:
    """Read a selection TOML file (see :func:`selection_from_dict` for the keys).

    A settings file of :mod:`trackfit.tuning` (tables ``[recon]`` and ``[selection]``) is read too: its
    ``[selection]`` table is the selection. The default selection is always its first step.
    """
    from .._toml import read_file

    config, _ = read_file(path, what="selection file", error=SelectionError)
    if isinstance(config.get("selection"), dict) and set(config) <= {"recon", "selection"}:
        return selection_from_dict(config["selection"], source=f"{path} [selection]")
    return selection_from_dict(config, source=str(path))


def _bounds(part) -> list[float]:
    """[low, high] of a range cut with open sides as -inf / inf (what a selection file writes)."""
    return [float("-inf") if part.low is None else float(part.low),
            float("inf") if part.high is None else float(part.high)]


def selection_to_dict(selection: Cut) -> dict:
    """The inverse of :func:`selection_from_dict` for selections that a selection file can express (a conjunction of
    the default selection and at most one status cut, energy window, pixel-count cut, elongation cut and region, plus
    column ranges). A file always holds the default selection, so a selection without it reads back with it.

    Raises
    ------
    SelectionError
        For ``|``, ``~`` or repeated cuts of one kind, which a selection file cannot express.
    """
    config: dict = {}
    for part in selection.steps():
        if isinstance(part, UsableEvents):
            if part.reject_warnings:
                config["reject_warnings"] = True
            continue
        if isinstance(part, StatusCut):
            key = "status"
            value = True
        elif isinstance(part, EnergyWindow):
            key, value = "energy_kev", _bounds(part)
        elif isinstance(part, PixelCountCut):
            key, value = "n_pixels", _bounds(part)
        elif isinstance(part, ElongationCut):
            key, value = "elongation", _bounds(part)
        elif isinstance(part, CircleRegion | RectangleRegion | HexagonRegion):
            key = "region"
            value = {f.name: getattr(part, f.name) for f in fields(part)}
            if isinstance(part, HexagonRegion):
                value["rotation_deg"] = float(np.rad2deg(value.pop("rotation_rad")))
            value = {"shape": {CircleRegion: "circle", RectangleRegion: "rectangle",
                               HexagonRegion: "hexagon"}[type(part)], **value}
        elif type(part) is RangeCut:
            ranges = config.setdefault("range", {})
            if part.column in ranges:
                raise SelectionError(f"a selection file holds one range per column ('{part.column}' twice)")
            ranges[part.column] = _bounds(part)
            continue
        else:
            raise SelectionError(f"a selection file cannot express {part.describe()!r} ({type(part).__name__})")
        if key in config:
            raise SelectionError(f"a selection file holds one '{key}' cut (got two)")
        config[key] = value
        if key == "status" and part.allowed_bits:
            from ..recon.status import Status

            config["allowed_status"] = [bit.name for bit in Status if bit & part.allowed_bits]
    return config


def write_selection(selection: Cut, path) -> None:
    """Write a selection file that :func:`read_selection` reads back into the same selection."""
    from .._toml import dumps

    with open(path, "w", encoding="utf-8") as handle:
        handle.write(dumps(selection_to_dict(selection), header="trackfit event selection"))


# ---------------------------------------------------------------------------------------------- comparing selections
_CUT_CLASSES = {cls.__name__: cls for cls in (Everything, UsableEvents, StatusCut, RangeCut, EnergyWindow,
                                              PixelCountCut, ElongationCut, CircleRegion, RectangleRegion,
                                              HexagonRegion)}


def cut_from_dict(description: Mapping) -> Cut:
    """The cut described by :meth:`Cut.to_dict` (e.g. the ``cuts`` recorded in a calibration file).

    Raises
    ------
    SelectionError
        For a description that names no known cut or has parameters the cut does not take.
    """
    if not isinstance(description, Mapping) or "cut" not in description:
        raise SelectionError(f"a cut description is a mapping with a 'cut' key (got {description!r})")
    name = description["cut"]
    values = {k: v for k, v in description.items() if k != "cut"}
    if name == "AllOf":
        return AllOf(parts=tuple(cut_from_dict(p) for p in values.get("parts", [])))
    if name == "AnyOf":
        return AnyOf(parts=tuple(cut_from_dict(p) for p in values.get("parts", [])))
    if name == "Invert":
        return Invert(part=cut_from_dict(values.get("part", {})))
    if name not in _CUT_CLASSES:
        raise SelectionError(f"unknown cut {name!r}; known: {sorted(_CUT_CLASSES) + ['AllOf', 'AnyOf', 'Invert']}")
    try:
        return _CUT_CLASSES[name](**values)
    except TypeError as err:
        raise SelectionError(f"cut {name!r}: {err}") from None


#: cuts on these columns choose which events of a run are analysed (energy band, region, time) without changing
#: the population of tracks at a given energy and position
_WHERE_COLUMNS = frozenset({"energy_kev", "pulse_height", "time_s", "trigger_id", "conv_x_mm", "conv_y_mm",
                            "centroid_x_mm", "centroid_y_mm"})


def _population_steps(selection: Cut) -> dict[str, str]:
    """The steps of a selection that change which tracks are kept at a given energy and position (status,
    track-shape cuts), normalised: ``status == 0`` next to the default counts as ``reject_warnings``."""
    steps = with_default(selection).steps()
    base = steps[0]
    out = {}
    for step in steps[1:]:
        if isinstance(step, EnergyWindow | CircleRegion | RectangleRegion | HexagonRegion):
            continue
        if type(step) is RangeCut and step.column in _WHERE_COLUMNS:
            continue
        if isinstance(step, StatusCut) and step.allowed_bits == 0:
            base = UsableEvents(reject_warnings=True)
            continue
        out[repr(sorted(step.to_dict().items(), key=str))] = step.describe()
    out[repr(sorted(base.to_dict().items(), key=str))] = base.describe()
    return out


def selection_differences(selection: Cut | None, reference: Cut | None) -> tuple[list[str], list[str]]:
    """How two selections differ in the cuts that change the tracks kept at a given energy and position.

    Status and track-shape cuts (the default selection and ``reject_warnings``, ``status``, pixel count,
    elongation, ranges of other columns) change the modulation factor and the spurious modulation of the events
    kept, so a measurement must repeat those of its calibration; energy windows, regions and time ranges choose
    *which* events are analysed and may differ (the calibration is a function of energy and position).

    Returns
    -------
    (only_in_selection, only_in_reference) : two lists of str
        The descriptions of the cuts found in only one of them (both empty when they agree).
    """
    mine, theirs = _population_steps(selection), _population_steps(reference)
    return ([text for key, text in mine.items() if key not in theirs],
            [text for key, text in theirs.items() if key not in mine])


_CALIBRATION_REASON = ("These cuts change the modulation factor and the spurious modulation: use the same ones "
                       "(energy windows and regions may differ)")


def warn_if_selections_differ(selection: Cut | None, reference: Cut | None, *, what: str, reference_name: str,
                              reason: str = _CALIBRATION_REASON, stacklevel: int = 3) -> bool:
    """Emit a :class:`SelectionMismatchWarning` when :func:`selection_differences` finds a difference; returns
    whether it did. ``what`` and ``reference_name`` name the two selections in the message, ``reason`` says why
    it matters."""
    mine, theirs = selection_differences(selection, reference)
    if not (mine or theirs):
        return False
    clauses = [f"only {name} has " + ", ".join(f"'{t}'" for t in texts)
               for name, texts in ((what, mine), (reference_name, theirs)) if texts]
    warnings.warn(SelectionMismatchWarning(
        f"{what} and {reference_name} ('{with_default(reference).describe()}') differ in status and track-shape "
        f"cuts: {'; '.join(clauses)}. {reason}"), stacklevel=stacklevel)
    return True
