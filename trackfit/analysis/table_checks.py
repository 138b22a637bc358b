"""Values an analysis trusts in an event table, checked before it measures anything.

The reconstruction writes NaN and sets a failure status bit when it cannot measure a quantity
(``docs/table-format.md``), so an event that passes the default selection (an emission angle and no failure bit)
has an emission angle in [-pi, pi] and finite energies, pulse heights and conversion points. A table in which such
an event holds anything else was damaged or was not written by ``trackfit reconstruct``; measuring it would give a
number that looks right and is not, so the analysis commands refuse it with :class:`TableValueError`, naming the
table, the column, how many events are affected and the first of them.

NaN angles and failure bits are not errors: the default selection removes those events, and the cut flow counts
them.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

__all__ = ["TableValueError", "check_analysis_values", "usable_rows", "ANGLE_TOLERANCE_RAD"]

#: emission angles may exceed pi by this much (the float32 rounding of pi itself; the reconstruction wraps angles
#: into [-pi, pi])
ANGLE_TOLERANCE_RAD = 1e-6


class TableValueError(ValueError):
    """An event that the default selection keeps holds a value the reconstruction never writes."""


def usable_rows(table: Mapping) -> np.ndarray:
    """The rows the default selection keeps: a finite ``emission_rad`` and no failure status bit."""
    from ..recon.status import FAILURE_BITS

    status = np.asarray(table["status"]).astype(np.int64)
    with np.errstate(invalid="ignore"):
        angle = np.isfinite(np.asarray(table["emission_rad"], dtype=np.float64))
    return angle & ((status & np.int64(int(FAILURE_BITS))) == 0)


def check_analysis_values(table: Mapping, *, name: str, columns: Mapping[str, str] | None = None) -> None:
    """Refuse a table whose usable events hold values the reconstruction never writes.

    Parameters
    ----------
    table : mapping of columns
        With ``status`` and ``emission_rad`` (the estimate the analysis uses); ``energy_kev``, ``pulse_height``,
        ``conv_x_mm`` and ``conv_y_mm`` are checked when present.
    name : str
        How the error names the table (``"event table 'run.h5'"``).
    columns : mapping, optional
        The table's own names of the checked columns (``{"emission_rad": "adaptive_emission_rad"}``), for messages.

    Raises
    ------
    TableValueError
        A usable event (finite emission angle, no failure bit) has an emission angle outside [-pi, pi], or a
        non-finite energy, pulse height or conversion point. The message names the table, the column, the number
        of such events and the first one (row and value).
    """
    columns = dict(columns or {})
    usable = usable_rows(table)
    n_usable = int(usable.sum())
    if not n_usable:
        return
    checks = [("emission_rad", lambda v: np.abs(v) <= np.pi + ANGLE_TOLERANCE_RAD, "an angle in [-pi, pi] rad")]
    checks += [(c, np.isfinite, "a finite value") for c in ("energy_kev", "pulse_height", "conv_x_mm", "conv_y_mm")]
    for column, good, expected in checks:
        if column not in table:
            continue
        values = np.asarray(table[column], dtype=np.float64)
        with np.errstate(invalid="ignore"):
            bad = usable & ~good(values)
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            event = f", event_index {int(np.asarray(table['event_index'])[first])}" if "event_index" in table else ""
            raise TableValueError(
                f"{name}, column '{columns.get(column, column)}': {int(bad.sum())} of the {n_usable} events the "
                f"default selection keeps (an emission angle and no failure status bit) hold something other than "
                f"{expected}, first row {first}{event} ({float(values[first]):g}); the reconstruction never writes "
                "that, so the table is damaged or was not made by trackfit reconstruct: reconstruct the raw file again")
