"""Figures of detector responses and observation plans (matplotlib, imported lazily inside each function).

Every function returns the :class:`matplotlib.figure.Figure`; :func:`save_plan_figures` writes all three of a
plan as PNG files.

* :func:`plot_mdp_vs_exposure` - MDP99 against exposure for each design, with the planned exposure and the target;
* :func:`plot_response_curves` - μ(E)·ε(E) of each design (top) and its two factors, μ(E) and ε(E) (bottom);
* :func:`plot_detected_spectra` - detected source counts per keV in the band for each design, and the background.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

__all__ = ["plot_mdp_vs_exposure", "plot_response_curves", "plot_detected_spectra", "save_plan_figures",
           "FIGURE_NAMES"]

#: file names :func:`save_plan_figures` writes
FIGURE_NAMES = ("mdp_vs_exposure.png", "response_curves.png", "detected_spectra.png")


def _colors(n):
    import matplotlib.pyplot as plt

    cycle = plt.rcParams["axes.prop_cycle"].by_key().get("color", ["C0"])
    return [cycle[k % len(cycle)] for k in range(n)]


def _energy_axis(ax, lo: float, hi: float):
    """Log energy axis over ``lo``-``hi`` keV with plain numbers (2, 3, 5, 10 rather than powers of ten)."""
    from matplotlib.ticker import LogLocator, NullFormatter, ScalarFormatter

    ax.set_xscale("log")
    subs = (1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 8.0) if hi / lo < 10 else (1.0, 2.0, 5.0)
    ax.xaxis.set_major_locator(LogLocator(base=10, subs=subs))
    ax.xaxis.set_major_formatter(ScalarFormatter())
    ax.xaxis.set_minor_formatter(NullFormatter())


def plot_mdp_vs_exposure(plan, *, ax=None, span: float = 30.0):
    """MDP99 (per cent) versus exposure (s), log-log, from ``exposure / span`` to ``exposure * span`` (and out to
    each design's exposure for the target); a dot marks the planned exposure, a dashed line the target."""
    import matplotlib.pyplot as plt

    if ax is None:
        fig, ax = plt.subplots(figsize=(6.2, 4.4), layout="constrained")
    fig = ax.figure
    T = plan.observation.exposure_s
    t_max = T * span
    for p in plan.designs:
        if math.isfinite(p.exposure_for_target_s):
            t_max = max(t_max, 1.5 * p.exposure_for_target_s)
    exposures = np.geomspace(T / span, t_max, 200)
    for p, color in zip(plan.designs, _colors(len(plan.designs)), strict=True):
        if not math.isfinite(p.mdp99):
            continue
        ax.plot(exposures, 100 * p.mdp99_at(exposures), color=color, lw=1.6,
                label=f"{p.name} (μ_eff {p.effective_modulation_factor:.2f})")
        ax.plot([T], [100 * p.mdp99], "o", color=color, ms=5)
        if math.isfinite(p.exposure_for_target_s):
            ax.plot([p.exposure_for_target_s], [100 * p.target_mdp], "s", color=color, ms=5, mfc="none")
    if plan.observation.target_mdp is not None:
        ax.axhline(100 * plan.observation.target_mdp, color="0.4", ls="--", lw=1,
                   label=f"target {100 * plan.observation.target_mdp:g} %")
    ax.axvline(T, color="0.7", lw=0.8)
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("exposure [s]")
    ax.set_ylabel("MDP99 [%]")
    lo, hi = plan.observation.band_kev
    ax.set_title(f"{lo:g}-{hi:g} keV; dot: planned exposure, square: exposure for the target", fontsize=9)
    ax.legend(fontsize=8, frameon=False)
    ax.grid(True, which="both", alpha=0.25)
    return fig


def plot_response_curves(responses, *, band_kev=None, names=None):
    """μ(E)·ε(E) of each response (top; measured grid points with μ's error) and μ(E), ε(E) apart (bottom);
    ``band_kev`` is shaded."""
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(2, 1, figsize=(6.4, 6.4), sharex=True, layout="constrained",
                             gridspec_kw={"height_ratios": [1.2, 1]})
    top, bottom = axes
    right = bottom.twinx()
    names = names or [r.name for r in responses]
    for r, name, color in zip(responses, names, _colors(len(responses)), strict=True):
        lo, hi = r.energy_range_kev
        fine = np.geomspace(lo, hi, 400)
        product = r.modulation_factor(fine) * r.efficiency(fine)
        top.plot(fine, product, color=color, lw=1.4, label=name)
        e = r.energy_kev
        top.errorbar(e, r["modulation_factor"] * r["detection_efficiency"],
                     yerr=r["modulation_factor_err"] * r["detection_efficiency"], fmt="o", ms=3, color=color, lw=0.8)
        bottom.errorbar(e, r["modulation_factor"], yerr=r["modulation_factor_err"], fmt="o-", ms=3, color=color,
                        lw=1.0)
        right.plot(fine, r.efficiency(fine), color=color, lw=1.0, ls=":")
    for ax in (top, bottom):
        if band_kev is not None:
            ax.axvspan(*band_kev, color="0.9", zorder=0)
        _energy_axis(ax, min(r.energy_range_kev[0] for r in responses), max(r.energy_range_kev[1] for r in responses))
        ax.grid(True, which="both", alpha=0.25)
    top.set_ylabel("μ(E) · ε(E)")
    top.legend(fontsize=8, frameon=False)
    bottom.set_ylabel("μ(E) (points, solid)")
    right.set_ylabel("ε(E) (dotted)")
    right.set_yscale("log")
    bottom.set_xlabel("photon energy [keV]")
    return fig


def plot_detected_spectra(plan, *, ax=None):
    """Detected source counts per keV in the band for each design over the exposure, and the background level."""
    import matplotlib.pyplot as plt

    if ax is None:
        fig, ax = plt.subplots(figsize=(6.2, 4.4), layout="constrained")
    fig = ax.figure
    lo, hi = plan.observation.band_kev
    levels = {}
    for p, color in zip(plan.designs, _colors(len(plan.designs)), strict=True):
        ax.plot(p.energy_kev, p.detected_counts_per_kev, color=color, lw=1.4,
                label=f"{p.name}: {p.source_counts:.3g} counts")
        if p.background_counts > 0:
            levels.setdefault(round(p.background_counts / (hi - lo), 12), []).append((p.name, color))
    for level, owners in levels.items():
        names = ", ".join(name for name, _ in owners)
        ax.axhline(level, color=owners[0][1] if len(owners) == 1 else "0.35", ls=":", lw=1.2,
                   label=f"background ({names}): {level * (hi - lo):.3g} counts")
    _energy_axis(ax, lo, hi)
    ax.set_yscale("log")
    ax.set_xlabel("photon energy [keV]")
    ax.set_ylabel(f"detected counts per keV in {plan.observation.exposure_s:g} s")
    ax.legend(fontsize=8, frameon=False)
    ax.grid(True, which="both", alpha=0.25)
    return fig


def save_plan_figures(plan, folder) -> list[Path]:
    """Write :data:`FIGURE_NAMES` into ``folder`` (made if needed); returns their paths."""
    import matplotlib.pyplot as plt

    from .io.whole_files import save_figure_whole

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    figures = (plot_mdp_vs_exposure(plan),
               plot_response_curves([p.response for p in plan.designs], band_kev=plan.observation.band_kev,
                                    names=[p.name for p in plan.designs]),
               plot_detected_spectra(plan))
    try:
        return [save_figure_whole(fig, folder / name, dpi=120) for fig, name in zip(figures, FIGURE_NAMES, strict=True)]
    finally:
        for fig in figures:
            plt.close(fig)
