"""Status bits of the reconstruction: every fallback of the kernels sets one, so no value is ever unexplained.

``status == 0`` means the event was fully reconstructed with no warning. Every bit is either a failure or a
warning (:data:`BIT_KIND`, with the reason in :data:`BIT_RATIONALE`):

* **failures** (:data:`FAILURE_BITS`): the event has no emission angle, or one the reconstruction itself declares
  meaningless; it cannot take part in polarimetry. :data:`Status.MALFORMED_INPUT`, :data:`Status.NO_SIGNAL`,
  :data:`Status.SINGLE_PIXEL`, :data:`Status.ROUND` (``emission_rad`` is NaN), :data:`Status.TOO_FEW_PIXELS`
  (an angle is computed, but from fewer pixels than ``min_pixels``, where the moments reflect the pixel shape) and
  :data:`Status.NOT_FINITE` (a value that should be defined is infinite or NaN);
* **warnings** (:data:`WARNING_BITS`): a fallback or a caution; the emission angle is defined and usable, some other
  value may be less precise (a truncated track, a saturated pulse height, a first-pass angle).

The analysis keeps, by default, the events with an emission angle and no failure bit
(:class:`trackfit.analysis.UsableEvents`); rejecting warning bits too is a separate, explicit choice.
``Status.NO_EMISSION`` is the union of the bits for which ``emission_rad`` is NaN.

Examples
--------
>>> from trackfit.recon.status import Status, explain_status
>>> Status(Status.TOO_FEW_PIXELS | Status.COLLINEAR)
<Status.TOO_FEW_PIXELS|COLLINEAR: 36>
>>> print(explain_status(0))
0: fully reconstructed
"""

from __future__ import annotations

import enum

import numpy as np

__all__ = ["Status", "explain_status", "STATUS_DOCS", "status_counts", "FAILURE_BITS", "WARNING_BITS", "BIT_KIND",
           "BIT_RATIONALE"]


class Status(enum.IntFlag):
    """Bit flags of the ``status`` column (uint16). See :data:`STATUS_DOCS` for the meaning of each bit."""

    MALFORMED_INPUT = 1 << 0
    NO_SIGNAL = 1 << 1
    TOO_FEW_PIXELS = 1 << 2
    SINGLE_PIXEL = 1 << 3
    ROUND = 1 << 4
    COLLINEAR = 1 << 5
    NO_SKEWNESS = 1 << 6
    NO_CONVERSION_PIXELS = 1 << 7
    SECOND_PASS_FALLBACK = 1 << 8
    ROI_BORDER = 1 << 9
    SATURATED = 1 << 10
    NOT_FINITE = 1 << 11


#: union of the bits for which ``emission_rad`` is NaN (not a bit of its own)
Status.NO_EMISSION = Status.MALFORMED_INPUT | Status.NO_SIGNAL | Status.SINGLE_PIXEL | Status.ROUND

#: meaning of each bit: what happened and which values the table holds then
STATUS_DOCS: dict[Status, str] = {
    Status.MALFORMED_INPUT: "input event malformed (read with strict=False): empty placeholder row; counts 0, "
                            "pulse_height 0, every position, angle and moment NaN",
    Status.NO_SIGNAL: "no unmasked pixel above threshold_adc in the ROI (all zero, negative or masked): counts 0, "
                      "pulse_height 0, every position, angle and moment NaN",
    Status.TOO_FEW_PIXELS: "main cluster has fewer than min_pixels pixels: everything that is defined is "
                           "computed, but angles are unreliable",
    Status.SINGLE_PIXEL: "main cluster is one pixel: centroid = conversion point = that pixel, moments 0, "
                         "axis_rad and emission_rad NaN",
    Status.ROUND: "first-pass second moments isotropic (m2_major_mm2 == m2_minor_mm2 within 1e-9): no axis, so "
                  "axis_rad, emission_rad and m3_major_mm3 NaN; conversion point = centroid",
    Status.COLLINEAR: "all pixels on one line (m2_minor_mm2 == 0 within 1e-9 of m2_major_mm2): axis exact, "
                      "values valid (every 2-pixel track)",
    Status.NO_SKEWNESS: "third moment zero (|m3_major_mm3| <= 1e-9 m2_major_mm2^1.5): track start unknown, so the "
                        "conversion point is the centroid and emission_rad is the first-pass axis, "
                        "orientation arbitrary",
    Status.NO_CONVERSION_PIXELS: "no pixel on the start side between start_search_inner_rms and "
                                 "start_search_outer_rms * sqrt(m2_major_mm2) from the centroid: conversion point = "
                                 "centroid; emission_rad = first-pass axis oriented away from the start side",
    Status.SECOND_PASS_FALLBACK: "second-pass weighted moments degenerate (isotropic, or all weights underflow): "
                                 "emission_rad = first-pass axis oriented from the conversion point along the track",
    Status.ROI_BORDER: "main cluster touches the ROI border: the track may be truncated",
    Status.SATURATED: "a main-cluster pixel reached saturation_adc: pulse_height underestimates the energy",
    Status.NOT_FINITE: "a value that should be defined came out infinite, NaN or beyond the float32 range of its "
                       "column (an energy scale or geometry far outside the physical range): the values are written "
                       "as computed and cannot be trusted",
}


#: why each bit is a failure (the event cannot take part in polarimetry) or a warning (it can)
BIT_RATIONALE: dict[Status, str] = {
    Status.MALFORMED_INPUT: "nothing was reconstructed: no energy, position or angle",
    Status.NO_SIGNAL: "nothing above threshold: no energy, position or angle",
    Status.TOO_FEW_PIXELS: "the angle of a cluster below min_pixels follows the hexagonal pixel shape more than the "
                           "track, which biases the modulation; the reconstruction settings declare it unreliable",
    Status.SINGLE_PIXEL: "one pixel has no direction: no emission angle",
    Status.ROUND: "isotropic charge has no principal axis: no emission angle",
    Status.COLLINEAR: "the axis of pixels on one line is exact; every value is defined",
    Status.NO_SKEWNESS: "the angle is the first-pass axis with an arbitrary sense; cos 2phi and sin 2phi do not "
                        "depend on the sense, so the event still measures polarization (conversion point less "
                        "precise)",
    Status.NO_CONVERSION_PIXELS: "the angle is the first-pass axis (less precise than the second pass, still an "
                                 "emission direction); the conversion point is the centroid",
    Status.SECOND_PASS_FALLBACK: "the angle is the first-pass axis (less precise than the second pass, still an "
                                 "emission direction)",
    Status.ROI_BORDER: "the track may be truncated at the ROI edge (energy and angle may be biased for long "
                       "tracks); the event is reconstructed, and rejecting it is a choice of the analysis",
    Status.SATURATED: "the pulse height underestimates the energy; the angle is unaffected",
    Status.NOT_FINITE: "a value that should be a number is not: the arithmetic left the float range, so no value of "
                       "the event can be trusted",
}
#: bits that exclude an event from polarimetry (see :data:`BIT_RATIONALE`)
FAILURE_BITS = Status(Status.MALFORMED_INPUT | Status.NO_SIGNAL | Status.TOO_FEW_PIXELS | Status.SINGLE_PIXEL
                      | Status.ROUND | Status.NOT_FINITE)
#: bits after which the event is still usable; rejecting them is an explicit choice (``reject_warnings``)
WARNING_BITS = Status(Status.COLLINEAR | Status.NO_SKEWNESS | Status.NO_CONVERSION_PIXELS
                      | Status.SECOND_PASS_FALLBACK | Status.ROI_BORDER | Status.SATURATED)
#: "failure" or "warning" for every bit
BIT_KIND: dict[Status, str] = {bit: "failure" if bit & FAILURE_BITS else "warning" for bit in STATUS_DOCS}


def explain_status(status: int) -> str:
    """One line per set bit explaining a status value, e.g. ``explain_status(table["status"][17])``."""
    status = int(status)
    if status == 0:
        return "0: fully reconstructed"
    lines = [f"{status}:"]
    rest = status
    for bit, text in STATUS_DOCS.items():
        if status & bit:
            lines.append(f"  {bit.name} (bit {int(bit).bit_length() - 1}, {BIT_KIND[bit]}): {text}")
            rest &= ~int(bit)
    if rest:
        lines.append(f"  unknown bits {rest:#x} (written by a newer trackfit?)")
    return "\n".join(lines)


def status_counts(status) -> dict[str, int]:
    """Number of events with each bit set (and ``"ok"`` for status 0), for summaries."""
    status = np.asarray(status, dtype=np.int64)
    counts = {"ok": int(np.count_nonzero(status == 0))}
    for bit in STATUS_DOCS:
        counts[bit.name] = int(np.count_nonzero(status & int(bit)))
    return counts
