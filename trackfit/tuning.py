"""Tuning reconstruction settings and selection cuts on a polarized and an unpolarized run.

What to use when: :func:`sweep_settings` evaluates every combination of a grid of reconstruction parameters
(:class:`~trackfit.ReconConfig` fields such as ``threshold_adc``, ``start_search_inner_rms``,
``start_search_outer_rms``, ``second_pass_length_mm``) and
selection cuts (energy window, minimum elongation, minimum pixel count, fiducial radius) on in-memory subsamples of
a 100 %-polarized (or known-degree) run and an unpolarized run. The kernels run again only when a reconstruction
parameter changes; cut-only points reuse the event tables. Each point is measured with the emission estimate of its
settings (``emission_estimator``); the start search and the second pass (``TWO_STAGE_SETTINGS`` of
:mod:`trackfit.recon.config`) are settings of the two-stage estimate only, so a sweep of them needs
``emission_estimator = "two-stage"`` (the default adaptive estimate sets them per track, docs/methods.md §11).
For every point it reports:

* ``efficiency``: fraction of the polarized subsample kept (the default selection, an emission angle and no failure
  status bit, and the cuts), epsilon;
* ``modulation``: the modulation factor mu of the kept events (measured modulation / known degree), with error;
* ``quality``: the quality factor ``mu * sqrt(epsilon)`` with error; MDP scales as its inverse (docs/methods.md §2);
* ``mdp99``: MDP99 for the events the whole run would keep (Weisskopf et al. 2010);
* ``residual_modulation``: the modulation amplitude of the unpolarized run after the same cuts, with error.

The best point (largest quality factor, optionally among points whose residual modulation is consistent with zero)
converts to a :class:`~trackfit.ReconConfig` plus a selection and is written to one TOML file that
``trackfit reconstruct --config`` and the polarization command both read (:func:`read_settings` in Python).
"""

from __future__ import annotations

import itertools
import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from ._toml import dumps
from .events import EventBatch
from .io.raw import RawEventReader, open_raw

__all__ = ["sweep_settings", "SweepResult", "read_settings", "CUT_PARAMETERS", "load_subsample"]

#: cut parameters the sweep understands, with their meaning
CUT_PARAMETERS = {
    "energy_kev": "energy window (low_kev, high_kev) on energy_kev",
    "elongation_min": "minimum elongation m2_major_mm2 / m2_minor_mm2",
    "n_pixels_min": "minimum number of pixels in the main cluster",
    "fiducial_radius_mm": "conversion point within this radius of the chip centre, mm",
}

_METRICS = ("n_kept", "efficiency", "efficiency_err", "modulation", "modulation_err", "quality", "quality_err",
            "mdp99", "residual_modulation", "residual_modulation_err", "recon_seconds")


def load_subsample(source, n_events: int | None) -> tuple[EventBatch, int]:
    """The first ``n_events`` events of a run (a raw file path, an open reader or a batch) and the run's size."""
    if isinstance(source, EventBatch):
        n = len(source) if n_events is None else min(int(n_events), len(source))
        return (source if n == len(source) else source.select(np.arange(n))), len(source)
    if isinstance(source, RawEventReader):
        n = len(source) if n_events is None else min(int(n_events), len(source))
        return source.read_batch(0, n, with_truth=False), len(source)
    with open_raw(source) as reader:
        return load_subsample(reader, n_events)


def _selection_dict(point: Mapping) -> dict:
    """The selection (in the keys of :func:`trackfit.analysis.selection_from_dict`) of one cut point; the default
    selection comes with every selection file, so it is not a key."""
    selection: dict = {}
    if point.get("energy_kev") is not None:
        low, high = point["energy_kev"]
        selection["energy_kev"] = [float(low), float(high)]
    if point.get("n_pixels_min") is not None:
        selection["n_pixels"] = [float(point["n_pixels_min"]), math.inf]
    if point.get("elongation_min") is not None:
        selection["elongation"] = [float(point["elongation_min"]), math.inf]
    if point.get("fiducial_radius_mm") is not None:
        selection["region"] = {"shape": "circle", "x_mm": 0.0, "y_mm": 0.0,
                               "radius_mm": float(point["fiducial_radius_mm"]), "position": "conversion"}
    return selection


def _grid(values: Mapping | None, valid: Sequence[str], what: str) -> tuple[list[str], list[tuple]]:
    values = dict(values or {})
    unknown = sorted(set(values) - set(valid))
    if unknown:
        raise ValueError(f"unknown {what} parameter(s) {unknown}; valid: {sorted(valid)}")
    names = list(values)
    for name in names:
        if isinstance(values[name], str) or not isinstance(values[name], Sequence | np.ndarray):
            values[name] = [values[name]]
        if len(values[name]) == 0:
            raise ValueError(f"{what} parameter '{name}' has no values to try")
    return names, list(itertools.product(*(list(values[n]) for n in names))) or [()]


def _modulation(angles, polarization_degree=1.0):
    """Measured modulation amplitude / known degree, and its error (Kislat et al. 2015 estimators)."""
    from .analysis import stokes_parameters

    angles = angles[np.isfinite(angles)]
    if len(angles) < 2:
        return math.nan, math.nan
    result = stokes_parameters(angles, modulation_factor=1.0, confidence_level=None)
    return result.degree / polarization_degree, result.degree_err / polarization_degree


@dataclass
class SweepResult:
    """The metrics of every point of a settings sweep, one row per point.

    Attributes
    ----------
    columns : dict of str to ndarray
        The swept parameters (one column each; the energy window as ``energy_low_kev`` and ``energy_high_kev``) and
        the metrics ``n_kept``, ``efficiency`` (+ ``_err``, binomial), ``modulation`` (+ ``_err``), ``quality``
        (+ ``_err``), ``mdp99``, ``residual_modulation`` (+ ``_err``, NaN without an unpolarized run),
        ``recon_seconds``.
    recon_parameters, cut_parameters : list of str
        The swept names.
    base_config : ReconConfig
    best_index : int
        Row of the largest quality factor among the eligible points (see :func:`sweep_settings`).
    """

    columns: dict
    recon_parameters: list
    cut_parameters: list
    base_config: object
    best_index: int
    points: list = field(repr=False)
    n_polarized: int = 0
    n_unpolarized: int = 0
    run_events: int = 0

    def __len__(self):
        return len(self.points)

    def row(self, index: int | None = None) -> dict:
        """All columns of one point (default: the best one) as Python scalars."""
        index = self.best_index if index is None else int(index)
        return {k: v[index].item() if hasattr(v[index], "item") else v[index] for k, v in self.columns.items()}

    def config(self, index: int | None = None):
        """The :class:`~trackfit.ReconConfig` of a point (default: the best one)."""
        index = self.best_index if index is None else int(index)
        return replace(self.base_config, **self.points[index][0])

    def selection(self, index: int | None = None) -> dict:
        """The selection of a point as a dict (the keys of a selection TOML file)."""
        index = self.best_index if index is None else int(index)
        return _selection_dict(self.points[index][1])

    def cut(self, index: int | None = None):
        """The selection of a point as a :class:`trackfit.analysis.Cut`."""
        from .analysis import selection_from_dict

        return selection_from_dict(self.selection(index), source=f"sweep point {index}")

    def to_toml(self, index: int | None = None) -> str:
        """One settings file: ``[recon]`` (every ReconConfig key) and ``[selection]``, with the point's metrics."""
        index = self.best_index if index is None else int(index)
        row = self.row(index)
        header = (f"trackfit settings chosen by a sweep of {len(self)} points (row {index})\n"
                  f"efficiency {row['efficiency']:.4f}, modulation {row['modulation']:.4f} +- "
                  f"{row['modulation_err']:.4f}, quality {row['quality']:.4f} +- {row['quality_err']:.4f}, "
                  f"residual modulation {row['residual_modulation']:.4f} +- {row['residual_modulation_err']:.4f}")
        return dumps({"recon": self.config(index).to_dict(), "selection": self.selection(index)}, header=header)

    def write_toml(self, path, index: int | None = None) -> Path:
        """Write :meth:`to_toml` to ``path``; read it back with :func:`read_settings`."""
        path = Path(path)
        path.write_text(self.to_toml(index))
        return path

    def to_pandas(self):
        try:
            import pandas as pd
        except ImportError:
            raise ImportError('SweepResult.to_pandas needs pandas: pip install "trackfit[pandas]"') from None
        return pd.DataFrame(self.columns)

    # ------------------------------------------------------------------ display
    def _table_rows(self, limit=40):
        names = [n for n in self.columns if n != "recon_seconds"]
        order = np.argsort(-np.nan_to_num(self.columns["quality"], nan=-np.inf))[:limit]
        rows = []
        for i in order:
            cells = []
            for n in names:
                v = self.columns[n][i]
                cells.append(f"{v:.4g}" if isinstance(v, float | np.floating) else str(v))
            rows.append((("*" if i == self.best_index else "") + str(i), cells))
        return names, rows

    def __repr__(self):
        names, rows = self._table_rows()
        widths = [max(len(n), *(len(r[1][k]) for r in rows)) for k, n in enumerate(names)]
        lines = [f"SweepResult: {len(self)} points, {self.n_polarized} polarized / {self.n_unpolarized} unpolarized "
                 f"events, best row {self.best_index} (*); rows by decreasing quality",
                 "row   " + "  ".join(n.rjust(w) for n, w in zip(names, widths, strict=True))]
        for label, cells in rows:
            lines.append(f"{label:<5} " + "  ".join(c.rjust(w) for c, w in zip(cells, widths, strict=True)))
        return "\n".join(lines)

    def _repr_html_(self):
        import html

        names, rows = self._table_rows()
        head = "".join(f"<th>{html.escape(n)}</th>" for n in ["row", *names])
        body = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in [label, *cells]) + "</tr>"
                       for label, cells in rows)
        caption = (f"{len(self)} points; best row {self.best_index} (*), largest quality factor "
                   "mu sqrt(efficiency)")
        return f"<table><caption>{caption}</caption><tr>{head}</tr>{body}</table>"

    def plot(self, parameters: Sequence[str] | None = None):
        """Profiles of modulation, efficiency, quality and residual modulation against each swept parameter.

        For each value of a parameter the panel shows the point with the best quality factor among all points
        sharing that value (a profile over the other parameters); the overall best point is marked by a star.

        Returns
        -------
        matplotlib Figure
        """
        import matplotlib.pyplot as plt

        if parameters is None:
            parameters = [n for n in self.columns if n not in _METRICS and len(np.unique(self.columns[n])) > 1]
        if not parameters:
            raise ValueError("no swept parameter takes more than one value")
        metrics = [("modulation", "modulation factor"), ("efficiency", "efficiency"),
                   ("quality", "quality mu sqrt(eps)"), ("residual_modulation", "residual modulation")]
        fig, axes = plt.subplots(len(metrics), len(parameters), figsize=(3.2 * len(parameters), 8.5),
                                 sharex="col", squeeze=False, layout="constrained")
        quality = np.nan_to_num(self.columns["quality"], nan=-np.inf)
        for j, name in enumerate(parameters):
            values = np.asarray(self.columns[name])
            numeric = values.dtype.kind in "iuf"
            finite = np.isfinite(values) if numeric else np.ones(len(values), bool)
            uniq = np.unique(values[finite])
            best_rows = [np.flatnonzero(values == v)[np.argmax(quality[values == v])] for v in uniq]
            # points without this cut (value None, stored as NaN): their best, as a dotted line
            uncut = np.flatnonzero(~finite)
            uncut_best = uncut[np.argmax(quality[uncut])] if len(uncut) else None
            for k, (metric, label) in enumerate(metrics):
                ax = axes[k, j]
                y = self.columns[metric][best_rows]
                err = self.columns.get(metric + "_err")
                ax.errorbar(uniq, y, yerr=None if err is None else err[best_rows], marker="o", ms=4, capsize=2)
                if uncut_best is not None:
                    ax.axhline(self.columns[metric][uncut_best], color="#1f77b4", ls=":", lw=1.2,
                               label="no such cut" if k == 0 else None)
                if metric == "residual_modulation":
                    ax.axhline(0.0, color="0.6", lw=0.8)
                if finite[self.best_index]:
                    ax.plot(values[self.best_index], self.columns[metric][self.best_index], marker="*", ms=13,
                            color="#d62728", ls="none", label="best" if k == 0 else None)
                if j == 0:
                    ax.set_ylabel(label)
                if k == len(metrics) - 1:
                    ax.set_xlabel(name)
            if axes[0, j].get_legend_handles_labels()[0]:
                axes[0, j].legend(fontsize="x-small")
        return fig


def sweep_settings(polarized, unpolarized=None, *, recon_grid: Mapping | None = None,
                   cut_grid: Mapping | None = None, base_config=None, n_events: int | None = 50_000,
                   polarization_degree: float = 1.0, run_events: int | None = None,
                   max_residual_sigma: float | None = None, progress: bool = False) -> SweepResult:
    """Evaluate a grid of reconstruction settings and selection cuts (see the module documentation).

    Parameters
    ----------
    polarized : EventBatch, RawEventReader or path
        A run with a known polarization degree (a 100 %-polarized calibration run by default).
    unpolarized : EventBatch, RawEventReader or path, optional
        An unpolarized run at a similar energy, for the residual (spurious) modulation.
    recon_grid : mapping of str to sequence
        ReconConfig field -> values to try, e.g.
        ``{"start_search_inner_rms": [1.2, 1.5, 1.8], "second_pass_length_mm": [0.03, 0.05]}`` (settings of the
        two-stage estimate: the base config, or the grid, must then choose ``emission_estimator = "two-stage"``).
    cut_grid : mapping of str to sequence
        Keys of :data:`CUT_PARAMETERS` -> values, e.g. ``{"energy_kev": [(5.0, 7.0)], "elongation_min": [1, 1.5]}``.
        A value ``None`` means "no such cut". Every point keeps the default selection (an emission angle, no
        failure bit) and adds its cuts.
    base_config : ReconConfig, optional
        Settings not in ``recon_grid`` (default ``ReconConfig()``).
    n_events : int or None
        Events of each run to use (the first ones; None = all).
    polarization_degree : float
        Known degree of the polarized run (modulation factor = measured modulation / degree).
    run_events : int, optional
        Size of the run for which ``mdp99`` is quoted (default: all events of the polarized run).
    max_residual_sigma : float, optional
        Only points whose residual modulation is below this many standard errors are eligible as the best point.
    progress : bool
        Show a progress bar over the reconstruction points.

    Returns
    -------
    SweepResult

    Raises
    ------
    ValueError
        Unknown or invalid parameters, or a grid that varies a setting of the two-stage estimate
        (:data:`~trackfit.recon.config.TWO_STAGE_SETTINGS`) at points that analyse another estimate.
    """
    from .analysis import mdp99, selection_from_dict
    from .analysis.estimates import with_estimate
    from .recon import ReconConfig, reconstruct
    from .recon.config import TWO_STAGE_SETTINGS

    base_config = base_config or ReconConfig()
    if not 0 < polarization_degree <= 1:
        raise ValueError(f"'polarization_degree' must be in (0, 1] (got {polarization_degree!r})")
    recon_names, recon_points = _grid(recon_grid, ReconConfig.field_names(), "reconstruction")
    cut_names, cut_points = _grid(cut_grid, list(CUT_PARAMETERS), "cut")
    varied = [name for k, name in enumerate(recon_names)
              if name in TWO_STAGE_SETTINGS and len({point[k] for point in recon_points}) > 1]
    for point in recon_points:  # fail early, before any reconstruction, on a bad value
        config = replace(base_config, **dict(zip(recon_names, point, strict=True)))
        if varied and config.emission_estimator != "two-stage":
            raise ValueError(f"recon_grid varies {varied[0]!r}, a setting of the two-stage estimate, but its points "
                             f"analyse the {config.emission_estimator!r} estimate, which sets its own for each track "
                             "(docs/methods.md §11): sweep with emission_estimator = 'two-stage' in base_config")
    pol_batch, pol_total = load_subsample(polarized, n_events)
    unpol_batch = load_subsample(unpolarized, n_events)[0] if unpolarized is not None else None
    if len(pol_batch) == 0:
        raise ValueError("the polarized run has no events")
    run_events = pol_total if run_events is None else int(run_events)
    cuts = [selection_from_dict(_selection_dict(dict(zip(cut_names, c, strict=True))), source=f"cut point {c}")
            for c in cut_points]

    rows, points = [], []
    iterator = recon_points
    if progress:
        from tqdm.auto import tqdm

        iterator = tqdm(recon_points, desc="sweep", unit=" settings")
    for recon_point in iterator:
        params = dict(zip(recon_names, recon_point, strict=True))
        config = replace(base_config, **params)
        t0 = time.perf_counter()
        pol_table = with_estimate(reconstruct(pol_batch, config))  # the config's emission estimate
        unpol_table = with_estimate(reconstruct(unpol_batch, config)) if unpol_batch is not None else None
        seconds = time.perf_counter() - t0
        for cut_point, cut in zip(cut_points, cuts, strict=True):
            keep = cut.mask(pol_table)
            n_kept = int(keep.sum())
            eff = n_kept / len(pol_batch)
            mu, mu_err = _modulation(np.asarray(pol_table["emission_rad"])[keep], polarization_degree)
            eff_err = math.sqrt(eff * (1 - eff) / len(pol_batch))
            quality = mu * math.sqrt(eff)
            # error propagation of mu sqrt(eps), mu and eps treated as independent
            quality_err = math.sqrt((mu_err * math.sqrt(eff)) ** 2
                                    + (mu * eff_err / (2 * math.sqrt(eff))) ** 2) if eff > 0 else math.nan
            mdp = (mdp99(max(round(eff * run_events), 1), modulation_factor=mu)
                   if n_kept >= 2 and 0 < mu <= 1 else math.nan)
            residual = (math.nan, math.nan)
            if unpol_table is not None:
                residual = _modulation(np.asarray(unpol_table["emission_rad"])[cut.mask(unpol_table)])
            row = dict(params)
            for name, value in zip(cut_names, cut_point, strict=True):
                if name == "energy_kev":
                    low, high = value if value is not None else (math.nan, math.nan)
                    row["energy_low_kev"], row["energy_high_kev"] = float(low), float(high)
                else:
                    row[name] = math.nan if value is None else value
            row.update(n_kept=n_kept, efficiency=eff, efficiency_err=eff_err, modulation=mu, modulation_err=mu_err,
                       quality=quality, quality_err=quality_err, mdp99=mdp, residual_modulation=residual[0],
                       residual_modulation_err=residual[1], recon_seconds=seconds)
            rows.append(row)
            points.append((params, dict(zip(cut_names, cut_point, strict=True))))
    columns = {name: np.array([r[name] for r in rows]) for name in rows[0]}
    eligible = np.isfinite(columns["quality"])
    if max_residual_sigma is not None and unpol_batch is not None:
        with np.errstate(invalid="ignore", divide="ignore"):
            significance = columns["residual_modulation"] / columns["residual_modulation_err"]
        eligible &= significance < max_residual_sigma
    if not eligible.any():
        raise ValueError("no sweep point is eligible: every point lost all events"
                         + (" or exceeds max_residual_sigma" if max_residual_sigma is not None else ""))
    best = int(np.flatnonzero(eligible)[np.argmax(columns["quality"][eligible])])
    return SweepResult(columns=columns, recon_parameters=recon_names, cut_parameters=cut_names,
                       base_config=base_config, best_index=best, points=points, n_polarized=len(pol_batch),
                       n_unpolarized=0 if unpol_batch is None else len(unpol_batch), run_events=run_events)


def read_settings(path):
    """Read a settings file written by :meth:`SweepResult.write_toml`: ``(ReconConfig, Cut)``.

    A file with only reconstruction keys gives the default selection (an emission angle and no failure bit).
    """
    from ._toml import read_file
    from .analysis import selection_from_dict
    from .recon import ReconConfig

    values, _ = read_file(path, what="settings file")
    unknown = sorted(set(values) - {"recon", "selection"})
    if unknown:
        raise ValueError(f"settings file '{path}': unknown table(s) {unknown}; expected [recon] and [selection]")
    config = ReconConfig.from_dict(values.get("recon", {}), source=f"settings file '{path}' [recon]")
    selection = selection_from_dict(values.get("selection", {}),
                                    source=f"settings file '{path}' [selection]")
    return config, selection
