"""Event displays: one event as filled hexagons, with the reconstruction drawn on top.

Matplotlib is imported when a function is called, not when trackfit is imported.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from .events import Event

__all__ = ["draw_event", "draw_event_gallery"]

#: colours of the overlay, chosen to read on the perceptually uniform ``cividis`` map
_OVERLAY = {"centroid": "#d62728", "conversion": "#ff7f0e", "axis": "black", "emission": "#e377c2"}


def _scalar(result, key, default=np.nan):
    value = result.get(key, default) if isinstance(result, Mapping) else getattr(result, key, default)
    return float(np.asarray(value).reshape(-1)[0]) if value is not None else default


def draw_event(event: Event, ax=None, result=None, *, threshold_adc: float | None = None, cmap: str = "cividis",
               colorbar: bool = True, title: bool = True):
    """Draw one event as filled hexagonal pixels on chip coordinates (mm).

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

    Returns
    -------
    matplotlib Axes
    """
    import matplotlib.pyplot as plt
    from matplotlib.collections import PolyCollection

    if ax is None:
        _, ax = plt.subplots(figsize=(6.0, 5.0), layout="constrained")
    grid = event.grid
    values = event.signal.astype(np.float64)
    shown = np.ones(values.shape, bool) if threshold_adc is None else values > threshold_adc
    vertices = grid.hexagon_vertices_mm(event.x_mm, event.y_mm)
    vmax = max(float(values.max(initial=0.0)), 1.0)
    filled = PolyCollection(vertices[shown], array=np.clip(values[shown], 0, None), cmap=cmap,
                            edgecolors="face", linewidths=0.3)
    filled.set_clim(0.0, vmax)
    ax.add_collection(filled)
    if (~shown).any():
        ax.add_collection(PolyCollection(vertices[~shown], facecolors="none", edgecolors="0.85", linewidths=0.3))
    pad = grid.pitch_mm
    if len(values):
        ax.set_xlim(event.x_mm.min() - pad, event.x_mm.max() + pad)
        ax.set_ylim(event.y_mm.min() - pad, event.y_mm.max() + pad)
    ax.set_aspect("equal")
    ax.set_xlabel("x [mm]")
    ax.set_ylabel("y [mm]")
    if colorbar:
        ax.figure.colorbar(filled, ax=ax, label="pulse height [ADC counts]", shrink=0.85)
    if title:
        ax.set_title(f"event {event.index} (trigger {event.trigger_id}), {len(values)} pixels", fontsize="medium")
    if result is not None:
        _draw_overlay(ax, result)
    return ax


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
    if ax.get_legend_handles_labels()[0]:
        ax.legend(loc="best", fontsize="x-small", framealpha=0.7)


def draw_event_gallery(events: Sequence[Event], results: Sequence | None = None, *, ncols: int = 4,
                       threshold_adc: float | None = None, size_in: float = 3.2):
    """Draw several events side by side (one panel each), with optional reconstruction overlays.

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
    ncols = max(1, min(ncols, len(events)))
    nrows = -(-len(events) // ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(size_in * ncols, size_in * nrows), layout="constrained",
                             squeeze=False)
    for k, ax in enumerate(axes.flat):
        if k >= len(events):
            ax.set_axis_off()
            continue
        draw_event(events[k], ax=ax, result=None if results is None else results[k], threshold_adc=threshold_adc,
                   colorbar=False, title=False)
        ax.set_title(f"event {events[k].index}", fontsize="small")
        if k:
            legend = ax.get_legend()
            if legend is not None:
                legend.remove()
    return fig
