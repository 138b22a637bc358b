"""Plain-numpy twin of the reconstruction kernel, one event at a time (private; for tests and benchmarks).

Written the way a user would by hand: numpy vectorised within each event, ``scipy.ndimage.label`` for the
connected components. The hexagonal 6-neighbour graph becomes an ordinary image graph after shearing the ROI into
axial coordinates ``(q, r)``, where the neighbours of ``(q, r)`` are ``(q +- 1, r)``, ``(q, r +- 1)``,
``(q - 1, r + 1)`` and ``(q + 1, r - 1)``. It follows the same formulas, tolerances and status rules as
:mod:`trackfit.recon._kernels` but shares no code with it.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from ._kernels import DEGENERACY_TOLERANCE as TOL
from ._kernels import FLOAT_COLUMNS, INT_COLUMNS
from .status import Status

__all__ = ["reconstruct_event", "reconstruct_batch_reference", "HEX_STRUCTURE"]

#: 6-neighbour structure in axial coordinates, indexed [dr + 1, dq + 1]
HEX_STRUCTURE = np.array([[0, 1, 1], [1, 1, 1], [1, 1, 0]], dtype=bool)


def _axis(mxx, myy, mxy):
    half_trace = 0.5 * (mxx + myy)
    half_diff = math.hypot(0.5 * (mxx - myy), mxy)
    axis = 0.5 * math.atan2(2.0 * mxy, mxx - myy)
    if axis <= -0.5 * math.pi:
        axis += math.pi
    return axis, half_trace + half_diff, max(half_trace - half_diff, 0.0), half_diff


def _wrap(angle):
    """Angle into (-pi, pi]."""
    while angle > math.pi:
        angle -= 2 * math.pi
    while angle <= -math.pi:
        angle += 2 * math.pi
    return angle


def _flag_not_finite(out: dict) -> dict:
    """Set NOT_FINITE when a value that should be defined is infinite, NaN or beyond the float32 range."""
    status = out["status"]
    if status & (Status.MALFORMED_INPUT | Status.NO_SIGNAL):
        return out
    names = list(FLOAT_COLUMNS)
    if status & (Status.SINGLE_PIXEL | Status.ROUND):  # no axis: these are NaN by definition
        names = [name for name in names if name not in ("axis_rad", "emission_rad", "m3_major_mm3")]
    values = np.array([out[name] for name in names], dtype=np.float64)
    if not np.all(np.abs(values) <= np.finfo(np.float32).max):
        out["status"] = int(status | Status.NOT_FINITE)
    return out


def reconstruct_event(signal, roi, grid, config, *, mask=None, bad=False, thresholds=None, pedestal=None) -> dict:
    """Reconstruct one event (see :func:`_reconstruct_event`), with the NOT_FINITE check of every value."""
    with np.errstate(all="ignore"):  # overflow and NaN are flagged with NOT_FINITE, as by the kernel
        out = _reconstruct_event(signal, roi, grid, config, mask=mask, bad=bad, thresholds=thresholds,
                                 pedestal=pedestal)
    return _flag_not_finite(out)


def _reconstruct_event(signal, roi, grid, config, *, mask=None, bad=False, thresholds=None, pedestal=None) -> dict:
    """Reconstruct one event.

    Parameters
    ----------
    signal : ndarray of int16
        ROI pixels, row by row.
    roi : (first column, first row, n_columns, n_rows)
    grid : HexGrid
    config : ReconConfig
    mask : ndarray of bool, shape grid.shape, optional
        True for bad pixels.
    bad : bool
        The event is a malformed-input placeholder.
    thresholds : ndarray of float, shape grid.shape, optional
        Per-pixel threshold (a pixel is hit when its signal is above it); default ``config.threshold_adc``.
    pedestal : ndarray of float, shape grid.shape, optional
        Subtracted from the signal first, rounded half to even and clipped to int16 (raw files that are not
        pedestal-subtracted).

    Returns
    -------
    dict
        The kernel's columns (float values as Python floats, counts and status as ints).
    """
    out = {name: math.nan for name in FLOAT_COLUMNS}
    out.update({name: 0 for name in INT_COLUMNS})
    out["pulse_height"] = 0.0
    out["energy_kev"] = 0.0
    if bad:
        out["status"] = int(Status.MALFORMED_INPUT)
        return out
    c0, r0, nc, nr = (int(v) for v in roi)
    image = np.asarray(signal).reshape(nr, nc)
    if pedestal is not None:
        image = np.clip(np.rint(image - pedestal[r0:r0 + nr, c0:c0 + nc]), -32768, 32767).astype(np.int16)
    if thresholds is None:
        hit = image > math.floor(config.threshold_adc)
    else:
        hit = image > np.floor(thresholds[r0:r0 + nr, c0:c0 + nc])
    rows = np.arange(r0, r0 + nr)
    if mask is not None:
        hit &= ~mask[r0:r0 + nr, c0:c0 + nc]
    if not hit.any():
        out["status"] = int(Status.NO_SIGNAL)
        return out

    # shear into axial coordinates: q = column - floor-offset(row)
    q_first = grid.to_axial(np.full(nr, c0), rows)[0]
    shift = q_first - q_first.min()
    sheared = np.zeros((nr, nc + int(shift.max())), dtype=bool)
    rr, cc = np.nonzero(hit)
    sheared[rr, cc + shift[rr]] = True
    labels_sheared, n_clusters = ndimage.label(sheared, structure=HEX_STRUCTURE)
    labels = labels_sheared[rr, cc + shift[rr]]  # label of each hit pixel, hits in ROI (row-major) order
    charge = image[rr, cc].astype(np.float64)
    cluster_charge = np.bincount(labels, weights=charge, minlength=n_clusters + 1)[1:]
    first_pixel = np.full(n_clusters, np.iinfo(np.int64).max)
    np.minimum.at(first_pixel, labels - 1, rr * nc + cc)
    # largest charge; ties go to the cluster whose first pixel (row-major) comes first
    order = np.lexsort((first_pixel, -cluster_charge))
    main = order[0] + 1
    sel = labels == main
    rr, cc, q = rr[sel], cc[sel], charge[sel]
    n = len(q)
    status = 0
    out["n_pixels"] = n
    out["n_clusters"] = int(n_clusters)
    out["peak_adc"] = int(q.max())
    if rr.min() == 0 or rr.max() == nr - 1 or cc.min() == 0 or cc.max() == nc - 1:
        status |= Status.ROI_BORDER
    if q.max() >= config.saturation_adc:
        status |= Status.SATURATED
    if n < config.min_pixels:
        status |= Status.TOO_FEW_PIXELS

    x, y = grid.pixel_centre_mm(cc + c0, rr + r0)
    total = q.sum()
    bx, by = (q @ x) / total, (q @ y) / total
    out.update(pulse_height=float(total), energy_kev=float(total / config.energy_scale()[0]), centroid_x_mm=bx,
               centroid_y_mm=by, conv_x_mm=bx, conv_y_mm=by)
    if n == 1:
        out.update(m2_major_mm2=0.0, m2_minor_mm2=0.0, status=int(status | Status.SINGLE_PIXEL))
        return out
    dx, dy = x - bx, y - by
    mxx, myy, mxy = (q @ (dx * dx)) / total, (q @ (dy * dy)) / total, (q @ (dx * dy)) / total
    axis, m2l, m2t, half_diff = _axis(mxx, myy, mxy)
    out.update(m2_major_mm2=m2l, m2_minor_mm2=m2t)
    if half_diff <= TOL * 0.5 * (mxx + myy):
        out["status"] = int(status | Status.ROUND)
        return out
    if m2t <= TOL * m2l:
        status |= Status.COLLINEAR
    u = dx * math.cos(axis) + dy * math.sin(axis)
    m3 = (q @ u**3) / total
    out.update(axis_rad=axis, m3_major_mm3=m3)
    if abs(m3) <= TOL * m2l**1.5:
        out.update(emission_rad=axis, status=int(status | Status.NO_SKEWNESS))
        return out
    side = 1.0 if m3 > 0 else -1.0
    d2 = dx * dx + dy * dy
    r_inner, r_outer = config.start_search_inner_rms, config.start_search_outer_rms
    start_side = (u * side > 0) & (d2 >= r_inner**2 * m2l) & (d2 <= r_outer**2 * m2l)
    out["n_conv_pixels"] = int(start_side.sum())
    if not start_side.any():
        out.update(emission_rad=_wrap(axis + (math.pi if side > 0 else 0.0)),
                   status=int(status | Status.NO_CONVERSION_PIXELS))
        return out
    qs = q[start_side]
    cx, cy = (qs @ x[start_side]) / qs.sum(), (qs @ y[start_side]) / qs.sum()
    out.update(conv_x_mm=cx, conv_y_mm=cy)

    ex, ey = x - cx, y - cy
    w = q * np.exp(-np.hypot(ex, ey) * (1.0 / config.second_pass_length_mm))
    wsum = w.sum()
    emission, fallback = axis, True
    if wsum > 0 and np.isfinite(wsum):
        if config.second_pass_centre == "weighted_centroid":
            ex, ey = ex - (w @ ex) / wsum, ey - (w @ ey) / wsum
        sxx, syy, sxy = (w @ (ex * ex)) / wsum, (w @ (ey * ey)) / wsum, (w @ (ex * ey)) / wsum
        phi, _, _, hd = _axis(sxx, syy, sxy)
        if hd > TOL * 0.5 * (sxx + syy):
            emission, fallback = phi, False
    if math.cos(emission) * (bx - cx) + math.sin(emission) * (by - cy) < 0:
        emission += math.pi
    out["emission_rad"] = _wrap(emission)
    if fallback:
        status |= Status.SECOND_PASS_FALLBACK
    out["status"] = int(status)
    return out


def reconstruct_batch_reference(batch, config) -> dict[str, np.ndarray]:
    """:func:`reconstruct_event` over every event of a batch (a Python loop: slow, for tests and benchmarks).

    With ``config.pixel_map``: the map's masked pixels join ``bad_pixels``, its pedestals are subtracted when the
    batch is not pedestal-subtracted, and ``threshold_noise_rms`` times its noise is each pixel's threshold.
    """
    mask = None
    if config.bad_pixels:
        mask = config.bad_pixel_map(batch.grid).reshape(batch.grid.shape).astype(bool)
    thresholds = pedestal = None
    if config.pixel_map:
        from ..io.pixelmap import read_pixel_map

        pixel_map = read_pixel_map(config.pixel_map)
        pixel_map.check_grid(batch.grid, "the batch")
        mask = pixel_map.masked if mask is None else (mask | pixel_map.masked)
        if not batch.pedestal_subtracted:
            pedestal = pixel_map.pedestal_for_subtraction()
        if config.threshold_noise_rms > 0:
            thresholds = config.threshold_noise_rms * pixel_map.noise_for_threshold()
    elif not batch.pedestal_subtracted:
        raise ValueError("the batch is not pedestal-subtracted: give a pixel map")
    rows = []
    for i in range(len(batch)):
        sig = batch.signal[batch.start[i]:batch.start[i + 1]]
        rows.append(reconstruct_event(sig, batch.roi[i], batch.grid, config, mask=mask, bad=bool(batch.bad[i]),
                                      thresholds=thresholds, pedestal=pedestal))
    names = FLOAT_COLUMNS + INT_COLUMNS
    return {name: np.array([r[name] for r in rows], dtype=np.float64 if name in FLOAT_COLUMNS else np.int64)
            for name in names}
