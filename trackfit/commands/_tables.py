"""Event tables given to the analysis commands, and what their errors say about them.

An error about a table names the file and what made it (``created_by``, format version, rows, emission estimate,
raw input), the column that is missing and what needed it, or, when a selection keeps no event, every cut with
the events it removed and why the default selection removed the events it did (failure bits, no emission angle).
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from ..cli import CommandError

#: a quoted column name in the library's messages: "needs column 'x'", "no column 'x'", "no column(s) ['x']"
_COLUMN = re.compile(r"column(?:\(s\))?\s+\[?'([^']+)'")


def _file_facts(path) -> dict:
    """What a table file says about itself, for messages; never raises (an unreadable file says less)."""
    facts = {}
    try:
        import h5py

        with h5py.File(path, "r") as f:
            for key in ("created_by", "format_version", "trackfit_format"):
                if key in f.attrs:
                    value = f.attrs[key]
                    facts[key] = value.decode(errors="replace") if isinstance(value, bytes) else value
            events = f.get("events")
            if isinstance(events, h5py.Group):
                facts["columns"] = set(events.keys())
                if "n_rows" in events.attrs:
                    facts["n_rows"] = int(events.attrs["n_rows"])
        from ..io.table import read_table

        facts["provenance"] = read_table(path, columns=[]).provenance
    except Exception:  # noqa: BLE001 - the facts only decorate a message about another error
        pass
    return facts


def table_columns(path) -> set[str]:
    """The column names of a table file (empty when it cannot be read; the reader reports why)."""
    return _file_facts(path).get("columns", set())


def table_origin(path) -> str:
    """``'run.h5' (event table v2 made by trackfit 0.1.0, 3000 rows, 'adaptive' estimate, from raw file 'r.h5')``."""
    from ..analysis.estimates import estimator_of

    facts = _file_facts(path)
    provenance = facts.get("provenance") or {}
    parts = []
    if "format_version" in facts:
        parts.append(f"{facts.get('trackfit_format', 'table')} v{facts['format_version']}"
                     + (f" made by {facts['created_by']}" if "created_by" in facts else ""))
    if "n_rows" in facts:
        parts.append(f"{facts['n_rows']} rows")
    if provenance.get("config_toml"):
        parts.append(f"'{estimator_of(_WithProvenance(provenance))}' estimate")
    if provenance.get("input_name"):
        parts.append(f"from raw file '{provenance['input_name']}'")
    return f"'{path}'" + (f" ({', '.join(parts)})" if parts else "")


class _WithProvenance(dict):
    def __init__(self, provenance):
        super().__init__()
        self.provenance = provenance


def missing_column_error(err: Exception, paths) -> CommandError | None:
    """A :class:`CommandError` naming the table of ``paths`` that lacks the column ``err`` quotes, what made the
    table and what needed the column; None when ``err`` is not about a column one of the tables lacks."""
    text = str(err.args[0]) if isinstance(err, KeyError) and err.args else str(err)
    match = _COLUMN.search(text)
    if not match:
        return None
    column = match.group(1)
    lacking = [p for p in paths if column not in _file_facts(p).get("columns", {column})]
    if not lacking:
        return None
    need = re.search(r"([^:;(]*?)\s+needs column", text)
    which = f", which {need.group(1).strip()} needs" if need else ""
    others = f" (and {len(lacking) - 1} more of the tables given)" if len(lacking) > 1 else ""
    estimate = column.split("_")[0]
    if estimate in ("adaptive", "skeleton"):
        advice = (f"the '{estimate}' estimate is not in the table: reconstruct the raw file with --estimator "
                  f"{estimate}, or analyse the estimate the table has (--estimator)")
    else:
        advice = ("every table written by trackfit reconstruct has it, so this one was cut down or made by another "
                  "program: reconstruct the raw file again")
    return CommandError(f"event table {table_origin(lacking[0])}{others} has no column '{column}'{which}: {advice}")


def checked_estimate(path, table, estimator: str):
    """``table`` (of the file ``path``) with the estimate ``estimator`` in the analysis columns, its values checked
    (:func:`~trackfit.analysis.table_checks.check_analysis_values`); a missing column becomes the
    :func:`missing_column_error` of ``path``."""
    from ..analysis.estimates import with_estimate
    from ..analysis.table_checks import TableValueError, check_analysis_values
    from ..recon.estimators import ESTIMATE_COLUMNS

    name = f"event table '{path}'"
    try:
        estimated = with_estimate(table, estimator, name=name)
        check_analysis_values(estimated, name=name, columns=ESTIMATE_COLUMNS[estimator])
    except TableValueError:
        raise
    except (KeyError, ValueError) as err:
        explained = missing_column_error(err, [path])
        if explained is None:
            raise
        raise explained from None
    return estimated


def one_line_cut_flow(flow) -> str:
    """``input 3000; default: ... removed 3000, kept 0; energy ... removed 0, kept 0``."""
    steps = [f"{cut} removed {removed}, kept {kept}" for cut, kept, removed in flow.rows]
    return "; ".join([f"input {flow.n_input}", *steps])


def removal_reasons(tables, estimator: str | None) -> str:
    """Why the default selection removes events of ``tables`` (paths or tables): the number with each failure bit
    and without an emission angle, e.g. ``3000 have failure bit NO_SIGNAL``; empty when it removes none."""
    from ..analysis.estimates import estimator_of
    from ..io.table import read_table
    from ..recon.estimators import ESTIMATE_COLUMNS
    from ..recon.status import FAILURE_BITS, Status

    counts, no_angle = {}, 0
    for table in tables:
        try:
            if isinstance(table, str | Path):
                chosen = estimator or estimator_of(read_table(table, columns=[]))
                column = ESTIMATE_COLUMNS[chosen]["emission_rad"]
                table = read_table(table, columns=["status", column])
            else:
                column = ESTIMATE_COLUMNS[estimator or estimator_of(table)]["emission_rad"]
            status = np.asarray(table["status"]).astype(np.int64)
            angle = np.asarray(table[column], dtype=np.float64)
        except Exception:  # noqa: BLE001 - the reasons only decorate a message about another error
            continue
        for bit in Status:
            if bit & FAILURE_BITS:
                counts[bit.name] = counts.get(bit.name, 0) + int(np.count_nonzero(status & int(bit)))
        with np.errstate(invalid="ignore"):
            no_angle += int(np.count_nonzero(~np.isfinite(angle) & ((status & int(FAILURE_BITS)) == 0)))
    reasons = [f"{n} have failure bit {name}" for name, n in counts.items() if n]
    if no_angle:
        reasons.append(f"{no_angle} have no emission angle (NaN or infinite) without a failure bit")
    return "; ".join(reasons)


def no_events_error(err, what: str, tables, estimator: str | None, paths=()) -> CommandError:
    """One line for a :class:`~trackfit.analysis.NoEventsLeftError`: which tables (``what``), the cut flow and why
    the default selection removed its events."""
    flow = err.flow
    if flow.n_input == 0:
        origins = "; ".join(table_origin(p) for p in paths) or what
        return CommandError(f"no events left in {what}: the input holds no rows ({origins}); a table of 0 rows "
                            "comes from a raw file of 0 events (see trackfit info on the raw file)")
    text = f"no events left in {what} after the selection: {one_line_cut_flow(flow)}"
    removed_by_default = flow.rows[0][2] if flow.rows else 0
    if removed_by_default:
        reasons = removal_reasons(tables, estimator)
        if reasons:
            text += f" (of the input events, {reasons}; docs/table-format.md says what each status bit means)"
    return CommandError(text)
