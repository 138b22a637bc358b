"""Event displays: one event as filled hexagons, with the reconstruction drawn on top.

Matplotlib is imported when a function is called, not when trackfit is imported. Energies in titles are labelled
with :func:`trackfit.io.energy_label.format_energy` (uncalibrated energies say so).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from .events import Event
from .io.energy_label import format_energy

__all__ = ["draw_event", "draw_event_gallery", "region_to_draw", "RegionTooLargeError", "DEFAULT_MAX_PIXELS",
           "DEFAULT_MARGIN_PIXELS"]

#: colours of the overlay, chosen to read on the perceptually uniform ``cividis`` map
_OVERLAY = {"centroid": "#d62728", "conversion": "#ff7f0e", "axis": "black", "emission": "#e377c2",
            "outside": "#d62728"}
#: legend label of the pixels above threshold that are not in the main cluster
OUTSIDE_LABEL = "above threshold, outside the main cluster"
#: most pixels one display draws: matplotlib takes about a millisecond per hexagon to render, so the whole chip
#: (about 10^5 pixels) takes minutes; an event of a larger ROI is drawn around its hit pixels only
DEFAULT_MAX_PIXELS = 20_000
#: pixels drawn beyond the hit pixels on each side when only the region around them is drawn
DEFAULT_MARGIN_PIXELS = 3
#: pixels above the ROI's median by more than this many noise rms (half the 15.9 %-84.1 % quantile range) count as
#: hits when no threshold is given (common practice: 5 sigma)
_HIT_NOISE_RMS = 5.0


class RegionTooLargeError(ValueError):
    """Even the region around an event's hit pixels holds more pixels than a display draws."""


def region_to_draw(event: Event, *, threshold_adc: float | None = None, outside_main=None,
                   max_pixels: int = DEFAULT_MAX_PIXELS, margin_pixels: int = DEFAULT_MARGIN_PIXELS) -> np.ndarray:
    """The ROI pixels a display draws: all of them when there are at most ``max_pixels``, else the rectangle of
    columns and rows around the hit pixels, ``margin_pixels`` wider on each side.

    Hit pixels are those above ``threshold_adc`` (and those of ``outside_main``); without a threshold, those above
    the ROI's median by more than 5 noise rms, the rms taken as half the range between the 15.9 % and 84.1 %
    quantiles of the ROI (robust to the few hit pixels; common practice).

    Parameters
    ----------
    event : Event
    threshold_adc : float, optional
    outside_main : array of bool, optional
        Per ROI pixel: pixels above threshold outside the main cluster (always inside the region).
    max_pixels : int
        Most pixels drawn (default :data:`DEFAULT_MAX_PIXELS`).
    margin_pixels : int
        Columns and rows drawn beyond the hit pixels on each side.

    Returns
    -------
    ndarray of bool, one per ROI pixel

    Raises
    ------
    RegionTooLargeError
        The region around the hit pixels holds more than ``max_pixels`` pixels (the message gives both numbers).
    """
    if isinstance(max_pixels, bool) or int(max_pixels) != max_pixels or max_pixels < 1:
        raise ValueError(f"'max_pixels' must be a positive integer (got {max_pixels!r})")
    if isinstance(margin_pixels, bool) or int(margin_pixels) != margin_pixels or margin_pixels < 0:
        raise ValueError(f"'margin_pixels' must be an integer >= 0 (got {margin_pixels!r})")
    n = len(event.signal)
    if n <= max_pixels:
        return np.ones(n, bool)
    values = event.signal.astype(np.float64)
    if threshold_adc is None:
        low, median, high = np.quantile(values, [0.158655, 0.5, 0.841345])
        noise = 0.5 * float(high - low)  # the rms of Gaussian noise, robust to the few hit pixels
        hits = values > median + _HIT_NOISE_RMS * max(noise, 1.0)
    else:
        hits = values > threshold_adc
    if outside_main is not None:
        hits |= np.asarray(outside_main, dtype=bool)
    if not hits.any():
        hits = values == values.max()  # nothing stands out: the region of the largest pixel
    columns, rows = np.asarray(event.columns), np.asarray(event.rows)
    c_lo, c_hi = columns[hits].min() - margin_pixels, columns[hits].max() + margin_pixels
    r_lo, r_hi = rows[hits].min() - margin_pixels, rows[hits].max() + margin_pixels
    region = (columns >= c_lo) & (columns <= c_hi) & (rows >= r_lo) & (rows <= r_hi)
    n_region = int(region.sum())
    if n_region > max_pixels:
        raise RegionTooLargeError(
            f"event {event.index}: the region around its {int(hits.sum())} hit pixels (columns "
            f"{int(c_lo)}..{int(c_hi)}, rows {int(r_lo)}..{int(r_hi)}, {margin_pixels} pixels of margin) holds "
            f"{n_region} of its {n} ROI pixels, more than the {int(max_pixels)} a display draws")
    return region


def _scalar(result, key, default=np.nan):
    value = result.get(key, default) if isinstance(result, Mapping) else getattr(result, key, default)
    return float(np.asarray(value).reshape(-1)[0]) if value is not None else default


def draw_event(event: Event, ax=None, result=None, *, threshold_adc: float | None = None, cmap: str = "cividis",
               colorbar: bool = True, title: bool = True, outside_main=None, provenance=None,
               vmax: float | None = None, legend: bool = True, max_pixels: int = DEFAULT_MAX_PIXELS,
               margin_pixels: int = DEFAULT_MARGIN_PIXELS):
    """Draw one event as filled hexagonal pixels on chip coordinates (mm).

    An event of more than ``max_pixels`` ROI pixels (a full-chip readout) is drawn around its hit pixels only
    (:func:`region_to_draw`); the title says so.

    Parameters
    ----------
    event : Event
        From ``reader[i]`` or ``batch.event(i)``.
    ax : matplotlib Axes, optional
        Drawn into a new figure when omitted.
    result : mapping, optional
        The event's reconstruction, e.g. ``table.row(i)`` of an event table. Uses the keys ``centroid_x_mm``,
        ``centroid_y_mm`` (centroid, a cross), ``conv_x_mm``, ``conv_y_mm`` (conversion point, a circle),
        ``axis_rad`` with ``m2_major_mm2`` (first-pass principal axis, dashed, +-3 sqrt(m2_major_mm2) long) and
        ``emission_rad`` (emission direction, an arrow from the conversion point). Missing or NaN keys are skipped.
    threshold_adc : float, optional
        Pixels at or below this value are drawn as outlines only.
    cmap : str
        Colour map of the pulse heights (default ``cividis``, perceptually uniform).
    colorbar, title : bool
        The title names the event, its ROI pixel count and, with ``result``, the main cluster's pixel count
        (``n_pixels``) and energy.
    outside_main : array of bool, optional
        Per ROI pixel, True for pixels above threshold outside the main cluster
        (:func:`trackfit.recon.clusters.event_clusters`): drawn hatched, with a legend entry.
    provenance : mapping, optional
        Provenance of the table ``result`` comes from: labels the energy uncalibrated when its scale is unknown.
    vmax : float, optional
        Top of the colour scale (default: the event's largest pixel value).
    legend : bool
        Draw the legend inside the axes (a gallery draws one for all panels instead).
    max_pixels, margin_pixels : int
        See :func:`region_to_draw`.

    Returns
    -------
    matplotlib Axes

    Raises
    ------
    RegionTooLargeError
        Even the region around the hit pixels holds more than ``max_pixels`` pixels.
    """
    import matplotlib.pyplot as plt
    from matplotlib.collections import PolyCollection

    if outside_main is not None:
        outside_main = np.asarray(outside_main, dtype=bool)
        if outside_main.shape != event.signal.shape:
            raise ValueError(f"'outside_main' must have one entry per ROI pixel ({event.signal.shape}), got "
                             f"{outside_main.shape}")
    region = region_to_draw(event, threshold_adc=threshold_adc, outside_main=outside_main, max_pixels=max_pixels,
                            margin_pixels=margin_pixels)
    partial = not region.all()
    if ax is None:
        _, ax = plt.subplots(figsize=(6.0, 5.0), layout="constrained")
    grid = event.grid
    values = event.signal[region].astype(np.float64)
    x_mm, y_mm = np.asarray(event.x_mm)[region], np.asarray(event.y_mm)[region]
    shown = np.ones(values.shape, bool) if threshold_adc is None else values > threshold_adc
    vertices = grid.hexagon_vertices_mm(x_mm, y_mm)
    vmax = max(float(values.max(initial=0.0)), 1.0) if vmax is None else float(vmax)
    filled = PolyCollection(vertices[shown], array=np.clip(values[shown], 0, None), cmap=cmap,
                            edgecolors="face", linewidths=0.3)
    filled.set_clim(0.0, vmax)
    ax.add_collection(filled)
    if (~shown).any():
        ax.add_collection(PolyCollection(vertices[~shown], facecolors="none", edgecolors="0.85", linewidths=0.3))
    if outside_main is not None:
        outside = outside_main[region]
        if outside.any():
            ax.add_collection(PolyCollection(vertices[outside], facecolors="none", edgecolors=_OVERLAY["outside"],
                                             hatch="////", linewidths=0.6, label=OUTSIDE_LABEL))
    pad = grid.pitch_mm
    if len(values):
        ax.set_xlim(x_mm.min() - pad, x_mm.max() + pad)
        ax.set_ylim(y_mm.min() - pad, y_mm.max() + pad)
    ax.set_aspect("equal")
    ax.set_xlabel("x [mm]")
    ax.set_ylabel("y [mm]")
    if colorbar:
        ax.figure.colorbar(filled, ax=ax, label="pulse height [ADC counts]", shrink=0.85)
    if title:
        ax.set_title(_title(event, result, provenance, n_drawn=len(values) if partial else None),
                     fontsize="medium")
    if result is not None:
        _draw_overlay(ax, result)
    if legend:
        _legend(ax)
    return ax


def _title(event, result, provenance, n_drawn=None) -> str:
    text = f"event {event.index} (trigger {event.trigger_id}): {len(event.signal)} ROI pixels"
    second = [] if n_drawn is None else [f"{n_drawn} drawn, around the hits"]
    if result is not None:
        n_main = result.get("n_pixels") if isinstance(result, Mapping) else getattr(result, "n_pixels", None)
        if n_main is not None:
            text += f", {int(n_main)} in the main cluster"
        energy = _scalar(result, "energy_kev")
        if np.isfinite(energy):
            second.append(f"main cluster energy {format_energy(energy, provenance)}")
    return "\n".join([text, "; ".join(second)]) if second else text


def _legend(ax):
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, labels, loc="best", fontsize="x-small", framealpha=0.7)


def _draw_overlay(ax, result):
    bx, by = _scalar(result, "centroid_x_mm"), _scalar(result, "centroid_y_mm")
    cx, cy = _scalar(result, "conv_x_mm"), _scalar(result, "conv_y_mm")
    axis, emission = _scalar(result, "axis_rad"), _scalar(result, "emission_rad")
    length = 3.0 * np.sqrt(max(_scalar(result, "m2_major_mm2", 0.0), 0.0)) or 0.1
    if np.isfinite([bx, by, axis]).all():
        dx, dy = length * np.cos(axis), length * np.sin(axis)
        ax.plot([bx - dx, bx + dx], [by - dy, by + dy], ls="--", lw=1.0, color=_OVERLAY["axis"],
                label="principal axis")
    if np.isfinite([bx, by]).all():
        ax.plot(bx, by, marker="x", ms=9, mew=2, ls="none", color=_OVERLAY["centroid"], label="centroid")
    if np.isfinite([cx, cy]).all():
        ax.plot(cx, cy, marker="o", ms=8, mfc="none", mew=2, ls="none", color=_OVERLAY["conversion"],
                label="conversion point")
        if np.isfinite(emission):
            ax.annotate("", xy=(cx + length * np.cos(emission), cy + length * np.sin(emission)), xytext=(cx, cy),
                        arrowprops=dict(arrowstyle="-|>", color=_OVERLAY["emission"], lw=1.8))
            ax.plot([], [], color=_OVERLAY["emission"], lw=1.8, label="emission direction")


def draw_event_gallery(events: Sequence[Event], results: Sequence | None = None, *, ncols: int = 4,
                       threshold_adc: float | None = None, size_in: float = 3.2, outside_main=None,
                       provenance=None):
    """Draw several events side by side (one panel each), with optional reconstruction overlays.

    The panels share one colour scale, shown by one colour bar, and one legend below the panels, so that nothing
    covers a track.

    Parameters
    ----------
    events : sequence of Event
    results : sequence of mappings, optional
        One reconstruction per event (e.g. ``table.row(i)``), or None for pixels only.
    ncols : int
    threshold_adc : float, optional
        Pixels at or below it are drawn as outlines.
    size_in : float
        Panel size, inches.
    outside_main : sequence of bool arrays, optional
        Per event, the pixels outside the main cluster (see :func:`draw_event`).
    provenance : mapping, optional
        Provenance of the table the results come from (energy labels).

    Returns
    -------
    matplotlib Figure
    """
    import matplotlib.pyplot as plt

    events = list(events)
    if not events:
        raise ValueError("no events to draw")
    if results is not None and len(results) != len(events):
        raise ValueError(f"got {len(events)} events but {len(results)} results")
    if outside_main is not None and len(outside_main) != len(events):
        raise ValueError(f"got {len(events)} events but {len(outside_main)} outside_main masks")
    ncols = max(1, min(ncols, len(events)))
    nrows = -(-len(events) // ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(size_in * ncols + 0.8, size_in * nrows + 0.5),
                             layout="constrained", squeeze=False)
    vmax = max(max(float(e.signal.max(initial=0)) for e in events), 1.0)
    handles, labels = [], []
    for k, ax in enumerate(axes.flat):
        if k >= len(events):
            ax.set_axis_off()
            continue
        result = None if results is None else results[k]
        draw_event(events[k], ax=ax, result=result, threshold_adc=threshold_adc, colorbar=False, title=False,
                   outside_main=None if outside_main is None else outside_main[k], vmax=vmax, legend=False)
        title = f"event {events[k].index}"
        energy = np.nan if result is None else _scalar(result, "energy_kev")
        if np.isfinite(energy):
            title += f", {format_energy(energy, provenance, digits=3)}"
        ax.set_title(title, fontsize="small")
        for handle, label in zip(*ax.get_legend_handles_labels(), strict=True):
            if label not in labels:
                handles.append(handle)
                labels.append(label)
    fig.colorbar(axes.flat[0].collections[0], ax=axes, label="pulse height [ADC counts]", shrink=0.8)
    if handles:
        fig.legend(handles, labels, loc="outside lower center", ncols=min(len(handles), 3), fontsize="small",
                   frameon=False)
    return fig
