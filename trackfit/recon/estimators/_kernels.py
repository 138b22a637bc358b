"""Numba kernel of the adaptive emission-angle estimate (private: use :mod:`trackfit.recon.estimators`).

:func:`adaptive_range` runs after the two-stage kernel (:func:`trackfit.recon._kernels.reconstruct_range`) on the
same batch: it reads each event's main cluster from the mask that kernel wrote, and writes the columns of
:data:`ADAPTIVE_FLOAT_COLUMNS` and the status of :data:`ADAPTIVE_INT_COLUMNS`. Like every kernel it never raises
for one event (NaN and a status bit instead) and releases the GIL. Method: ``docs/methods.md`` §11.

The plain-numpy twin is :func:`trackfit.recon.estimators._reference.adaptive_event`; tests compare both.
"""

from __future__ import annotations

import math

import numpy as np

from ..._jit import jit
from .._kernels import (
    DEGENERACY_TOLERANCE,
    _centroid,
    _largest_area,
    _moments_about,
    _principal_axis,
    _wrap_pi,
)
from ..status import Status

__all__ = ["adaptive_range", "interpolate_rule", "ADAPTIVE_FLOAT_COLUMNS", "ADAPTIVE_INT_COLUMNS"]

#: column order of the float64 output of :func:`adaptive_range`
ADAPTIVE_FLOAT_COLUMNS = ("adaptive_emission_rad", "adaptive_conv_x_mm", "adaptive_conv_y_mm", "adaptive_head_score")
#: column order of its int64 output
ADAPTIVE_INT_COLUMNS = ("adaptive_status",)

_NO_EMISSION = int(Status.NO_EMISSION)
_NO_SKEW = int(Status.NO_SKEWNESS)
_NO_CONV = int(Status.NO_CONVERSION_PIXELS)
_SECOND = int(Status.SECOND_PASS_FALLBACK)
_TOL = DEGENERACY_TOLERANCE
_PI = math.pi


@jit
def interpolate_rule(x, nodes, values):
    """``values`` at ``x`` by linear interpolation between ``nodes`` (increasing), constant beyond the ends."""
    n = nodes.size
    if x <= nodes[0]:
        return values[0]
    if x >= nodes[n - 1]:
        return values[n - 1]
    k = 1
    while nodes[k] < x:
        k += 1
    t = (x - nodes[k - 1]) / (nodes[k] - nodes[k - 1])
    return values[k - 1] + t * (values[k] - values[k - 1])


@jit
def adaptive_range(lo, hi, roi, start, signal, main_mask, status_in, pitch_mm, row_pitch_mm, x0_mm, y0_mm, parity,
                   log2_size_nodes, inner_rms, outer_rms, length_pitch, density_weight, out_f, out_i):
    """Adaptive estimates of events ``lo <= i < hi`` (see the module docstring and ``docs/methods.md`` §11).

    Parameters
    ----------
    roi : int32 (N, 4); start : int64 (N + 1,); signal : int16 (M,)
        The batch, pedestal-subtracted (as the two-stage kernel saw it).
    main_mask : uint8 (M,)
        1 for the pixels of each event's main cluster (written by the two-stage kernel).
    status_in : int64 (N,)
        The two-stage status: events with a bit of ``Status.NO_EMISSION`` get NaN here too.
    pitch_mm, row_pitch_mm, x0_mm, y0_mm, parity
        Chip geometry, as for the two-stage kernel.
    log2_size_nodes : float64 (k,)
        log2 of the track size sqrt(m2_major_mm2) / pitch at the nodes of the rule, increasing.
    inner_rms, outer_rms : float64 (k,)
        Start-point search radii at the nodes, in units of sqrt(m2_major_mm2).
    length_pitch : float64 (k,)
        Second-pass length at the nodes, in pitches.
    density_weight : float
        Weight of the charge-density asymmetry in the head score.
    out_f : float64 (N, 4); out_i : int64 (N, 1)
    """
    max_area = _largest_area(lo, hi, start, signal.size)
    px = np.empty(max_area, np.float64)
    py = np.empty(max_area, np.float64)
    pq = np.empty(max_area, np.float64)
    nan = np.nan
    for i in range(lo, hi):
        for k in range(out_f.shape[1]):
            out_f[i, k] = nan
        out_i[i, 0] = 0
        if status_in[i] & _NO_EMISSION:
            continue
        s0 = start[i]
        c0 = roi[i, 0]
        r0 = roi[i, 1]
        nc = roi[i, 2]
        area = start[i + 1] - s0
        inv_nc = 1.0 / nc if nc > 0 else 0.0
        # ---- main-cluster pixels, relative to the ROI origin pixel (as in the two-stage kernel)
        n = 0
        for k in range(area):
            if main_mask[s0 + k] == 1:
                rr = int((k + 0.5) * inv_nc)
                cc = k - rr * nc
                shifted = 0.5 if ((r0 + rr) & 1) == parity else 0.0
                px[n] = pitch_mm * (cc + shifted)
                py[n] = row_pitch_mm * rr
                pq[n] = signal[s0 + k]
                n += 1
        if n < 2:
            continue
        xr = pitch_mm * c0 - x0_mm
        yr = row_pitch_mm * r0 - y0_mm
        # ---- first pass: centroid, moments, axis
        qsum, bx, by = _centroid(px, py, pq, n)
        mxx, myy, mxy = _moments_about(px, py, pq, n, bx, by)
        mxx /= qsum
        myy /= qsum
        mxy /= qsum
        axis, m2l, _, half_diff = _principal_axis(mxx, myy, mxy)
        if half_diff <= _TOL * 0.5 * (mxx + myy):
            continue
        ca = math.cos(axis)
        sa = math.sin(axis)
        # ---- head score: skewness along the axis plus the charge-density asymmetry of the two halves
        m3 = 0.0
        pos_q = 0.0
        pos_n = 0
        neg_q = 0.0
        neg_n = 0
        for j in range(n):
            u = (px[j] - bx) * ca + (py[j] - by) * sa
            m3 += pq[j] * u * u * u
            if u > 0.0:
                pos_q += pq[j]
                pos_n += 1
            elif u < 0.0:
                neg_q += pq[j]
                neg_n += 1
        m3 /= qsum
        mean_pos = pos_q / pos_n if pos_n > 0 else 0.0
        mean_neg = neg_q / neg_n if neg_n > 0 else 0.0
        asymmetry = 0.0
        if mean_pos + mean_neg > 0.0:
            asymmetry = (mean_neg - mean_pos) / (mean_pos + mean_neg)
        score = m3 / m2l ** 1.5 + density_weight * asymmetry
        out_f[i, 3] = score
        if abs(score) <= _TOL:
            out_f[i, 0] = axis
            out_f[i, 1] = bx + xr
            out_f[i, 2] = by + yr
            out_i[i, 0] = _NO_SKEW
            continue
        side = 1.0 if score > 0.0 else -1.0
        # ---- settings of this track's size
        size = math.sqrt(m2l) / pitch_mm
        x = math.log2(size) if size > 0.0 else log2_size_nodes[0]
        r_in = interpolate_rule(x, log2_size_nodes, inner_rms)
        r_out = interpolate_rule(x, log2_size_nodes, outer_rms)
        length = pitch_mm * interpolate_rule(x, log2_size_nodes, length_pitch)
        # ---- conversion point: charge centroid of the start-side pixels in the annulus
        rlo2 = r_in * r_in * m2l
        rhi2 = r_out * r_out * m2l
        cq = 0.0
        cx = 0.0
        cy = 0.0
        for j in range(n):
            dx = px[j] - bx
            dy = py[j] - by
            u = dx * ca + dy * sa
            d2 = dx * dx + dy * dy
            if u * side > 0.0 and d2 >= rlo2 and d2 <= rhi2:
                cq += pq[j]
                cx += pq[j] * px[j]
                cy += pq[j] * py[j]
        if cq <= 0.0:
            out_f[i, 0] = _wrap_pi(axis + (_PI if side > 0.0 else 0.0))
            out_f[i, 1] = bx + xr
            out_f[i, 2] = by + yr
            out_i[i, 0] = _NO_CONV
            continue
        cx /= cq
        cy /= cq
        # ---- second pass about the conversion point, weights q exp(-D / length)
        wsum = 0.0
        sxx = 0.0
        syy = 0.0
        sxy = 0.0
        for j in range(n):
            dx = px[j] - cx
            dy = py[j] - cy
            w = pq[j] * math.exp(-math.sqrt(dx * dx + dy * dy) / length)
            wsum += w
            sxx += w * dx * dx
            syy += w * dy * dy
            sxy += w * dx * dy
        emission = axis
        status = _SECOND
        if wsum > 0.0 and math.isfinite(wsum):
            sxx /= wsum
            syy /= wsum
            sxy /= wsum
            hd = math.sqrt((0.5 * (sxx - syy)) ** 2 + sxy * sxy)
            if hd > _TOL * 0.5 * (sxx + syy):
                emission = 0.5 * math.atan2(2.0 * sxy, sxx - syy)
                status = 0
        if math.cos(emission) * (bx - cx) + math.sin(emission) * (by - cy) < 0.0:
            emission += _PI
        out_f[i, 0] = _wrap_pi(emission)
        out_f[i, 1] = cx + xr
        out_f[i, 2] = cy + yr
        out_i[i, 0] = status
