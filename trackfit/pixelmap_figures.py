"""Figures of a pixel map: each per-pixel quantity over the chip, the bad-pixel codes, the noise distribution.

Matplotlib is imported when a function is called. The chip is drawn as an image indexed ``[row, column]`` spanning
the chip's extent in mm; the half-pitch shift of alternate rows is below the resolution of a chip-wide picture
(use :func:`trackfit.plotting.draw_event` for pixel-level views).
"""

from __future__ import annotations

import numpy as np

from .io.pixelmap import PixelCode, PixelMap

__all__ = ["plot_pixel_map", "plot_noise_distribution", "plot_pixel_map_overview", "CODE_COLOURS"]

#: colour of each code in the code map (ok pale, the bad codes saturated, not-judged grey)
CODE_COLOURS = {PixelCode.OK: "#f2efe6", PixelCode.HOT: "#c0392b", PixelCode.DEAD: "#1f3a93",
                PixelCode.NOISY: "#e67e22", PixelCode.FEW_SAMPLES: "#9e9e9e"}

_LABELS = {
    "pedestal_adc": "pedestal [ADC]",
    "noise_adc": "noise [ADC rms]",
    "occupancy": "occupancy",
    "n_samples": "noise samples",
    "pedestal_error_adc": "pedestal uncertainty [ADC]",
    "noise_error_adc": "noise uncertainty [ADC]",
    "code": "code",
}


def _extent(grid):
    x0, x1, y0, y1 = grid.extent_mm
    return (x0 - grid.pitch_mm / 2, x1 + grid.pitch_mm / 2, y0 - grid.row_pitch_mm / 2, y1 + grid.row_pitch_mm / 2)


def _axes(ax, figsize=(5.6, 5.0)):
    import matplotlib.pyplot as plt

    if ax is None:
        _, ax = plt.subplots(figsize=figsize, layout="constrained")
    return ax


def plot_pixel_map(pixel_map: PixelMap, quantity: str = "noise_adc", *, ax=None, cmap: str = "cividis",
                   robust_range: bool = True, colorbar: bool = True):
    """Draw one per-pixel quantity of a map over the chip (x, y in mm).

    Parameters
    ----------
    pixel_map : PixelMap
    quantity : str
        ``"pedestal_adc"``, ``"noise_adc"``, ``"occupancy"`` (log scale), ``"n_samples"``,
        ``"pedestal_error_adc"``, ``"noise_error_adc"`` or ``"code"`` (categorical, with a legend).
    ax : matplotlib Axes, optional
    cmap : str
        Colour map of continuous quantities (default ``cividis``, perceptually uniform).
    robust_range : bool
        Colour range from the 0.5 and 99.5 % quantiles of the ``OK`` pixels, so that a few bad pixels do not wash
        out the picture (they are drawn in the end colours).
    colorbar : bool

    Returns
    -------
    matplotlib Axes
    """
    from matplotlib.colors import BoundaryNorm, ListedColormap, LogNorm
    from matplotlib.patches import Patch

    if quantity not in _LABELS:
        raise ValueError(f"unknown quantity {quantity!r}; choose one of {sorted(_LABELS)}")
    ax = _axes(ax)
    grid = pixel_map.grid
    values = np.asarray(getattr(pixel_map, quantity))
    common = dict(origin="lower", extent=_extent(grid), interpolation="nearest", aspect="equal")
    if quantity == "code":
        codes = list(PixelCode)
        colours = ListedColormap([CODE_COLOURS[c] for c in codes])
        norm = BoundaryNorm(np.arange(len(codes) + 1) - 0.5, len(codes))
        ax.imshow(values, cmap=colours, norm=norm, **common)
        counts = pixel_map.counts()
        handles = [Patch(facecolor=CODE_COLOURS[c], edgecolor="0.3", label=f"{c.name.lower()} ({counts[c.name]})")
                   for c in codes]
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize="small", frameon=False)
    else:
        values = values.astype(np.float64)
        ok = (pixel_map.code == PixelCode.OK) & np.isfinite(values)
        norm = None
        vmin = vmax = None
        if quantity == "occupancy":
            positive = values[np.isfinite(values) & (values > 0)]
            floor = max(float(positive.min()) if len(positive) else 1e-6, 1e-7)
            values = np.where(np.isfinite(values), np.maximum(values, floor), np.nan)
            norm = LogNorm(vmin=floor, vmax=max(float(np.nanmax(values)) if np.isfinite(values).any() else 1.0,
                                                 floor * 10))
        elif robust_range and ok.any():
            vmin, vmax = (float(v) for v in np.quantile(values[ok], [0.005, 0.995]))
        image = ax.imshow(values, cmap=cmap, norm=norm, vmin=vmin, vmax=vmax, **common)
        if colorbar:
            ax.figure.colorbar(image, ax=ax, label=_LABELS[quantity], shrink=0.85)
    ax.set_xlabel("x [mm]")
    ax.set_ylabel("y [mm]")
    ax.set_title(_LABELS[quantity])
    return ax


def plot_noise_distribution(pixel_map: PixelMap, *, ax=None, bins: int = 80):
    """Histogram of the noise of the judged pixels, by code, with the chip median and the noisy threshold."""
    ax = _axes(ax, figsize=(5.6, 4.0))
    noise = pixel_map.noise_adc.astype(np.float64)
    judged = pixel_map.judged & np.isfinite(noise)
    if judged.any():
        hi = float(np.quantile(noise[judged], 0.999))
        stats = pixel_map.statistics
        top = max(hi, float(stats.get("noisy_threshold_adc", 0.0))) * 1.15 or 1.0
        edges = np.linspace(0.0, top, bins + 1)
        for code in (PixelCode.OK, PixelCode.NOISY, PixelCode.HOT, PixelCode.DEAD):
            sel = judged & (pixel_map.code == code)
            if sel.any():
                ax.hist(np.clip(noise[sel], 0, top), bins=edges, histtype="stepfilled" if code == PixelCode.OK
                        else "step", color=CODE_COLOURS[code] if code != PixelCode.OK else "#7f8c8d",
                        label=f"{code.name.lower()} ({int(sel.sum())})", linewidth=1.5)
        if "noise_median_adc" in stats:
            ax.axvline(stats["noise_median_adc"], color="black", linestyle="--", linewidth=1, label="median")
        if "noisy_threshold_adc" in stats:
            ax.axvline(stats["noisy_threshold_adc"], color=CODE_COLOURS[PixelCode.NOISY], linestyle=":",
                       linewidth=1.5, label="noisy above")
        ax.set_yscale("log")
        ax.legend(fontsize="small", frameon=False)
    ax.set_xlabel("noise [ADC rms]")
    ax.set_ylabel("pixels")
    ax.set_title("noise of the judged pixels")
    return ax


def plot_pixel_map_overview(pixel_map: PixelMap):
    """One figure with the pedestal, noise, occupancy and code maps, the noise distribution and the samples.

    Returns
    -------
    matplotlib Figure
    """
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(2, 3, figsize=(16.5, 9.5), layout="constrained")
    plot_pixel_map(pixel_map, "pedestal_adc", ax=axes[0, 0])
    plot_pixel_map(pixel_map, "noise_adc", ax=axes[0, 1])
    plot_pixel_map(pixel_map, "occupancy", ax=axes[0, 2])
    plot_pixel_map(pixel_map, "code", ax=axes[1, 0])
    plot_noise_distribution(pixel_map, ax=axes[1, 1])
    plot_pixel_map(pixel_map, "n_samples", ax=axes[1, 2], robust_range=False)
    names = ", ".join(s.name for s in pixel_map.sources) or "in memory"
    fig.suptitle(f"pixel map of {pixel_map.grid.n_columns} x {pixel_map.grid.n_rows} pixels from {names}")
    return fig
