"""The adaptive emission-angle estimate: the two-stage moment analysis with per-track settings and a head score.

Three changes to the two-stage analysis of ``docs/methods.md`` §2, all measured in §11:

* **Head score.** The start of the track is on the side of the sign of ``m3 / m2^1.5 + density_weight * a``, where
  ``a = (mean pixel charge behind - mean pixel charge ahead) / (their sum)`` along the first-pass axis: the start
  has a lower ionisation density than the Bragg end, which the third moment alone reads only through the tails.
* **Settings from the track size.** The start-point search radii and the second-pass length are functions of the
  track's rms length ``sqrt(m2_major_mm2)`` in pitches, interpolated linearly in its log2 between the nodes of
  :data:`SIZE_RULE` (one global setting serves short, diffusion-dominated blobs and long tracks equally badly).
* The second pass is always taken about the conversion point.

The rule was tuned by maximising the modulation factor of simulated 100 %-polarized runs of both simulator designs
(He/DME 2.7-8 keV, Ar/DME 10-30 keV) on events that never enter the published comparison
(:mod:`trackfit.quality_study`); no simulation truth enters the estimate or its tuning.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ...events import EventBatch
from ._kernels import ADAPTIVE_FLOAT_COLUMNS, ADAPTIVE_INT_COLUMNS, adaptive_range

__all__ = ["SizeRule", "SIZE_RULE", "HEAD_DENSITY_WEIGHT", "AdaptiveEstimator", "ADAPTIVE_COLUMNS"]

#: weight of the charge-density asymmetry in the head score
HEAD_DENSITY_WEIGHT = 1.0


@dataclass(frozen=True, kw_only=True)
class SizeRule:
    """Settings of the adaptive estimate as functions of the track size.

    Attributes
    ----------
    size_pitch : tuple of float
        Track sizes ``sqrt(m2_major_mm2) / pitch`` at the nodes, increasing; settings are interpolated linearly in
        log2 of the size and constant beyond the first and last node.
    inner_rms, outer_rms : tuple of float
        Start-point search radii at the nodes, in units of ``sqrt(m2_major_mm2)`` (as ``start_search_inner_rms``
        and ``start_search_outer_rms`` of the two-stage analysis).
    length_pitch : tuple of float
        Second-pass length at the nodes, in pitches (as ``second_pass_length_mm`` / pitch).
    """

    size_pitch: tuple[float, ...]
    inner_rms: tuple[float, ...]
    outer_rms: tuple[float, ...]
    length_pitch: tuple[float, ...]

    def __post_init__(self):
        n = len(self.size_pitch)
        for name in ("inner_rms", "outer_rms", "length_pitch"):
            if len(getattr(self, name)) != n:
                raise ValueError(f"'{name}' must have one value per node ({n}), got {len(getattr(self, name))}")
        size = np.asarray(self.size_pitch, dtype=float)
        if n < 1 or np.any(size <= 0) or np.any(np.diff(size) <= 0):
            raise ValueError(f"'size_pitch' must be positive and increasing (got {self.size_pitch})")
        if np.any(np.asarray(self.inner_rms) < 0) or np.any(np.asarray(self.outer_rms) <= np.asarray(self.inner_rms)):
            raise ValueError("the radii must satisfy 0 <= inner_rms < outer_rms at every node")
        if np.any(np.asarray(self.length_pitch) <= 0):
            raise ValueError(f"'length_pitch' must be > 0 (got {self.length_pitch})")

    def arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(log2 sizes, inner radii, outer radii, lengths in pitches) as contiguous float64 arrays."""
        return tuple(np.ascontiguousarray(v, dtype=np.float64) for v in (
            np.log2(self.size_pitch), self.inner_rms, self.outer_rms, self.length_pitch))

    def at(self, size_pitch) -> dict[str, np.ndarray]:
        """The settings at track sizes ``size_pitch`` (for figures and checks)."""
        x = np.log2(np.asarray(size_pitch, dtype=float))
        nodes, inner, outer, length = self.arrays()
        return {"inner_rms": np.interp(x, nodes, inner), "outer_rms": np.interp(x, nodes, outer),
                "length_pitch": np.interp(x, nodes, length)}


#: The shipped rule (``docs/methods.md`` §11): about 1 pitch for round blobs, shorter second passes for tracks of
#: 2-4 pitches, longer ones for long tracks whose first part is straighter
SIZE_RULE = SizeRule(size_pitch=(1.0, 2.0, 4.0, 8.0, 16.0),
                     inner_rms=(0.9, 1.25, 1.3, 1.25, 1.5),
                     outer_rms=(5.0, 5.0, 4.5, 3.5, 3.5),
                     length_pitch=(0.7, 0.6, 0.8, 1.0, 1.6))

#: the columns the adaptive estimate adds to an event table
ADAPTIVE_COLUMNS = ADAPTIVE_FLOAT_COLUMNS + ADAPTIVE_INT_COLUMNS


class AdaptiveEstimator:
    """Runs :func:`~trackfit.recon.estimators._kernels.adaptive_range` on batches of one chip.

    Parameters
    ----------
    grid : HexGrid
    rule : SizeRule
    density_weight : float
    """

    name = "adaptive"

    def __init__(self, grid, rule: SizeRule = SIZE_RULE, density_weight: float = HEAD_DENSITY_WEIGHT):
        self.grid = grid
        self.rule = rule
        self.density_weight = float(density_weight)
        parity = 1 if grid.shifted_rows == "odd" else 0
        x_first, _ = grid.pixel_centre_mm(0, 1 - parity)
        _, y_first = grid.pixel_centre_mm(0, 0)
        self.geometry = (grid.pitch_mm, grid.row_pitch_mm, -float(x_first), -float(y_first), parity)

    def run(self, batch: EventBatch, signal: np.ndarray, main_mask: np.ndarray, status: np.ndarray,
            split) -> dict[str, np.ndarray]:
        """The adaptive columns of a batch.

        Parameters
        ----------
        batch : EventBatch
        signal : int16 (M,)
            The pedestal-subtracted signal the two-stage kernel used.
        main_mask : uint8 (M,)
            Main-cluster pixels, from the two-stage kernel.
        status : int64 (N,)
            The two-stage status.
        split : callable
            ``split(kernel, common_args)`` runs ``kernel(lo, hi, *common_args)`` over the batch (in threads).
        """
        n = len(batch)
        if main_mask.shape != signal.shape or status.shape != (n,):
            raise ValueError(f"main_mask must have the shape of the signal {signal.shape} and status ({n},) "
                             f"(got {main_mask.shape} and {status.shape})")
        out_f = np.empty((n, len(ADAPTIVE_FLOAT_COLUMNS)), np.float64)
        out_i = np.empty((n, len(ADAPTIVE_INT_COLUMNS)), np.int64)
        split(adaptive_range, (batch.roi, batch.start, signal, main_mask, np.ascontiguousarray(status, np.int64),
                               *self.geometry, *self.rule.arrays(), self.density_weight, out_f, out_i))
        columns = {name: out_f[:, k] for k, name in enumerate(ADAPTIVE_FLOAT_COLUMNS)}
        columns.update({name: out_i[:, k] for k, name in enumerate(ADAPTIVE_INT_COLUMNS)})
        return columns
