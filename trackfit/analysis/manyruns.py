"""Polarization of many runs without holding them in memory: per-table sums, then their combination.

Everything :func:`~trackfit.analysis.measure_polarization` computes from the selected events is a sum over events
or is derived from sums: the Stokes sums and their second moments (Kislat et al. 2015; ``docs/methods.md`` §4), the
off-source sums, the sums of each energy band, the cut flow, the histogram of the modulation curve, the weighted
mean of the modulation factor's relative error and, for the error of a subtracted spurious-modulation map, the
coefficient totals per map cell (squared only at the end, because events of one cell share the map's error). So a
table, or a block of its rows, is reduced to a :class:`RunSums`; the sums of all tables add; :func:`finish` turns
the total into the same :class:`~trackfit.analysis.PolarizationMeasurement` the concatenated table would give (to
float rounding). Every table gets the same calibration and selection, applied row by row.

Memory is bounded by one block of rows (:data:`BLOCK_ROWS` rows read from a table file at a time). With a Dask
client each table file is reduced by a task (``measure_polarization(paths, ..., client=client)``).
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from .calfile import Calibration
from .estimates import with_estimate
from .modulation import AngleHistogram, angle_histogram
from .selection import Cut, CutFlow, EnergyWindow, select_rows
from .stokes import StokesSums, stokes_sums

__all__ = ["RunSums", "MeasurementSpec", "table_sums", "sum_tables", "BLOCK_ROWS", "as_table_list"]

#: rows of a table file reduced at once (memory: this many rows of every column)
BLOCK_ROWS = 2_000_000


def _zero_sums() -> StokesSums:
    return StokesSums(i=0.0, q=0.0, u=0.0, w2=0.0, qq=0.0, uu=0.0, qu=0.0, qi=0.0, ui=0.0, m2=0.0, n_events=0)


@dataclass(frozen=True, kw_only=True)
class MeasurementSpec:
    """What is measured, the same for every table (picklable, so Dask tasks can carry it)."""

    selection: Cut
    calibration: Calibration | None
    modulation_factor: float | None
    weighting: object
    background_selection: Cut | None
    energy_edges_kev: np.ndarray | None
    n_bins: int
    use_gain_drift: bool
    estimator: str | None = None  # the emission estimate every table is measured with (None: each table's own)


@dataclass(frozen=True)
class _Part:
    """Sums of one set of events (source or background, all energies or one band)."""

    n_rows: int = 0
    sums: StokesSums = field(default_factory=_zero_sums)
    cells: np.ndarray | None = None  # spurious-map coefficient totals

    def __add__(self, other: _Part) -> _Part:
        cells = self.cells if other.cells is None else (other.cells if self.cells is None
                                                        else self.cells + other.cells)
        return _Part(self.n_rows + other.n_rows, self.sums + other.sums, cells)

    def stokes_sums(self, calibration) -> StokesSums:
        """The sums with the spurious map's error added."""
        if self.cells is None or calibration is None or calibration.spurious_modulation is None:
            return self.sums
        return self.sums.with_extra_variance(*calibration.spurious_modulation.variance_of_totals(self.cells))


def _add_flows(a: CutFlow | None, b: CutFlow | None) -> CutFlow | None:
    if a is None or b is None:
        return a if b is None else b
    if [r[0] for r in a.rows] != [r[0] for r in b.rows]:
        raise ValueError("cut flows of different selections cannot be added")
    return CutFlow(n_input=a.n_input + b.n_input,
                   rows=tuple((c, k1 + k2, r1 + r2) for (c, k1, r1), (_, k2, r2) in zip(a.rows, b.rows, strict=True)))


@dataclass(frozen=True)
class RunSums:
    """Additive summary of the events of one or more tables (see the module docstring); add with ``+``."""

    flow: CutFlow | None = None
    source: _Part = field(default_factory=_Part)
    background_flow: CutFlow | None = None
    background: _Part = field(default_factory=_Part)
    bands: tuple[_Part, ...] = ()
    background_bands: tuple[_Part, ...] = ()
    histogram: AngleHistogram | None = None
    mu_rel_weighted: float = 0.0  # sum of w * (relative error of mu) over events with energy, weight and angle
    mu_weight: float = 0.0  # sum of w over the same events
    n_tables: int = 0

    def __add__(self, other: RunSums) -> RunSums:
        if not isinstance(other, RunSums):
            return NotImplemented

        def add_bands(a, b):
            if not a or not b:
                return a or b
            return tuple(x + y for x, y in zip(a, b, strict=True))

        histogram = self.histogram if other.histogram is None else (
            other.histogram if self.histogram is None else self.histogram + other.histogram)
        return RunSums(flow=_add_flows(self.flow, other.flow), source=self.source + other.source,
                       background_flow=_add_flows(self.background_flow, other.background_flow),
                       background=self.background + other.background,
                       bands=add_bands(self.bands, other.bands),
                       background_bands=add_bands(self.background_bands, other.background_bands),
                       histogram=histogram, mu_rel_weighted=self.mu_rel_weighted + other.mu_rel_weighted,
                       mu_weight=self.mu_weight + other.mu_weight, n_tables=self.n_tables + other.n_tables)


# ------------------------------------------------------------------------------------------------ one table
def _prepared(table, spec: MeasurementSpec, selection: Cut):
    calibration = spec.calibration
    columns = calibration.apply(table, use_gain_drift=spec.use_gain_drift) if calibration is not None else dict(table)
    flow = selection.cut_flow(columns)
    return select_rows(columns, selection.mask(columns)), flow


def corrections(events, spec: MeasurementSpec):
    """Per-event modulation factor, weights and spurious modulation of selected events."""
    from .polarimetry import event_weights

    calibration = spec.calibration
    if spec.modulation_factor is not None:
        mu = spec.modulation_factor
    elif calibration is not None and calibration.modulation_factor is not None:
        mu = events["modulation_factor"]
    else:
        raise ValueError("measuring polarization needs a modulation factor: a calibration with a "
                         "modulation_factor curve, or modulation_factor=<value>")
    spurious = {}
    if calibration is not None and calibration.spurious_modulation is not None:
        spurious = {"spurious_q": events["spurious_q"], "spurious_u": events["spurious_u"]}
    return mu, event_weights(events, spec.weighting), spurious


def _part(events, spec: MeasurementSpec) -> _Part:
    n_rows = len(events["emission_rad"])
    mu, weights, spurious = corrections(events, spec)
    sums = stokes_sums(events["emission_rad"], modulation_factor=mu, weights=weights, **spurious)
    cells = None
    if spurious:  # the subtracted map has statistical errors shared by all events of a cell
        spurious_map = spec.calibration.spurious_modulation
        xc, yc = spurious_map.columns
        w = np.ones(n_rows) if weights is None else weights
        phi = np.asarray(events["emission_rad"], dtype=float)
        coefficients = np.where(np.isfinite(phi), 2.0 * w / np.asarray(mu, dtype=float), np.nan)
        cells = spurious_map.cell_totals(events["energy_kev"], events[xc], events[yc], coefficients)
    return _Part(n_rows, sums, cells)


def _bands(events, spec: MeasurementSpec) -> tuple[_Part, ...]:
    if spec.energy_edges_kev is None:
        return ()
    edges = spec.energy_edges_kev
    out = []
    for lo, hi in zip(edges[:-1], edges[1:], strict=True):
        band = EnergyWindow(low_kev=float(lo), high_kev=float(hi))
        band_events = select_rows(events, band.mask(events))
        out.append(_part(band_events, spec) if len(band_events["emission_rad"]) else _Part())
    return tuple(out)


def table_sums(table, spec: MeasurementSpec, *, source: bool = True, background: bool = False) -> RunSums:
    """Reduce one table (a mapping of columns, or the path of a table file, read :data:`BLOCK_ROWS` rows at a time)
    to its :class:`RunSums`: its source events (``source``) and/or its off-source events (``background``)."""
    if isinstance(table, str | os.PathLike):
        from ..io.table import read_table

        path = Path(table)
        n_rows = len(read_table(path, ["status"]))  # one column every table has: the row count
        total = RunSums(n_tables=1)
        for a in range(0, max(n_rows, 1), BLOCK_ROWS):
            block = read_table(path, start=a, stop=a + BLOCK_ROWS)
            total = total + replace(table_sums(block, spec, source=source, background=background), n_tables=0)
        return total
    out = RunSums(n_tables=1)
    table = with_estimate(table, spec.estimator)  # the chosen estimate in emission_rad, conv_x_mm, conv_y_mm
    if source:
        events, flow = _prepared(table, spec, spec.selection)
        part = _part(events, spec)
        mu, weights, _ = corrections(events, spec)
        phi = np.asarray(events["emission_rad"], dtype=float)
        histogram = angle_histogram(phi, n_bins=spec.n_bins, weights=weights)
        mu_rel_weighted = mu_weight = 0.0
        calibration = spec.calibration
        if spec.modulation_factor is None and calibration is not None and calibration.modulation_factor is not None:
            curve = calibration.modulation_factor
            energy = np.asarray(events["energy_kev"], dtype=float)
            w = np.ones(energy.size) if weights is None else np.asarray(weights, dtype=float)
            good = np.isfinite(energy) & np.isfinite(w) & np.isfinite(phi)
            if np.any(good):
                rel = curve.error(energy[good]) / curve(energy[good])
                mu_rel_weighted, mu_weight = float(np.sum(w[good] * rel)), float(np.sum(w[good]))
        out = replace(out, flow=flow, source=part, bands=_bands(events, spec), histogram=histogram,
                      mu_rel_weighted=mu_rel_weighted, mu_weight=mu_weight)
    if background:
        from .selection import with_default

        off_events, off_flow = _prepared(table, spec, with_default(spec.background_selection))
        out = replace(out, background_flow=off_flow, background=_part(off_events, spec),
                      background_bands=_bands(off_events, spec))
    return out


def as_table_list(tables) -> list | None:
    """``tables`` as a list when it names several tables (a sequence of mappings or paths), else None (one table)."""
    if isinstance(tables, Mapping | str | os.PathLike):
        return None
    if isinstance(tables, Sequence) or hasattr(tables, "__iter__"):
        return list(tables)
    return None


def sum_tables(tables, spec: MeasurementSpec, *, background_tables=None, client=None) -> RunSums:
    """The :class:`RunSums` of source tables (and of separate off-source tables, if any), one table at a time, or
    as tasks of a Dask ``client`` (tables given as paths are then read by the workers)."""
    same_table_background = spec.background_selection is not None and background_tables is None
    work = [(t, True, same_table_background) for t in tables]
    work += [(t, False, True) for t in (background_tables or [])]
    if client is None:
        total = RunSums()
        for table, source, background in work:
            total = total + table_sums(table, spec, source=source, background=background)
        return total
    futures = [client.submit(table_sums, str(t) if isinstance(t, os.PathLike) else t, spec, source=source,
                             background=background, pure=False) for t, source, background in work]
    total = RunSums()
    for future in futures:  # in input order, so the float sums do not depend on which task finished first
        total = total + future.result()
    return total
