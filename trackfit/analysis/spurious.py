"""Spurious modulation: calibration in (energy, position) bins, per-event subtraction, 0°/90° separation.

Spurious modulation is additive in Stokes space (Rankin et al. 2022): for unpolarized light
``E[cos 2phi] = Q_sp(E, x, y)`` and ``E[sin 2phi] = U_sp(E, x, y)``. Measure them with
:func:`measure_spurious_map` on unpolarized monochromatic runs (one energy node per run, or energy bins of one
run); :meth:`SpuriousMap.at` returns ``(Q_sp, U_sp)`` per event, interpolated linearly in energy between nodes
(constant outside) in the event's spatial cell; pass them to :func:`trackfit.analysis.stokes_parameters` as
``spurious_q``/``spurious_u``. :func:`separate_spurious` splits two measurements 90° apart into the
detector-fixed (spurious) and beam-fixed (genuine) parts.

Statistics: each cell with ``N`` events gives ``Q_sp`` to about ``1/sqrt(2N)`` (docs/methods.md section 5).
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

import numpy as np

__all__ = ["SpuriousMap", "measure_spurious_map", "SpuriousSeparation", "separate_spurious", "cell_edges",
           "centred_cell_edges"]


def cell_edges(low_mm: float, high_mm: float, cell_mm: float) -> np.ndarray:
    """Edges of cells of ``cell_mm`` covering [low_mm, high_mm] (the last cell may stick out)."""
    if not (np.isfinite(cell_mm) and cell_mm > 0):
        raise ValueError(f"'cell_mm' must be > 0 (got {cell_mm!r})")
    if not high_mm > low_mm:
        raise ValueError(f"cell range needs high > low (got [{low_mm}, {high_mm}])")
    n = max(int(np.ceil((high_mm - low_mm) / cell_mm - 1e-9)), 1)
    return low_mm + cell_mm * np.arange(n + 1)


def centred_cell_edges(values_mm, cell_mm: float) -> np.ndarray:
    """Edges of cells of about ``cell_mm`` laid over the finite ``values_mm``, centred on the data.

    ``n = round(span / cell_mm)`` cells (at least one) of ``cell_mm`` are centred on the middle of the data's span
    (the 0.5 to 99.5 percentiles, so stray events do not shift the grid); the two outer edges are then moved out to
    the smallest and largest value, so every event lies in a cell and the outer cells are cut alike on both sides.
    A flat field of 10 mm with 2.5 mm cells gets 4 x 4 full cells, not 5 x 5 with half-empty borders.
    """
    if not (np.isfinite(cell_mm) and cell_mm > 0):
        raise ValueError(f"'cell_mm' must be > 0 (got {cell_mm!r})")
    values = np.asarray(values_mm, dtype=float)
    values = values[np.isfinite(values)]
    if values.size == 0:
        raise ValueError("no finite positions to lay the cells over")
    low, high = np.percentile(values, [0.5, 99.5])
    n = max(int(round((high - low) / cell_mm)), 1)
    edges = 0.5 * (low + high) + cell_mm * (np.arange(n + 1) - 0.5 * n)
    edges[0] = min(edges[0], float(values.min()))
    edges[-1] = max(edges[-1], np.nextafter(float(values.max()), np.inf))
    return edges


def _cell_index(edges, values):
    """Index of the cell of each value; values outside the edges are clamped to the border cells."""
    idx = np.searchsorted(edges, values, side="right") - 1
    return np.clip(idx, 0, edges.size - 2)


@dataclass(frozen=True, kw_only=True)
class SpuriousMap:
    """Spurious Stokes parameters ``Q_sp``, ``U_sp`` at energy nodes and spatial cells.

    Attributes
    ----------
    energy_kev : ndarray, shape (k,)
        Energy nodes, increasing.
    x_edges_mm, y_edges_mm : ndarray
        Cell edges (nx + 1, ny + 1).
    q, u, q_err, u_err : ndarray, shape (k, nx, ny)
        ``<cos 2phi>``, ``<sin 2phi>`` of unpolarized events and their errors (NaN where empty: treated as 0).
    counts : ndarray, shape (k, nx, ny)
        Events per node and cell.
    position : str
        Which point of the track locates it: ``"conversion"`` or ``"centroid"``.
    """

    energy_kev: np.ndarray
    x_edges_mm: np.ndarray
    y_edges_mm: np.ndarray
    q: np.ndarray
    u: np.ndarray
    q_err: np.ndarray
    u_err: np.ndarray
    counts: np.ndarray
    position: str = "conversion"
    info: dict = field(default_factory=dict, compare=False)

    def __post_init__(self):
        energy = np.atleast_1d(np.asarray(self.energy_kev, dtype=float))
        if energy.ndim != 1 or np.any(np.diff(energy) <= 0):
            raise ValueError(f"'energy_kev' nodes must be strictly increasing (got {energy.tolist()})")
        shape = (energy.size, len(self.x_edges_mm) - 1, len(self.y_edges_mm) - 1)
        object.__setattr__(self, "energy_kev", energy)
        for name in ("q", "u", "q_err", "u_err", "counts"):
            arr = np.asarray(getattr(self, name), dtype=float)
            if arr.shape != shape:
                raise ValueError(f"'{name}' must have shape {shape} (energy nodes, x cells, y cells); "
                                 f"got {arr.shape}")
            object.__setattr__(self, name, arr)
        if self.position not in ("conversion", "centroid"):
            raise ValueError(f"'position' must be 'conversion' or 'centroid' (got {self.position!r})")

    @property
    def columns(self) -> tuple[str, str]:
        return ("conv_x_mm", "conv_y_mm") if self.position == "conversion" else ("centroid_x_mm", "centroid_y_mm")

    def at(self, energy_kev, x_mm, y_mm) -> tuple[np.ndarray, np.ndarray]:
        """``(Q_sp, U_sp)`` for each event: linear in energy between nodes (constant beyond), nearest cell.

        Empty cells count as 0; NaN energies or positions give 0.
        """
        energy = np.asarray(energy_kev, dtype=float)
        x = np.asarray(x_mm, dtype=float)
        y = np.asarray(y_mm, dtype=float)
        ix = _cell_index(self.x_edges_mm, np.nan_to_num(x))
        iy = _cell_index(self.y_edges_mm, np.nan_to_num(y))
        q_map = np.nan_to_num(self.q)
        u_map = np.nan_to_num(self.u)
        nodes = self.energy_kev
        if nodes.size == 1:
            j0 = np.zeros(energy.shape, dtype=int)
            j1, t = j0, np.zeros(energy.shape)
        else:
            e = np.clip(np.nan_to_num(energy, nan=nodes[0]), nodes[0], nodes[-1])
            j0 = np.clip(np.searchsorted(nodes, e, side="right") - 1, 0, nodes.size - 2)
            j1 = j0 + 1
            t = (e - nodes[j0]) / (nodes[j1] - nodes[j0])
        q = (1 - t) * q_map[j0, ix, iy] + t * q_map[j1, ix, iy]
        u = (1 - t) * u_map[j0, ix, iy] + t * u_map[j1, ix, iy]
        bad = ~(np.isfinite(energy) & np.isfinite(x) & np.isfinite(y))
        return np.where(bad, 0.0, q), np.where(bad, 0.0, u)

    def _weights(self, energy_kev, x_mm, y_mm):
        """Node indices, interpolation weights and flat cell index of each event (as used by :meth:`at`)."""
        energy = np.asarray(energy_kev, dtype=float)
        ix = _cell_index(self.x_edges_mm, np.nan_to_num(np.asarray(x_mm, dtype=float)))
        iy = _cell_index(self.y_edges_mm, np.nan_to_num(np.asarray(y_mm, dtype=float)))
        nodes = self.energy_kev
        if nodes.size == 1:
            j0 = np.zeros(energy.shape, dtype=int)
            return j0, j0, np.zeros(energy.shape), ix * self.q.shape[2] + iy
        e = np.clip(np.nan_to_num(energy, nan=nodes[0]), nodes[0], nodes[-1])
        j0 = np.clip(np.searchsorted(nodes, e, side="right") - 1, 0, nodes.size - 2)
        t = (e - nodes[j0]) / (nodes[j0 + 1] - nodes[j0])
        return j0, j0 + 1, t, ix * self.q.shape[2] + iy

    def sum_variance(self, energy_kev, x_mm, y_mm, coefficients) -> tuple[float, float]:
        """Variance of ``sum_k c_k Q_sp(event k)`` (and of the U sum) from the statistical errors of the map.

        Events in the same cell share the map value, so their contributions add linearly before squaring:
        ``var = sum_(node, cell) (sum_k c_k a_k)^2 sigma^2`` with ``a_k`` the interpolation weight. Used by the
        Stokes analysis to include the calibration uncertainty of the subtraction (``c_k = 2 w_k / mu_k``).
        """
        return self.variance_of_totals(self.cell_totals(energy_kev, x_mm, y_mm, coefficients))

    def cell_totals(self, energy_kev, x_mm, y_mm, coefficients) -> np.ndarray:
        """``sum_k c_k a_k`` per (energy node, cell), flattened: the part of :meth:`sum_variance` that adds up over
        events, so the totals of several tables (or blocks of rows) can be summed before
        :meth:`variance_of_totals` squares them."""
        c = np.asarray(coefficients, dtype=float)
        j0, j1, t, cell = self._weights(energy_kev, x_mm, y_mm)
        good = np.isfinite(c) & np.isfinite(np.asarray(energy_kev, dtype=float))
        n_cells = self.q.shape[1] * self.q.shape[2]
        size = self.energy_kev.size * n_cells
        total = np.bincount(j0[good] * n_cells + cell[good], weights=c[good] * (1 - t[good]), minlength=size)
        total += np.bincount(j1[good] * n_cells + cell[good], weights=c[good] * t[good], minlength=size)
        return total

    def variance_of_totals(self, totals) -> tuple[float, float]:
        """Variances of the Q and U sums from :meth:`cell_totals` (``sum (total^2 sigma^2)``)."""
        total = np.asarray(totals, dtype=float)
        q_var = np.nan_to_num(self.q_err.ravel() ** 2)
        u_var = np.nan_to_num(self.u_err.ravel() ** 2)
        return float(np.sum(total**2 * q_var)), float(np.sum(total**2 * u_var))

    def at_table(self, table) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`at` with the energy and position columns of an event table."""
        xc, yc = self.columns
        return self.at(table["energy_kev"], table[xc], table[yc])

    def __repr__(self):
        nx, ny = self.q.shape[1:]
        filled = np.isfinite(self.q)
        cell_x, cell_y = np.median(np.diff(self.x_edges_mm)), np.median(np.diff(self.y_edges_mm))
        lines = [f"SpuriousMap: {self.energy_kev.size} energy node(s), {nx} x {ny} cells of "
                 f"{cell_x:.3g} x {cell_y:.3g} mm ({self.position})",
                 f"  {'E (keV)':>8}{'events':>10}{'cells':>7}{'<Q_sp>':>10}{'<U_sp>':>10}{'rms Q_sp':>10}"]
        for k, e in enumerate(self.energy_kev):
            ok = filled[k]
            w = self.counts[k][ok]
            qm = np.average(self.q[k][ok], weights=w) if w.sum() > 0 else np.nan
            um = np.average(self.u[k][ok], weights=w) if w.sum() > 0 else np.nan
            rms = float(np.sqrt(np.mean(self.q[k][ok] ** 2))) if ok.any() else np.nan
            lines.append(f"  {e:>8.3f}{int(self.counts[k].sum()):>10}{int(ok.sum()):>7}{qm:>+10.4f}{um:>+10.4f}"
                         f"{rms:>10.4f}")
        return "\n".join(lines)

    def _repr_html_(self):
        return f"<pre>{html.escape(repr(self))}</pre>"


def _cell_means(phi, w, ix, iy, shape):
    flat = ix * shape[1] + iy
    size = shape[0] * shape[1]
    cos2, sin2 = np.cos(2 * phi), np.sin(2 * phi)
    sw = np.bincount(flat, weights=w, minlength=size)
    sw2 = np.bincount(flat, weights=w * w, minlength=size)
    n = np.bincount(flat, minlength=size).astype(float)
    sq = np.bincount(flat, weights=w * cos2, minlength=size)
    su = np.bincount(flat, weights=w * sin2, minlength=size)
    sqq = np.bincount(flat, weights=w * w * cos2 * cos2, minlength=size)
    suu = np.bincount(flat, weights=w * w * sin2 * sin2, minlength=size)
    with np.errstate(divide="ignore", invalid="ignore"):
        q = sq / sw
        u = su / sw
        # variance of a weighted mean from the compound-Poisson sums (as in trackfit.analysis.stokes)
        q_err = np.sqrt(np.maximum(sqq - 2 * q * np.bincount(flat, weights=w * w * cos2, minlength=size)
                                   + q * q * sw2, 0) / sw**2)
        u_err = np.sqrt(np.maximum(suu - 2 * u * np.bincount(flat, weights=w * w * sin2, minlength=size)
                                   + u * u * sw2, 0) / sw**2)
    empty = ~(sw > 0)
    for arr in (q, u, q_err, u_err):
        arr[empty] = np.nan
    return [a.reshape(shape) for a in (q, u, q_err, u_err, n)]


def measure_spurious_map(runs, *, x_edges_mm, y_edges_mm, position: str = "conversion",
                         min_counts: int = 1, energy_edges_kev=None, info: dict | None = None) -> SpuriousMap:
    """Measure ``Q_sp``, ``U_sp`` per spatial cell from unpolarized runs, one energy node per run (or per bin).

    Parameters
    ----------
    runs : sequence of mapping
        Each a table (mapping of columns) of selected unpolarized events of one line, with ``emission_rad``,
        ``energy_kev`` and the position columns; an optional ``"weights"`` entry gives per-event weights (use
        the science analysis weights). The node energy is the weighted mean energy of the run.
    x_edges_mm, y_edges_mm : array_like
        Cell edges (e.g. from :func:`cell_edges`).
    position : {"conversion", "centroid"}
        Which point of each track locates it.
    min_counts : int
        Cells with fewer events are left empty (NaN, applied as 0).
    energy_edges_kev : array_like, optional
        Pool all runs and make one node per energy bin instead (for broad-band unpolarized data); empty bins
        are skipped.
    """
    x_edges = np.asarray(x_edges_mm, dtype=float)
    y_edges = np.asarray(y_edges_mm, dtype=float)
    for name, edges in (("x_edges_mm", x_edges), ("y_edges_mm", y_edges)):
        if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0):
            raise ValueError(f"'{name}' must be increasing with at least 2 entries (got {edges.tolist()})")
    if position not in ("conversion", "centroid"):
        raise ValueError(f"'position' must be 'conversion' or 'centroid' (got {position!r})")
    xc, yc = ("conv_x_mm", "conv_y_mm") if position == "conversion" else ("centroid_x_mm", "centroid_y_mm")
    shape = (x_edges.size - 1, y_edges.size - 1)
    runs = list(runs)
    if energy_edges_kev is not None and runs:
        edges_e = np.asarray(energy_edges_kev, dtype=float)
        if edges_e.ndim != 1 or edges_e.size < 2 or np.any(np.diff(edges_e) <= 0):
            raise ValueError(f"'energy_edges_kev' must be increasing with at least 2 entries (got {edges_e.tolist()})")
        names = ["emission_rad", "energy_kev", xc, yc] + (["weights"] if all("weights" in r for r in runs) else [])
        pooled = {name: np.concatenate([np.asarray(r[name], dtype=float) for r in runs]) for name in names}
        runs = []
        for lo, hi in zip(edges_e[:-1], edges_e[1:], strict=True):
            inside = (pooled["energy_kev"] >= lo) & (pooled["energy_kev"] < hi)
            if np.any(inside):
                runs.append({name: values[inside] for name, values in pooled.items()})
    nodes = []
    for k, run in enumerate(runs):
        phi = np.asarray(run["emission_rad"], dtype=float)
        energy = np.asarray(run["energy_kev"], dtype=float)
        x = np.asarray(run[xc], dtype=float)
        y = np.asarray(run[yc], dtype=float)
        w = np.asarray(run["weights"], dtype=float) if "weights" in run else np.ones(phi.size)
        good = np.isfinite(phi) & np.isfinite(energy) & np.isfinite(x) & np.isfinite(y) & np.isfinite(w)
        good &= (x >= x_edges[0]) & (x < x_edges[-1]) & (y >= y_edges[0]) & (y < y_edges[-1])
        if not np.any(good):
            raise ValueError(f"unpolarized run {k} has no usable event inside the map "
                             f"(x {x_edges[0]:g}..{x_edges[-1]:g}, y {y_edges[0]:g}..{y_edges[-1]:g} mm)")
        ix = _cell_index(x_edges, x[good])
        iy = _cell_index(y_edges, y[good])
        q, u, q_err, u_err, n = _cell_means(phi[good], w[good], ix, iy, shape)
        sparse = n < min_counts
        for arr in (q, u, q_err, u_err):
            arr[sparse] = np.nan
        nodes.append((float(np.average(energy[good], weights=w[good])), q, u, q_err, u_err, n))
    if not nodes:
        raise ValueError("measure_spurious_map needs at least one unpolarized run (got none)")
    nodes.sort(key=lambda node: node[0])
    energies = [node[0] for node in nodes]
    if np.any(np.diff(energies) <= 0):
        raise ValueError(f"unpolarized runs must have distinct mean energies (got {energies}); merge runs of "
                         "the same line before measuring")
    stack = [np.stack([node[i] for node in nodes]) for i in range(1, 6)]
    return SpuriousMap(energy_kev=np.array(energies), x_edges_mm=x_edges, y_edges_mm=y_edges, q=stack[0],
                       u=stack[1], q_err=stack[2], u_err=stack[3], counts=stack[4], position=position,
                       info=dict(info or {}))


@dataclass(frozen=True, kw_only=True)
class SpuriousSeparation:
    """Detector-fixed (spurious) and beam-fixed (genuine) modulation from runs at 0° and 90°.

    All attributes are in units of ``<cos 2phi>``/``<sin 2phi>`` (not modulation-corrected) in the detector frame
    of the 0° run.
    """

    spurious_q: np.ndarray
    spurious_u: np.ndarray
    genuine_q: np.ndarray
    genuine_u: np.ndarray
    spurious_q_err: np.ndarray
    spurious_u_err: np.ndarray
    genuine_q_err: np.ndarray
    genuine_u_err: np.ndarray

    def __repr__(self):
        def fmt(v, e):
            v, e = np.asarray(v), np.asarray(e)
            return f"{float(v):+.5f} ± {float(e):.5f}" if v.ndim == 0 else f"array of shape {v.shape}"

        return ("SpuriousSeparation\n"
                f"  spurious Q  {fmt(self.spurious_q, self.spurious_q_err)}\n"
                f"  spurious U  {fmt(self.spurious_u, self.spurious_u_err)}\n"
                f"  genuine  Q  {fmt(self.genuine_q, self.genuine_q_err)}\n"
                f"  genuine  U  {fmt(self.genuine_u, self.genuine_u_err)}")


def separate_spurious(q_0, u_0, q_90, u_90, *, q_0_err=0.0, u_0_err=0.0, q_90_err=0.0,
                      u_90_err=0.0) -> SpuriousSeparation:
    """Split measured ``<cos 2phi>``, ``<sin 2phi>`` of two runs with the detector rotated by 90°.

    A polarization fixed to the beam changes sign in the detector frame under a 90° rotation, the spurious
    modulation does not: ``S_sp = (S_0 + S_90)/2``, ``S_gen = (S_0 - S_90)/2`` (docs/methods.md section 5). Works
    on scalars or on per-bin arrays (e.g. the ``q``/``u`` of two :class:`SpuriousMap`).
    """
    arrays = [np.asarray(v, dtype=float) for v in (q_0, u_0, q_90, u_90, q_0_err, u_0_err, q_90_err, u_90_err)]
    q0, u0, q90, u90, eq0, eu0, eq90, eu90 = arrays
    err_q = 0.5 * np.hypot(eq0, eq90)
    err_u = 0.5 * np.hypot(eu0, eu90)
    return SpuriousSeparation(spurious_q=0.5 * (q0 + q90), spurious_u=0.5 * (u0 + u90),
                              genuine_q=0.5 * (q0 - q90), genuine_u=0.5 * (u0 - u90), spurious_q_err=err_q,
                              spurious_u_err=err_u, genuine_q_err=err_q, genuine_u_err=err_u)
