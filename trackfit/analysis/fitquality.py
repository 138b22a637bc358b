"""Goodness of fit: when a fit statistic says that the model does not describe the data.

A binned fit reports its Poisson deviance or Pearson chi-square and the degrees of freedom ``ndof``; for a model
that describes the data, both follow asymptotically a chi-square law with ``ndof`` degrees of freedom (Baker &
Cousins 1984, Nucl. Instrum. Meth. 221, 437; docs/methods.md §3), so their ratio to ``ndof`` is near 1.

A fit is **poor** when the statistic is both improbable (chi-square p-value below :data:`POOR_FIT_P_VALUE`) and far
above its expectation (ratio to ``ndof`` above :data:`POOR_FIT_RATIO`). The p-value alone would flag, in large data
sets, model imperfections far below the statistical errors of the fitted values; the ratio alone would flag small
``ndof`` by chance. Both thresholds are common practice. A poor fit still gives numbers, but they may be biased
and their errors too small: the analysis says so with a :class:`FitQualityWarning` instead of reporting it as
converged.

Many fits of the same kind (one per gain-map cell) are judged together by the sum of their statistics against
the sum of their ``ndof`` (:func:`combined_quality`): under the model, the sum of independent chi-square
variables is chi-square with the summed degrees of freedom.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = ["POOR_FIT_P_VALUE", "POOR_FIT_RATIO", "FitQuality", "FitQualityWarning", "fit_quality",
           "combined_quality", "warn_if_poor"]

#: a fit whose statistic has a chi-square p-value below this ... (common practice: about 3.3 sigma)
POOR_FIT_P_VALUE = 1e-3
#: ... and a statistic above this many times ndof is poor (common practice)
POOR_FIT_RATIO = 1.5


class FitQualityWarning(UserWarning):
    """A fit whose goodness-of-fit statistic says the model does not describe the data."""


@dataclass(frozen=True)
class FitQuality:
    """Goodness of fit of one fit (or of a set of fits, summed).

    Attributes
    ----------
    statistic : float
        Poisson deviance or Pearson chi-square at the minimum.
    ndof : int
        Degrees of freedom.
    name : str
        ``"deviance"`` or ``"chi2"`` (for the printed text).
    """

    statistic: float
    ndof: int
    name: str = "deviance"

    @property
    def ratio(self) -> float:
        """``statistic / ndof`` (NaN without degrees of freedom)."""
        return self.statistic / self.ndof if self.ndof > 0 else math.nan

    @property
    def p_value(self) -> float:
        """Probability of a statistic at least this large if the model is right (chi-square law)."""
        if self.ndof <= 0 or not math.isfinite(self.statistic):
            return math.nan
        return float(stats.chi2.sf(self.statistic, self.ndof))

    @property
    def poor(self) -> bool:
        """Both improbable and far above the expectation (see the module docstring)."""
        p = self.p_value
        return bool(math.isfinite(p) and p < POOR_FIT_P_VALUE and self.ratio > POOR_FIT_RATIO)

    def __str__(self) -> str:
        if self.ndof <= 0:
            return f"{self.name} {self.statistic:.3g} with no degree of freedom (not testable)"
        text = f"{self.name}/ndof = {self.statistic:.1f}/{self.ndof} = {self.ratio:.2f} (p = {self.p_value:.2g})"
        return text + (": POOR, the model does not describe the data" if self.poor else "")


def fit_quality(statistic: float, ndof: int, name: str = "deviance") -> FitQuality:
    """The :class:`FitQuality` of one fit."""
    return FitQuality(statistic=float(statistic), ndof=int(ndof), name=name)


def combined_quality(statistics, ndofs, name: str = "deviance") -> FitQuality:
    """The summed statistic of independent fits (finite entries only) against their summed degrees of freedom."""
    statistics = np.asarray(statistics, dtype=float)
    ndofs = np.asarray(ndofs, dtype=float)
    good = np.isfinite(statistics) & np.isfinite(ndofs) & (ndofs > 0)
    return FitQuality(statistic=float(statistics[good].sum()), ndof=int(ndofs[good].sum()), name=name)


def warn_if_poor(quality: FitQuality, what: str, *, advice: str = "", stacklevel: int = 3) -> bool:
    """Emit a :class:`FitQualityWarning` naming ``what`` when ``quality`` is poor; returns whether it was."""
    if quality.poor:
        text = f"poor fit of {what}: {quality.name}/ndof = {quality.statistic:.1f}/{quality.ndof} = " \
               f"{quality.ratio:.2f} (p = {quality.p_value:.2g}); the values and their errors may be biased"
        warnings.warn(FitQualityWarning(text + (f" ({advice})" if advice else "")), stacklevel=stacklevel)
    return quality.poor
