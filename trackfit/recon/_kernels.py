"""Numba kernels of the reconstruction (private: use :func:`trackfit.reconstruct`).

One kernel, :func:`reconstruct_range`, runs the whole per-event chain of ``docs/methods.md`` §2 over a range of events
of a batch and writes into preallocated output arrays; it never raises for one bad
event, it sets a status bit (:mod:`trackfit.recon.status`) and writes NaN where a value is undefined. It releases
the GIL (``nogil``), so threads can run it on disjoint event ranges while another thread reads the next batch.

The plain-numpy twin of every step is in :mod:`trackfit.recon._reference`; tests compare both.
"""

from __future__ import annotations

import math

import numpy as np

from .._jit import jit
from .status import Status

__all__ = ["reconstruct_range", "subtract_pedestals", "FLOAT_COLUMNS", "INT_COLUMNS", "DEGENERACY_TOLERANCE",
           "FLOAT32_MAX", "MAX_ROI_PIXELS"]

#: column order of the float64 output array of the kernel
FLOAT_COLUMNS = ("pulse_height", "energy_kev", "centroid_x_mm", "centroid_y_mm", "conv_x_mm", "conv_y_mm", "axis_rad",
                 "emission_rad", "m2_major_mm2", "m2_minor_mm2", "m3_major_mm3")
#: column order of the int64 output array of the kernel
INT_COLUMNS = ("status", "n_pixels", "n_clusters", "peak_adc", "n_conv_pixels")

#: relative tolerance of the degeneracy tests (round, collinear, no skewness, second pass)
DEGENERACY_TOLERANCE = 1e-9

# status bits as plain ints for the kernel
_MALFORMED = int(Status.MALFORMED_INPUT)
_NO_SIGNAL = int(Status.NO_SIGNAL)
_FEW = int(Status.TOO_FEW_PIXELS)
_SINGLE = int(Status.SINGLE_PIXEL)
_ROUND = int(Status.ROUND)
_COLLINEAR = int(Status.COLLINEAR)
_NO_SKEW = int(Status.NO_SKEWNESS)
_NO_CONV = int(Status.NO_CONVERSION_PIXELS)
_SECOND = int(Status.SECOND_PASS_FALLBACK)
_BORDER = int(Status.ROI_BORDER)
_SATURATED = int(Status.SATURATED)
_NOT_FINITE = int(Status.NOT_FINITE)

#: largest finite float32: the float columns of the table are float32, so a larger value would be stored as inf
FLOAT32_MAX = float(np.finfo(np.float32).max)
#: largest ROI area the kernel indexes (its pixel indices and cluster labels are int32)
MAX_ROI_PIXELS = 2**31 - 1

_F_PH, _F_E, _F_BX, _F_BY, _F_CX, _F_CY, _F_AXIS, _F_EMIS, _F_M2L, _F_M2T, _F_M3 = range(11)
_I_STATUS, _I_NPIX, _I_NCLUS, _I_PEAK, _I_NCONV = range(5)
_TOL = DEGENERACY_TOLERANCE
_PI = math.pi


@jit
def _wrap_pi(angle):
    """Angle into (-pi, pi]."""
    if angle > _PI:
        angle -= 2.0 * _PI
    elif angle <= -_PI:
        angle += 2.0 * _PI
    return angle


@jit
def _principal_axis(mxx, myy, mxy):
    """(axis in (-pi/2, pi/2], long moment, transverse moment, half difference) of a 2x2 moment matrix."""
    half_trace = 0.5 * (mxx + myy)
    half_diff = math.sqrt((0.5 * (mxx - myy)) ** 2 + mxy * mxy)
    axis = 0.5 * math.atan2(2.0 * mxy, mxx - myy)
    if axis <= -0.5 * _PI:
        axis += _PI
    return axis, half_trace + half_diff, max(half_trace - half_diff, 0.0), half_diff


@jit
def _largest_area(lo, hi, start, n_signal):
    """The largest pixel count of events ``lo <= i < hi`` that lie in a signal array of ``n_signal`` values (at
    least 1): the size of an event's work arrays (malformed offsets never size an allocation)."""
    largest = 1
    for i in range(lo, hi):
        area = start[i + 1] - start[i]
        if area > largest and start[i] >= 0 and start[i + 1] <= n_signal:
            largest = area
    return largest


@jit
def _centroid(px, py, w, n):
    """(sum of w, weighted mean x, weighted mean y) of the first n points."""
    wsum = 0.0
    sx = 0.0
    sy = 0.0
    for j in range(n):
        wsum += w[j]
        sx += w[j] * px[j]
        sy += w[j] * py[j]
    return wsum, sx / wsum, sy / wsum


@jit
def _moments_about(px, py, w, n, cx, cy):
    """Weighted sums of dx^2, dy^2 and dx dy of the first n points about (cx, cy) (not normalised)."""
    sxx = 0.0
    syy = 0.0
    sxy = 0.0
    for j in range(n):
        dx = px[j] - cx
        dy = py[j] - cy
        sxx += w[j] * dx * dx
        syy += w[j] * dy * dy
        sxy += w[j] * dx * dy
    return sxx, syy, sxy


@jit
def subtract_pedestals(lo, hi, roi, start, signal, bad, pedestal, n_columns, n_rows, out):
    """``out = round(signal - pedestal of the pixel)`` for events ``lo <= i < hi``, clipped to int16.

    Parameters
    ----------
    roi : int32 (N, 4); start : int64 (N + 1,); signal : int16 (M,); bad : bool (N,)
    pedestal : float64 (n_rows * n_columns,)
        Per-pixel pedestal, row by row.
    n_columns, n_rows : int
    out : int16 (M,)
        Written for the events that are well formed and on the chip; left untouched for the others (they are
        flagged as malformed by :func:`reconstruct_range`). Rounding is half to even (``numpy.rint``).
    """
    for i in range(lo, hi):
        s0 = start[i]
        c0 = roi[i, 0]
        r0 = roi[i, 1]
        nc = roi[i, 2]
        nr = roi[i, 3]
        if (bad[i] or nc < 0 or nr < 0 or nc * nr != start[i + 1] - s0 or s0 < 0 or start[i + 1] > signal.size
                or c0 < 0 or r0 < 0 or c0 + nc > n_columns or r0 + nr > n_rows):
            continue
        for rr in range(nr):
            base = (r0 + rr) * n_columns + c0
            k0 = s0 + rr * nc
            for cc in range(nc):
                v = np.rint(signal[k0 + cc] - pedestal[base + cc])
                if v > 32767.0:
                    v = 32767.0
                elif v < -32768.0:
                    v = -32768.0
                out[k0 + cc] = np.int16(v)


@jit
def reconstruct_range(lo, hi, roi, start, signal, bad, mask, thresholds, mask_columns, pitch_mm, row_pitch_mm, x0_mm,
                      y0_mm, parity, threshold, min_pixels, r_inner, r_outer, length_mm, centre_on_conversion,
                      counts_per_kev, saturation_adc, main_mask, out_f, out_i):
    """Reconstruct events ``lo <= i < hi`` of a batch into rows of ``out_f`` / ``out_i``.

    Parameters
    ----------
    lo, hi : int
        Event range.
    roi : int32 (N, 4); start : int64 (N + 1,); signal : int16 (M,); bad : bool (N,)
        Event ``i`` is ``signal[start[i]:start[i + 1]]`` (``start[0]`` may be > 0); events whose ROI does not
        match their pixel range, or whose range leaves ``signal``, are flagged as malformed and not read.
    mask : uint8 (n_rows * n_columns,) or empty
        Chip-sized bad-pixel map, row by row (1 = ignore the pixel); empty for no mask.
    thresholds : int32 (n_rows * n_columns,) or empty
        Chip-sized per-pixel zero suppression, row by row: a pixel is hit when its signal > its entry; empty to
        use ``threshold`` for every pixel.
    mask_columns : int
        Columns of the chip (row stride of ``mask`` and ``thresholds``).
    pitch_mm, row_pitch_mm, x0_mm, y0_mm : float
        Pixel centre of (column, row) = (pitch * (column + 0.5 * shifted) - x0, row_pitch * row - y0).
    parity : int
        Row parity that is shifted by half a pitch (1: odd rows, 0: even rows).
    threshold : int
        Zero suppression: a pixel is hit when its signal > threshold.
    min_pixels : int
    r_inner, r_outer : float
        Start-point search radii in units of sqrt(m2_major) (``start_search_inner_rms``, ``..._outer_rms``).
    length_mm : float
        Length scale of the second-pass weights (``second_pass_length_mm``).
    centre_on_conversion : bool
        Second-pass moments about the conversion point (True) or the weighted centroid (False).
    counts_per_kev : float
    saturation_adc : int
    main_mask : uint8 (M,) or empty
        When not empty, set to 1 for the pixels of each event's main cluster and 0 for its other pixels (the
        estimators of :mod:`trackfit.recon.estimators` start from it); malformed events are left untouched.
    out_f : float64 (N, len(FLOAT_COLUMNS)); out_i : int64 (N, len(INT_COLUMNS))
    """
    max_area = _largest_area(lo, hi, start, signal.size)
    label = np.full(max_area, -1, np.int32)  # -1: not hit; 0: hit, unlabelled; >0: cluster id
    hits = np.empty(max_area, np.int32)
    stack = np.empty(max_area, np.int32)
    cluster_charge = np.empty(max_area + 1, np.float64)
    px = np.empty(max_area, np.float64)
    py = np.empty(max_area, np.float64)
    pq = np.empty(max_area, np.float64)
    use_mask = mask.size > 0
    use_thresholds = thresholds.size > 0
    write_main = main_mask.size > 0
    chip_size = mask.size if use_mask else thresholds.size
    nan = np.nan
    inv_scale = 1.0 / length_mm  # weights exp(-D * inv_scale), as in the reference

    for i in range(lo, hi):
        s0 = start[i]
        c0 = roi[i, 0]
        r0 = roi[i, 1]
        nc = roi[i, 2]
        nr = roi[i, 3]
        area = start[i + 1] - s0
        status = 0
        # row of ROI pixel k = floor((k + 0.5) / nc), by multiplication: exact for areas below ~1e9 pixels and
        # much cheaper than an integer division in the inner loops
        inv_nc = 1.0 / nc if nc > 0 else 0.0
        for k in range(out_f.shape[1]):
            out_f[i, k] = nan
        out_f[i, _F_PH] = 0.0
        out_f[i, _F_E] = 0.0
        out_i[i, _I_NPIX] = 0
        out_i[i, _I_NCLUS] = 0
        out_i[i, _I_PEAK] = 0
        out_i[i, _I_NCONV] = 0
        if bad[i] or nc * nr != area or nc < 0 or nr < 0 or area > MAX_ROI_PIXELS or s0 < 0 or (
                start[i + 1] > signal.size) or (
                (use_mask or use_thresholds) and (
                c0 < 0 or r0 < 0 or c0 + nc > mask_columns or (r0 + nr) * mask_columns > chip_size)):
            out_i[i, _I_STATUS] = _MALFORMED
            continue
        if write_main:
            for k in range(area):
                main_mask[s0 + k] = 0

        # ---- cleaning: zero suppression (branch-free scan; one threshold or one per pixel), bad-pixel mask
        n_hit = 0
        if use_thresholds:
            for rr in range(nr):
                base = (r0 + rr) * mask_columns + c0
                k0 = rr * nc
                for cc in range(nc):
                    hits[n_hit] = k0 + cc
                    n_hit += signal[s0 + k0 + cc] > thresholds[base + cc]
        else:
            for k in range(area):
                hits[n_hit] = k
                n_hit += signal[s0 + k] > threshold
        if use_mask and n_hit > 0:
            kept = 0
            for j in range(n_hit):
                k = hits[j]
                rr = int((k + 0.5) * inv_nc)
                if mask[(r0 + rr) * mask_columns + c0 + k - rr * nc] == 0:
                    hits[kept] = k
                    kept += 1
            n_hit = kept
        if n_hit == 0:
            out_i[i, _I_STATUS] = _NO_SIGNAL
            continue

        # ---- connected components on the 6-neighbour graph
        for j in range(n_hit):
            label[hits[j]] = 0
        n_clusters = 0
        best = 0
        best_charge = -1.0
        for j in range(n_hit):
            seed = hits[j]
            if label[seed] != 0:
                continue
            n_clusters += 1
            label[seed] = n_clusters
            top = 1
            stack[0] = seed
            charge = 0.0
            while top > 0:
                top -= 1
                p = stack[top]
                charge += signal[s0 + p]
                rr = int((p + 0.5) * inv_nc)
                cc = p - rr * nc
                # The six neighbour pushes are written out on purpose: a shared helper function (even with
                # inline="always") made this kernel 4-5x slower (measured 80k vs 380k events/s).
                if cc > 0 and label[p - 1] == 0:
                    label[p - 1] = n_clusters
                    stack[top] = p - 1
                    top += 1
                if cc < nc - 1 and label[p + 1] == 0:
                    label[p + 1] = n_clusters
                    stack[top] = p + 1
                    top += 1
                # neighbours in the rows above and below: columns (c, c+1) from a shifted row, (c-1, c) otherwise
                ca = cc if ((r0 + rr) & 1) == parity else cc - 1
                left_ok = ca >= 0
                right_ok = ca + 1 < nc
                if rr > 0:
                    q = p - nc + ca - cc
                    if left_ok and label[q] == 0:
                        label[q] = n_clusters
                        stack[top] = q
                        top += 1
                    if right_ok and label[q + 1] == 0:
                        label[q + 1] = n_clusters
                        stack[top] = q + 1
                        top += 1
                if rr < nr - 1:
                    q = p + nc + ca - cc
                    if left_ok and label[q] == 0:
                        label[q] = n_clusters
                        stack[top] = q
                        top += 1
                    if right_ok and label[q + 1] == 0:
                        label[q + 1] = n_clusters
                        stack[top] = q + 1
                        top += 1
            cluster_charge[n_clusters] = charge
            if charge > best_charge:
                best_charge = charge
                best = n_clusters

        # ---- main cluster: pixel centres relative to the ROI origin pixel, charges, peak, border
        n = 0
        peak = -32768
        border = False
        xr = pitch_mm * c0 - x0_mm
        yr = row_pitch_mm * r0 - y0_mm
        for j in range(n_hit):
            k = hits[j]
            if label[k] == best:
                if write_main:
                    main_mask[s0 + k] = 1
                rr = int((k + 0.5) * inv_nc)
                cc = k - rr * nc
                v = signal[s0 + k]
                shifted = 0.5 if ((r0 + rr) & 1) == parity else 0.0
                px[n] = pitch_mm * (cc + shifted)
                py[n] = row_pitch_mm * rr
                pq[n] = v
                if v > peak:
                    peak = v
                if rr == 0 or rr == nr - 1 or cc == 0 or cc == nc - 1:
                    border = True
                n += 1
            label[k] = -1
        out_i[i, _I_NPIX] = n
        out_i[i, _I_NCLUS] = n_clusters
        out_i[i, _I_PEAK] = peak
        if border:
            status |= _BORDER
        if peak >= saturation_adc:
            status |= _SATURATED
        if n < min_pixels:
            status |= _FEW

        # ---- first pass: centroid and moments
        qsum, bx, by = _centroid(px, py, pq, n)
        out_f[i, _F_PH] = qsum
        out_f[i, _F_E] = qsum / counts_per_kev
        out_f[i, _F_BX] = bx + xr
        out_f[i, _F_BY] = by + yr
        out_f[i, _F_CX] = bx + xr
        out_f[i, _F_CY] = by + yr
        if n == 1:
            out_f[i, _F_M2L] = 0.0
            out_f[i, _F_M2T] = 0.0
            out_i[i, _I_STATUS] = status | _SINGLE
            continue
        mxx, myy, mxy = _moments_about(px, py, pq, n, bx, by)
        mxx /= qsum
        myy /= qsum
        mxy /= qsum
        axis, m2l, m2t, half_diff = _principal_axis(mxx, myy, mxy)
        out_f[i, _F_M2L] = m2l
        out_f[i, _F_M2T] = m2t
        if half_diff <= _TOL * 0.5 * (mxx + myy):
            out_i[i, _I_STATUS] = status | _ROUND
            continue
        if m2t <= _TOL * m2l:
            status |= _COLLINEAR
        ca = math.cos(axis)
        sa = math.sin(axis)
        # third moment, and in the same loop the candidates for the conversion point on both sides of the
        # centroid (r_inner..r_outer * sqrt(m2_major_mm2) away); the sign of m3_major_mm3 then picks the start side
        rlo2 = r_inner * r_inner * m2l
        rhi2 = r_outer * r_outer * m2l
        m3 = 0.0
        pos_q = 0.0
        pos_x = 0.0
        pos_y = 0.0
        pos_n = 0
        neg_q = 0.0
        neg_x = 0.0
        neg_y = 0.0
        neg_n = 0
        for j in range(n):
            dx = px[j] - bx
            dy = py[j] - by
            u = dx * ca + dy * sa
            q = pq[j]
            m3 += q * u * u * u
            d2 = dx * dx + dy * dy
            if d2 >= rlo2 and d2 <= rhi2:
                if u > 0.0:
                    pos_q += q
                    pos_x += q * px[j]
                    pos_y += q * py[j]
                    pos_n += 1
                elif u < 0.0:
                    neg_q += q
                    neg_x += q * px[j]
                    neg_y += q * py[j]
                    neg_n += 1
        m3 /= qsum
        out_f[i, _F_AXIS] = axis
        out_f[i, _F_M3] = m3
        if abs(m3) <= _TOL * m2l ** 1.5:
            out_f[i, _F_EMIS] = axis
            out_i[i, _I_STATUS] = status | _NO_SKEW
            continue

        # ---- conversion point: charge centroid of the candidates on the start side (sign of m3_major_mm3)
        side = 1.0 if m3 > 0.0 else -1.0
        if side > 0.0:
            cq, cx, cy, n_conv = pos_q, pos_x, pos_y, pos_n
        else:
            cq, cx, cy, n_conv = neg_q, neg_x, neg_y, neg_n
        out_i[i, _I_NCONV] = n_conv
        if n_conv == 0:
            out_f[i, _F_EMIS] = _wrap_pi(axis + (_PI if side > 0.0 else 0.0))
            out_i[i, _I_STATUS] = status | _NO_CONV
            continue
        cx /= cq
        cy /= cq
        out_f[i, _F_CX] = cx + xr
        out_f[i, _F_CY] = cy + yr

        # ---- second pass: weights q exp(-D / w0) from the conversion point
        wsum = 0.0
        wx = 0.0
        wy = 0.0
        for j in range(n):
            dx = px[j] - cx
            dy = py[j] - cy
            w = pq[j] * math.exp(-math.sqrt(dx * dx + dy * dy) * inv_scale)
            px[j] = dx  # keep offsets from the conversion point, and the weight in pq
            py[j] = dy
            pq[j] = w
            wsum += w
            wx += w * dx
            wy += w * dy
        ox = bx - cx  # direction of the track seen from the conversion point
        oy = by - cy
        emission = axis
        fallback = True
        if wsum > 0.0 and math.isfinite(wsum):
            ux = 0.0
            uy = 0.0
            if not centre_on_conversion:
                ux = wx / wsum
                uy = wy / wsum
            sxx, syy, sxy = _moments_about(px, py, pq, n, ux, uy)
            sxx /= wsum
            syy /= wsum
            sxy /= wsum
            phi, _, _, hd = _principal_axis(sxx, syy, sxy)
            if hd > _TOL * 0.5 * (sxx + syy):
                emission = phi
                fallback = False
        if math.cos(emission) * ox + math.sin(emission) * oy < 0.0:
            emission += _PI
        out_f[i, _F_EMIS] = _wrap_pi(emission)
        if fallback:
            status |= _SECOND
        out_i[i, _I_STATUS] = status

    # ---- a value that should be defined but is infinite, NaN or beyond the float32 range of its table column (an
    # energy scale or geometry far outside the physical range) gets NOT_FINITE; the NaN that other bits explain
    # (no signal, malformed; no axis after SINGLE_PIXEL or ROUND) do not
    for i in range(lo, hi):
        status = out_i[i, _I_STATUS]
        if status & (_MALFORMED | _NO_SIGNAL):
            continue
        no_axis = (status & (_SINGLE | _ROUND)) != 0
        for k in range(out_f.shape[1]):
            if no_axis and (k == _F_AXIS or k == _F_EMIS or k == _F_M3):
                continue
            if not abs(out_f[i, k]) <= FLOAT32_MAX:  # also true for NaN
                out_i[i, _I_STATUS] = status | _NOT_FINITE
                break
