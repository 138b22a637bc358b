"""Plain-numpy twin of the adaptive estimate, one event at a time (private; for tests and benchmarks).

Written from the description in ``docs/methods.md`` §11 with whole-event numpy expressions and
:func:`numpy.interp` for the size rule; it shares no code with :mod:`trackfit.recon.estimators._kernels`.
"""

from __future__ import annotations

import math

import numpy as np

from .._kernels import DEGENERACY_TOLERANCE as TOL
from ..status import Status

__all__ = ["adaptive_event"]


def adaptive_event(x_mm, y_mm, q, *, pitch_mm, log2_size_nodes, inner_rms, outer_rms, length_pitch,
                   density_weight) -> dict:
    """Adaptive estimate of one event from the pixels of its main cluster.

    Parameters
    ----------
    x_mm, y_mm, q : array_like, shape (n,)
        Pixel centres (chip coordinates) and signals of the main cluster.
    pitch_mm : float
    log2_size_nodes, inner_rms, outer_rms, length_pitch : array_like
        The size rule (see :func:`trackfit.recon.estimators._kernels.adaptive_range`).
    density_weight : float

    Returns
    -------
    dict
        ``adaptive_emission_rad``, ``adaptive_conv_x_mm``, ``adaptive_conv_y_mm``, ``adaptive_head_score`` (NaN
        when undefined) and ``adaptive_status``.
    """
    x, y, q = (np.asarray(v, dtype=np.float64) for v in (x_mm, y_mm, q))
    out = {"adaptive_emission_rad": math.nan, "adaptive_conv_x_mm": math.nan, "adaptive_conv_y_mm": math.nan,
           "adaptive_head_score": math.nan, "adaptive_status": 0}
    if x.size < 2:
        return out
    total = q.sum()
    bx, by = (q @ x) / total, (q @ y) / total
    dx, dy = x - bx, y - by
    mxx, myy, mxy = (q @ (dx * dx)) / total, (q @ (dy * dy)) / total, (q @ (dx * dy)) / total
    half_trace = 0.5 * (mxx + myy)
    half_diff = math.hypot(0.5 * (mxx - myy), mxy)
    if half_diff <= TOL * half_trace:
        return out
    axis = 0.5 * math.atan2(2 * mxy, mxx - myy)
    if axis <= -math.pi / 2:
        axis += math.pi
    m2l = half_trace + half_diff
    u = dx * math.cos(axis) + dy * math.sin(axis)
    skewness = (q @ u**3) / total / m2l**1.5
    mean_pos = q[u > 0].mean() if np.any(u > 0) else 0.0
    mean_neg = q[u < 0].mean() if np.any(u < 0) else 0.0
    asymmetry = (mean_neg - mean_pos) / (mean_pos + mean_neg) if mean_pos + mean_neg > 0 else 0.0
    score = skewness + density_weight * asymmetry
    out["adaptive_head_score"] = score
    if abs(score) <= TOL:
        out.update(adaptive_emission_rad=axis, adaptive_conv_x_mm=bx, adaptive_conv_y_mm=by,
                   adaptive_status=int(Status.NO_SKEWNESS))
        return out
    side = 1.0 if score > 0 else -1.0
    size = math.sqrt(m2l) / pitch_mm
    where = math.log2(size) if size > 0 else log2_size_nodes[0]
    r_in = float(np.interp(where, log2_size_nodes, inner_rms))
    r_out = float(np.interp(where, log2_size_nodes, outer_rms))
    length_mm = pitch_mm * float(np.interp(where, log2_size_nodes, length_pitch))
    d2 = dx * dx + dy * dy
    chosen = (u * side > 0) & (d2 >= r_in**2 * m2l) & (d2 <= r_out**2 * m2l)
    if not chosen.any() or q[chosen].sum() <= 0:
        emission = axis + (math.pi if side > 0 else 0.0)
        out.update(adaptive_emission_rad=emission - 2 * math.pi if emission > math.pi else emission,
                   adaptive_conv_x_mm=bx, adaptive_conv_y_mm=by, adaptive_status=int(Status.NO_CONVERSION_PIXELS))
        return out
    qc = q[chosen]
    cx, cy = (qc @ x[chosen]) / qc.sum(), (qc @ y[chosen]) / qc.sum()
    ex, ey = x - cx, y - cy
    w = q * np.exp(-np.hypot(ex, ey) / length_mm)
    wsum = w.sum()
    emission, status = axis, int(Status.SECOND_PASS_FALLBACK)
    if wsum > 0 and np.isfinite(wsum):
        sxx, syy, sxy = (w @ (ex * ex)) / wsum, (w @ (ey * ey)) / wsum, (w @ (ex * ey)) / wsum
        if math.hypot(0.5 * (sxx - syy), sxy) > TOL * 0.5 * (sxx + syy):
            emission, status = 0.5 * math.atan2(2 * sxy, sxx - syy), 0
    if math.cos(emission) * (bx - cx) + math.sin(emission) * (by - cy) < 0:
        emission += math.pi
    emission = math.atan2(math.sin(emission), math.cos(emission))
    out.update(adaptive_emission_rad=emission, adaptive_conv_x_mm=cx, adaptive_conv_y_mm=cy, adaptive_status=status)
    return out
