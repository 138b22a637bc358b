"""Emission-angle estimates beyond the two-stage moment analysis (``docs/methods.md`` §11).

Every estimate adds its own columns to the event table; the two-stage columns (``emission_rad``, ``conv_x_mm``,
``conv_y_mm``, ...) are always written and keep their meaning. ``ReconConfig.emission_estimator`` chooses which
estimate a table offers to the analysis:

========================  ==============================================================  =====================
``emission_estimator``    estimate                                                        columns
========================  ==============================================================  =====================
``"two-stage"``           the published two-stage moment analysis (§2)                    ``emission_rad``, ...
``"adaptive"``            per-track settings from the track size and a head score         ``adaptive_*``
                          (:mod:`~trackfit.recon.estimators.adaptive`, compiled)
``"skeleton"``            the centre line of long tracks, scikit-image                    ``skeleton_*`` (and
                          (:mod:`~trackfit.recon.estimators.skeleton`, slow, opt-in)      ``adaptive_*``)
========================  ==============================================================  =====================

:data:`ESTIMATE_COLUMNS` maps each estimator to the columns that play the parts of ``emission_rad``, ``conv_x_mm``
and ``conv_y_mm`` in the analysis (:func:`trackfit.analysis.estimates.with_estimate`).
"""

from __future__ import annotations

from ..config import EMISSION_ESTIMATORS
from .adaptive import ADAPTIVE_COLUMNS, SIZE_RULE, AdaptiveEstimator, SizeRule
from .skeleton import SKELETON_COLUMNS, SkeletonEstimator

__all__ = ["EMISSION_ESTIMATORS", "ESTIMATE_COLUMNS", "EstimatorRunner", "AdaptiveEstimator", "SkeletonEstimator",
           "SizeRule", "SIZE_RULE", "ADAPTIVE_COLUMNS", "SKELETON_COLUMNS", "columns_of"]

#: per estimator: the columns that hold its emission angle and conversion point
ESTIMATE_COLUMNS = {
    "two-stage": {"emission_rad": "emission_rad", "conv_x_mm": "conv_x_mm", "conv_y_mm": "conv_y_mm"},
    "adaptive": {"emission_rad": "adaptive_emission_rad", "conv_x_mm": "adaptive_conv_x_mm",
                 "conv_y_mm": "adaptive_conv_y_mm"},
    "skeleton": {"emission_rad": "skeleton_emission_rad", "conv_x_mm": "skeleton_conv_x_mm",
                 "conv_y_mm": "skeleton_conv_y_mm"},
}


def columns_of(estimator: str) -> tuple[str, ...]:
    """The columns an estimator adds to an event table, beyond the two-stage ones."""
    if estimator not in EMISSION_ESTIMATORS:
        raise ValueError(f"unknown emission estimator {estimator!r}; expected one of {EMISSION_ESTIMATORS}")
    return {"two-stage": (), "adaptive": ADAPTIVE_COLUMNS,
            "skeleton": ADAPTIVE_COLUMNS + SKELETON_COLUMNS}[estimator]


class EstimatorRunner:
    """The estimates a config asks for, run on batches after the two-stage kernel.

    Parameters
    ----------
    estimator : str
        One of :data:`EMISSION_ESTIMATORS`.
    grid : HexGrid
    """

    def __init__(self, estimator: str, grid):
        columns_of(estimator)  # validates the name
        self.estimator = estimator
        self.adaptive = AdaptiveEstimator(grid) if estimator in ("adaptive", "skeleton") else None
        self.skeleton = SkeletonEstimator(grid) if estimator == "skeleton" else None

    @property
    def needs_main_mask(self) -> bool:
        return self.adaptive is not None

    def run(self, batch, signal, main_mask, status, m2_major_mm2, split) -> dict:
        """The added columns of a batch (see :class:`~trackfit.recon.estimators.adaptive.AdaptiveEstimator`)."""
        if self.adaptive is None:
            return {}
        columns = self.adaptive.run(batch, signal, main_mask, status, split)
        if self.skeleton is not None:
            columns.update(self.skeleton.run(batch, signal, main_mask, status, m2_major_mm2, columns))
        return columns
