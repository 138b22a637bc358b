"""Which emission-angle estimate of an event table the analysis uses (``docs/methods.md`` §11).

An event table always holds the two-stage estimate (``emission_rad``, ``conv_x_mm``, ``conv_y_mm``) and, when it
was reconstructed with another ``ReconConfig.emission_estimator``, that estimate's columns too (``adaptive_*``,
``skeleton_*``; :mod:`trackfit.recon.estimators`). The analysis works on the names ``emission_rad``, ``conv_x_mm``
and ``conv_y_mm``: :func:`with_estimate` returns the table's columns with those three taken from the chosen
estimate, so selections, Stokes sums, spurious maps and modulation factors all see one consistent estimate.

By default the chosen estimate is the one the table was reconstructed with (:func:`estimator_of`, from the settings
in its provenance); tables without that entry (written before the estimators existed, or built in memory) offer the
two-stage estimate.

Examples
--------
>>> import numpy as np
>>> table = {"emission_rad": np.array([0.1]), "conv_x_mm": np.array([1.0]), "conv_y_mm": np.array([2.0]),
...          "adaptive_emission_rad": np.array([0.2]), "adaptive_conv_x_mm": np.array([1.1]),
...          "adaptive_conv_y_mm": np.array([2.1])}
>>> float(with_estimate(table, "adaptive")["emission_rad"][0])
0.2
>>> estimator_of(table)
'two-stage'
"""

from __future__ import annotations

import tomllib
from collections.abc import Mapping

from ..io.table import EventTable
from ..recon.estimators import EMISSION_ESTIMATORS, ESTIMATE_COLUMNS

__all__ = ["estimator_of", "with_estimate", "EstimateMismatchError", "EMISSION_ESTIMATORS"]

#: key of the estimator in the provenance of a calibration part
ESTIMATOR_KEY = "estimator"


class EstimateMismatchError(ValueError):
    """Calibration parts and the data they are applied to use different estimates or weights."""


def estimator_of(table) -> str:
    """The emission estimator a table was reconstructed with (``"two-stage"`` when its provenance does not say).

    Parameters
    ----------
    table : EventTable or mapping of columns
        Its ``provenance`` (if any) holds the reconstruction settings as ``config_toml``.
    """
    provenance = getattr(table, "provenance", None) or {}
    text = provenance.get("config_toml")
    if not text:
        return "two-stage"
    try:
        values = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        return "two-stage"
    values = values.get("recon", values)
    estimator = values.get("emission_estimator", "two-stage")
    return estimator if estimator in EMISSION_ESTIMATORS else "two-stage"


def with_estimate(table: Mapping, estimator: str | None = None, *, name: str = "the table"):
    """The columns of ``table`` with ``emission_rad``, ``conv_x_mm`` and ``conv_y_mm`` taken from an estimate.

    Parameters
    ----------
    table : EventTable or mapping of columns
    estimator : {"two-stage", "adaptive", "skeleton"}, optional
        Default: :func:`estimator_of` the table.
    name : str
        How errors name the table (e.g. its file name).

    Returns
    -------
    EventTable or dict
        Every column of the table (the same arrays), with the three estimate columns replaced; the two-stage values
        stay available as ``two_stage_emission_rad``, ``two_stage_conv_x_mm`` and ``two_stage_conv_y_mm`` when
        another estimate replaced them. An :class:`~trackfit.io.table.EventTable` (with the table's provenance)
        for a table that has a provenance, else a dict; the table itself for its own two-stage estimate.

    Raises
    ------
    ValueError
        Unknown estimator, or a table without that estimate's columns (the message says how to make them).
    """
    chosen = estimator_of(table) if estimator is None else estimator
    if chosen not in EMISSION_ESTIMATORS:
        raise ValueError(f"unknown emission estimator {chosen!r}; expected one of {EMISSION_ESTIMATORS}")
    if chosen == "two-stage":
        return table
    columns = dict(table.items())
    sources = ESTIMATE_COLUMNS[chosen]
    missing = [source for source in sources.values() if source not in columns]
    if missing:
        raise ValueError(f"{name} has no {chosen!r} estimate (no column {missing[0]!r}; it was reconstructed with "
                         f"emission_estimator = {estimator_of(table)!r}): reconstruct it with emission_estimator = "
                         f"{chosen!r}, or analyse its {estimator_of(table)!r} estimate")
    for target, source in sources.items():
        if target in columns:
            columns["two_stage_" + target] = columns[target]
        columns[target] = columns[source]
    provenance = getattr(table, "provenance", None)
    return columns if provenance is None else EventTable(columns, provenance)
