"""Figures of the analysis results (matplotlib, imported lazily inside each function).

Every function takes a result object and an optional ``ax`` (a new figure is made when it is ``None``) and
returns the :class:`matplotlib.figure.Figure`. Angles are shown in degrees.

* :func:`plot_spectrum_fit` - pulse-height spectrum with the fitted line model;
* :func:`plot_gain_map` - relative gain over the chip, on a colour scale centred on 1 that spans at least five
  typical cell errors (statistical noise stays pale);
* :func:`plot_gain_drift` - slice peaks and the smooth gain model versus time;
* :func:`plot_modulation_curve` - angle histogram with the fitted ``A + B cos^2``;
* :func:`plot_stokes_plane` - (Q, U) with the 1-sigma and 2-sigma error ellipses and the MDP99 circle;
* :func:`plot_modulation_factor` - measured points and the fitted curve;
* :func:`plot_spurious_map` - Q_sp, U_sp and their significance over the cells holding data, at one energy node.
"""

from __future__ import annotations

import numpy as np

from ..io.energy_label import energy_axis_label

__all__ = ["plot_spectrum_fit", "plot_gain_map", "plot_gain_drift", "plot_modulation_curve", "plot_stokes_plane",
           "plot_modulation_factor", "plot_spurious_map", "save_figure"]


def _axes(ax, figsize=(6.0, 4.2)):
    import matplotlib.pyplot as plt

    if ax is None:
        fig, ax = plt.subplots(figsize=figsize, layout="constrained")
    return ax.figure, ax


def save_figure(fig, path) -> None:
    """Save and close a figure (closing keeps memory flat when many figures are written); the file is written whole
    or not at all (:func:`trackfit.io.whole_files.save_figure_whole`)."""
    from ..io.whole_files import save_figure_whole

    save_figure_whole(fig, path, dpi=120)


def plot_spectrum_fit(fit, *, ax=None, xlabel: str = "pulse height [ADC]"):
    """Histogram of a :class:`~trackfit.analysis.LineFit` with the fitted model per bin and as a curve."""
    fig, ax = _axes(ax)
    edges, data = fit.edges, fit.data
    centres = 0.5 * (edges[:-1] + edges[1:])
    ax.errorbar(centres, data, yerr=np.sqrt(np.maximum(data, 1.0)), fmt="o", ms=2.5, lw=0.8, color="0.2",
                label="data")
    fine = np.linspace(edges[0], edges[-1], 600)
    ax.plot(fine, fit.density(fine) * np.diff(edges).mean(), color="tab:red", lw=1.4, label="fit")
    quality = fit.quality
    text = (f"peak {fit.peak:.5g} ± {fit.peak_err:.2g}\nFWHM/peak {100 * fit.fwhm_frac:.1f} %\n"
            f"deviance/ndof {fit.deviance:.1f}/{fit.ndof} (p = {quality.p_value:.2g})"
            + ("\nPOOR FIT" if quality.poor else ""))
    ax.text(0.02, 0.97, text, transform=ax.transAxes, va="top", fontsize=8, family="monospace")
    ax.set_xlabel(xlabel)
    ax.set_ylabel("events per bin")
    ax.legend(loc="upper right", fontsize=8, frameon=False)
    return fig


def plot_gain_map(gain_map, *, ax=None):
    """Relative gain per cell (unmeasured cells blank).

    The diverging colour scale is centred on 1 and spans ``1 ± max(largest deviation, 5 × median cell error,
    1 %)``: a map whose cells differ only by their statistical errors shows pale colours instead of stretching the
    noise over the full range. The title compares the spread with the errors (chi-square about the mean).
    """
    fig, ax = _axes(ax, figsize=(5.6, 4.8))
    values = np.ma.masked_invalid(gain_map.relative_gain.T)
    measured = np.isfinite(gain_map.relative_gain)
    deviation = float(np.max(np.abs(gain_map.relative_gain[measured] - 1.0))) if measured.any() else 0.0
    error = float(np.median(gain_map.relative_gain_err[measured])) if measured.any() else 0.0
    half = max(deviation, 5.0 * error, 0.01)
    mesh = ax.pcolormesh(gain_map.x_edges_mm, gain_map.y_edges_mm, values, cmap="RdBu_r", vmin=1.0 - half,
                         vmax=1.0 + half, shading="flat")
    fig.colorbar(mesh, ax=ax, label=f"relative gain (median cell error ± {100 * error:.2f} %)")
    _zoom_to_cells(ax, gain_map.x_edges_mm, gain_map.y_edges_mm, measured)
    ax.set_aspect("equal")
    ax.set_xlabel(f"{gain_map.position} x [mm]")
    ax.set_ylabel(f"{gain_map.position} y [mm]")
    spread = float(np.std(gain_map.relative_gain[measured])) if measured.any() else 0.0
    uniformity = gain_map.uniformity()
    verdict = ""
    if uniformity.ndof > 0:
        verdict = (f"; cells differ more than their errors (p = {uniformity.p_value:.2g})"
                   if uniformity.p_value < 0.01 else "; differences consistent with the errors")
    ax.set_title(f"gain map: {gain_map.n_measured} cells with ≥ {gain_map.min_counts} events\n"
                 f"rms spread {100 * spread:.2f} %{verdict}", fontsize=9)
    return fig


def _zoom_to_cells(ax, x_edges, y_edges, filled):
    """Limit the axes to the cells holding data (plus a small margin), so the data fill the middle of the view."""
    if not np.any(filled):
        return
    ix, iy = np.nonzero(filled)
    x0, x1, y0, y1 = x_edges[ix.min()], x_edges[ix.max() + 1], y_edges[iy.min()], y_edges[iy.max() + 1]
    pad = 0.05 * max(x1 - x0, y1 - y0)
    ax.set_xlim(x0 - pad, x1 + pad)
    ax.set_ylim(y0 - pad, y1 + pad)


def plot_gain_drift(drift, *, ax=None):
    """Slice peaks (relative to the reference) with errors and the smooth model."""
    fig, ax = _axes(ax)
    ref = drift.reference_peak
    ax.errorbar(drift.slice_time_s, drift.slice_peak / ref, yerr=drift.slice_peak_err / ref, fmt="o", ms=3,
                color="0.2", label="peak per time slice")
    ax.plot(drift.node_time_s, drift.node_gain, color="tab:blue", lw=1.4, label=f"{drift.model} model")
    ax.set_xlabel("time [s]")
    ax.set_ylabel("relative gain")
    ax.legend(fontsize=8, frameon=False)
    return fig


def plot_modulation_curve(fit, *, ax=None):
    """Angle histogram (degrees) with the fitted curve of a :class:`~trackfit.analysis.ModulationFit`."""
    fig, ax = _axes(ax)
    edges = fit.edges
    width = np.diff(edges)
    centres = 0.5 * (edges[:-1] + edges[1:])
    ax.errorbar(np.rad2deg(centres), fit.counts, yerr=np.sqrt(fit.variances), xerr=np.rad2deg(width) / 2,
                fmt="none", ecolor="0.25", lw=0.9, label="data")
    fine = np.linspace(edges[0], edges[-1], 721)
    ax.plot(np.rad2deg(fine), fit.density(fine) * width.mean(), color="tab:orange", lw=1.5, label="A + B cos²(φ − φ0)")
    ax.set_xlim(-180, 180)
    ax.set_xticks(np.arange(-180, 181, 60))
    ax.set_xlabel("emission angle φ [deg]")
    ax.set_ylabel("events per bin" + (" (weighted)" if fit.weighted else ""))
    ax.set_title(f"m = {fit.modulation:.4f} ± {fit.modulation_err:.4f},  "
                 f"φ0 = {np.rad2deg(fit.phase_rad):.1f}° ± {np.rad2deg(fit.phase_err_rad):.1f}°,  "
                 f"χ²/ndof = {fit.chi2:.1f}/{fit.ndof}" + (" (POOR FIT)" if fit.quality.poor else ""), fontsize=9)
    ax.legend(loc="upper right", fontsize=8, frameon=False)
    return fig


def _ellipse(q, u, cov, n_sigma, n=200):
    values, vectors = np.linalg.eigh(cov)
    t = np.linspace(0, 2 * np.pi, n)
    circle = np.stack([np.cos(t), np.sin(t)])
    points = vectors @ (np.sqrt(np.maximum(values, 0))[:, None] * circle) * n_sigma
    return q + points[0], u + points[1]


def plot_stokes_plane(result, *, ax=None):
    """Normalized Q/U plane: the estimate, its 1- and 2-sigma ellipses (2-d, 39 % and 86 %), and the MDP99 circle."""
    fig, ax = _axes(ax, figsize=(5.2, 5.0))
    cov = np.array([[result.q_err**2, result.qu_cov], [result.qu_cov, result.u_err**2]])
    for n_sigma, style in ((1, "-"), (2, "--")):
        x, y = _ellipse(result.q, result.u, cov, n_sigma)
        ax.plot(x, y, style, color="tab:blue", lw=1.2, label=f"{n_sigma}σ ellipse")
    t = np.linspace(0, 2 * np.pi, 300)
    ax.plot(result.mdp99 * np.cos(t), result.mdp99 * np.sin(t), ":", color="tab:red", lw=1.2, label="MDP99")
    ax.plot([result.q], [result.u], "o", color="tab:blue", ms=4)
    ax.axhline(0, color="0.7", lw=0.6)
    ax.axvline(0, color="0.7", lw=0.6)
    reach = 1.15 * max(result.mdp99, abs(result.q) + 2.5 * result.q_err, abs(result.u) + 2.5 * result.u_err)
    ax.set_xlim(-reach, reach)
    ax.set_ylim(-reach, reach)
    ax.set_aspect("equal")
    ax.set_xlabel("Q / I (modulation-corrected)")
    ax.set_ylabel("U / I (modulation-corrected)")
    angle = (f"ψ = {result.angle_deg:.1f} ± {result.angle_err_deg:.1f}°" if result.detected
             else "ψ undefined (not detected at 99 %)")
    ax.set_title(f"p = {100 * result.degree:.2f} ± {100 * result.degree_err:.2f} %, {angle}", fontsize=9)
    ax.legend(fontsize=8, frameon=False, loc="upper right")
    return fig


def plot_modulation_factor(curve, *, ax=None, provenance=None, calibrated: bool = False):
    """Measured modulation factors with errors and the fitted curve.

    ``provenance`` (of the polarized runs' event tables) and ``calibrated`` (their energies came from a
    calibration's energy scale) choose the energy-axis label (:func:`trackfit.io.energy_label.energy_axis_label`).
    """
    fig, ax = _axes(ax)
    ax.errorbar(curve.points_energy_kev, curve.points_value, yerr=curve.points_error, fmt="s", ms=4, color="0.2",
                label="measured")
    lo, hi = curve.energy_range_kev
    span = max(hi - lo, 0.5)
    fine = np.linspace(max(lo - 0.2 * span, 0.1), hi + 0.2 * span, 300)
    ax.plot(fine, curve(fine), color="tab:green", lw=1.4, label="curve (clamped outside the points)")
    ax.set_xlabel(energy_axis_label(provenance, calibrated=calibrated))
    ax.set_ylabel("modulation factor")
    ax.set_ylim(0, min(1.0, 1.25 * max(max(curve.points_value), 0.1)))
    ax.legend(fontsize=8, frameon=False)
    return fig


def plot_spurious_map(spurious, node: int = 0, *, axes=None):
    """Q_sp, U_sp and their significance at energy node ``node`` (three panels over the cells holding data).

    Q_sp and U_sp share a colour scale symmetric about 0 that spans at least three median cell errors; the third
    panel is the significance of each cell, ``sqrt((Q_sp/σ_Q)² + (U_sp/σ_U)²)``: for a cell without spurious
    modulation a Rayleigh variable (mean 1.25, above 3 in 1.1 % of such cells, ``exp(-9/2)``). The title gives the
    chi-square of the whole node against no spurious modulation.
    """
    import matplotlib.pyplot as plt
    from scipy import stats

    if axes is None:
        fig, axes = plt.subplots(1, 3, figsize=(13.5, 4.2), layout="constrained", sharey=True)
    fig = axes[0].figure
    q, u = spurious.q[node], spurious.u[node]
    q_err, u_err = spurious.q_err[node], spurious.u_err[node]
    filled = np.isfinite(q) & np.isfinite(u)
    # symmetric scale spanning at least three typical cell errors: cells that differ from 0 by noise stay pale
    limit = 1.0
    if filled.any():
        largest = float(np.max(np.abs(np.concatenate([q[filled], u[filled]]))))
        typical = float(np.median(np.concatenate([q_err[filled], u_err[filled]])))
        limit = max(largest, 3.0 * typical, 1e-6)
    with np.errstate(divide="ignore", invalid="ignore"):
        significance = np.where(filled & (q_err > 0) & (u_err > 0), np.hypot(q / q_err, u / u_err), np.nan)
    mesh = None
    for ax, values, name in ((axes[0], q, "Q_sp"), (axes[1], u, "U_sp")):
        mesh = ax.pcolormesh(spurious.x_edges_mm, spurious.y_edges_mm, np.ma.masked_invalid(values.T),
                             cmap="coolwarm", vmin=-limit, vmax=limit, shading="flat")
        ax.set_title(f"{name} at {spurious.energy_kev[node]:.2f} keV", fontsize=9)
    fig.colorbar(mesh, ax=list(axes[:2]), label="<cos 2φ>, <sin 2φ> of unpolarized events", shrink=0.9)
    top = max(3.0, float(np.nanmax(significance)) if np.isfinite(significance).any() else 3.0)
    sig_mesh = axes[2].pcolormesh(spurious.x_edges_mm, spurious.y_edges_mm, np.ma.masked_invalid(significance.T),
                                  cmap="magma_r", vmin=0.0, vmax=top, shading="flat")
    fig.colorbar(sig_mesh, ax=axes[2], label="significance per cell [σ]", shrink=0.9)
    good = np.isfinite(significance)
    chi2, ndof = float(np.sum(significance[good] ** 2)), 2 * int(good.sum())
    p_value = float(stats.chi2.sf(chi2, ndof)) if ndof else float("nan")
    axes[2].set_title(f"χ² against none: {chi2:.1f}/{ndof} (p = {p_value:.2g})", fontsize=9)
    for ax in axes:
        _zoom_to_cells(ax, spurious.x_edges_mm, spurious.y_edges_mm, filled)
        ax.set_aspect("equal")
        ax.set_xlabel(f"{spurious.position} x [mm]")
    axes[0].set_ylabel(f"{spurious.position} y [mm]")
    return fig
