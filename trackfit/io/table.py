"""Event tables: one row per event, one column array per quantity (format version 2, ``docs/table-format.md``).

What to use when
----------------
* :class:`EventTable` - the in-memory table: a read-only mapping ``name -> 1-D array`` of equal length, with
  ``len(table)`` rows, a :attr:`~EventTable.provenance` dict, :meth:`~EventTable.row` for one event,
  :meth:`~EventTable.select` for cuts and :meth:`~EventTable.to_pandas`.
* :func:`write_table` - write a table held in memory.
* :class:`TableWriter` - append column batches to a new file while streaming (``reconstruct_file`` uses it);
  data go to a partial file (``<path>.<host>-<pid>-<token>.partial``) renamed when the writer closes, so a
  crash never leaves a file that looks complete.
* :func:`read_table` - read all or some columns (and optionally a row range) of a table file.
"""

from __future__ import annotations

import html
from collections.abc import Mapping
from pathlib import Path

import h5py
import numpy as np

from ._partial import PartialFileWriter
from .compression import DEFAULT_COMPRESSION, dataset_filter_options
from .energy_label import describe_energy_scale, energy_is_calibrated, energy_scale_source
from .errors import FileFormatError
from .kinds import open_kind
from .structure import CheckedFile, plain_value

__all__ = [
    "EventTable",
    "TableWriter",
    "TableFormatError",
    "write_table",
    "read_table",
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "COLUMN_DOCS",
    "V1_COLUMN_NAMES",
    "chunk_rows_for",
]

FORMAT_NAME = "event-table"
FORMAT_VERSION = 2
#: versions :func:`read_table` reads; older ones have their columns renamed on reading
READABLE_VERSIONS = (1, 2)
#: column names of format version 1 -> their version-2 names (only the names changed, not the values)
V1_COLUMN_NAMES = {
    "bary_x_mm": "centroid_x_mm",
    "bary_y_mm": "centroid_y_mm",
    "mom2_long": "m2_major_mm2",
    "mom2_trans": "m2_minor_mm2",
    "mom3_long": "m3_major_mm3",
}
#: rows per chunk of a column: the largest chunk (256 kB of float32), and the chunk of a writer that is not told how
#: many rows are coming (a small table then wastes at most 16 kB of float32 per column)
DEFAULT_CHUNK_ROWS = 65_536
UNKNOWN_SIZE_CHUNK_ROWS = 4_096
#: provenance strings longer than this are stored as scalar string datasets instead of attributes
#: (HDF5 attributes are limited to 64 KiB)
_LONG_TEXT = 4096

#: Known columns: name -> (dtype, unit, meaning). Written as dataset attributes ``unit`` and ``description``.
#: Other columns are allowed (any 1-D numeric or boolean array); they get no description unless given one.
COLUMN_DOCS: dict[str, tuple[str, str, str]] = {
    "event_index": ("int64", "", "position of the event in its input file (0-based)"),
    "trigger_id": ("int64", "", "trigger number, copied from the raw file"),
    "time_s": ("float64", "s", "event time, copied from the raw file"),
    "status": ("uint16", "", "reconstruction status bit flags, 0 = fully reconstructed "
                             "(see trackfit.recon.status.Status)"),
    "n_pixels": ("int32", "", "pixels in the main cluster"),
    "n_clusters": ("int32", "", "clusters found in the ROI (6-neighbour connected components); int16 in older "
                                "tables"),
    "pulse_height": ("float32", "ADC", "summed signal of the main cluster"),
    "energy_kev": ("float32", "keV", "pulse_height / counts_per_kev"),
    "centroid_x_mm": ("float32", "mm", "charge centroid of the main cluster, x"),
    "centroid_y_mm": ("float32", "mm", "charge centroid of the main cluster, y"),
    "conv_x_mm": ("float32", "mm", "reconstructed conversion (impact) point, x"),
    "conv_y_mm": ("float32", "mm", "reconstructed conversion (impact) point, y"),
    "axis_rad": ("float32", "rad", "first-pass principal axis, (-pi/2, pi/2]"),
    "emission_rad": ("float32", "rad", "second-pass emission angle, oriented along the track, (-pi, pi]"),
    "m2_major_mm2": ("float32", "mm^2", "second moment along the first-pass axis"),
    "m2_minor_mm2": ("float32", "mm^2", "second moment across the first-pass axis"),
    "m3_major_mm3": ("float32", "mm^3", "third moment along the first-pass axis"),
    "peak_adc": ("int16", "ADC", "largest pixel signal of the main cluster (saturation checks); 0 without one"),
    "n_conv_pixels": ("int32", "", "pixels used for the conversion point"),
    # emission estimators beyond the two-stage analysis (trackfit.recon.estimators, docs/methods.md section 11)
    "adaptive_emission_rad": ("float32", "rad", "adaptive estimate of the emission angle, (-pi, pi]"),
    "adaptive_conv_x_mm": ("float32", "mm", "adaptive estimate of the conversion point, x"),
    "adaptive_conv_y_mm": ("float32", "mm", "adaptive estimate of the conversion point, y"),
    "adaptive_head_score": ("float32", "", "head score m3/m2^1.5 + density asymmetry along axis_rad; the start is "
                                           "on the side of its sign"),
    "adaptive_status": ("uint16", "", "fallbacks of the adaptive estimate (NO_SKEWNESS, NO_CONVERSION_PIXELS, "
                                      "SECOND_PASS_FALLBACK bits of trackfit.recon.status.Status)"),
    "skeleton_emission_rad": ("float32", "rad", "skeleton estimate of the emission angle, (-pi, pi] (the adaptive "
                                                "one where skeleton_path_mm is 0)"),
    "skeleton_conv_x_mm": ("float32", "mm", "skeleton estimate of the conversion point, x"),
    "skeleton_conv_y_mm": ("float32", "mm", "skeleton estimate of the conversion point, y"),
    "skeleton_path_mm": ("float32", "mm", "length of the centre line the skeleton estimate used; 0 where the "
                                          "adaptive estimate was kept"),
    "skeleton_status": ("uint16", "", "fallbacks of the skeleton estimate (as adaptive_status)"),
}


class TableFormatError(FileFormatError):
    """An event-table file that does not follow the format; names the file and the dataset."""


def _as_column(name, values) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1:
        raise ValueError(f"column '{name}' must be 1-D (got shape {arr.shape})")
    if arr.dtype.kind not in "biuf":
        raise ValueError(f"column '{name}' must be numeric or boolean (got dtype {arr.dtype})")
    return arr


def _python_scalar(value):
    return value.item() if isinstance(value, np.generic) else value


class EventTable(Mapping):
    """Per-event results: a read-only mapping of column name to 1-D array, all of the same length.

    Parameters
    ----------
    columns : mapping of str to array_like
        Equal-length 1-D numeric (or boolean) arrays; order is kept.
    provenance : dict, optional
        Where the table comes from (library version, config TOML, input file identity, ...).

    Notes
    -----
    ``len(table)`` is the number of rows (events), not the number of columns; iterate over the table or use
    :attr:`columns` for the names. The arrays are read-only views; copy one to modify it.

    Examples
    --------
    >>> import numpy as np
    >>> table = EventTable({"energy_kev": np.array([5.9, 3.1, 6.0]), "status": np.array([0, 2, 0], np.uint16)})
    >>> len(table), table.columns
    (3, ['energy_kev', 'status'])
    >>> good = table.select(table["status"] == 0)
    >>> good.row(1)
    {'energy_kev': 6.0, 'status': 0}
    """

    def __init__(self, columns=None, provenance=None):
        data = {}
        n = None
        for name, values in (columns or {}).items():
            if not isinstance(name, str) or not name:
                raise ValueError(f"column names must be non-empty strings (got {name!r})")
            arr = _as_column(name, values)
            if n is None:
                n = len(arr)
            elif len(arr) != n:
                first = next(iter(data))
                raise ValueError(f"column '{name}' has {len(arr)} rows but '{first}' has {n}")
            view = arr.view()
            view.flags.writeable = False
            data[name] = view
        self._data = data
        self._n = 0 if n is None else n
        self._provenance = dict(provenance or {})

    # ------------------------------------------------------------------ mapping protocol
    def __getitem__(self, name) -> np.ndarray:
        try:
            return self._data[name]
        except KeyError:
            raise KeyError(f"no column {name!r}; the table has {self.columns}") from None

    def __iter__(self):
        return iter(self._data)

    def __len__(self) -> int:
        return self._n

    def __contains__(self, name) -> bool:
        return name in self._data

    # Mapping's __eq__ would compare arrays element-wise and fail; tables compare by identity (use
    # numpy.array_equal on the columns to compare contents)
    __eq__ = object.__eq__
    __hash__ = object.__hash__

    @property
    def columns(self) -> list[str]:
        """Column names, in order."""
        return list(self._data)

    @property
    def n_rows(self) -> int:
        return self._n

    @property
    def provenance(self) -> dict:
        """A copy of the provenance dictionary (possibly empty)."""
        return dict(self._provenance)

    # ------------------------------------------------------------------ access
    def row(self, i: int) -> dict:
        """The values of event ``i`` as a dict of Python scalars, keyed by column name."""
        i = int(i)
        if not -self._n <= i < self._n:
            raise IndexError(f"row {i} out of range for a table of {self._n} rows")
        return {name: _python_scalar(arr[i]) for name, arr in self._data.items()}

    def select(self, rows) -> EventTable:
        """A new table with the rows given by a boolean mask or integer indices (provenance is kept)."""
        rows = np.asarray(rows)
        if rows.dtype == bool and len(rows) != self._n:
            raise ValueError(f"boolean mask has {len(rows)} entries for a table of {self._n} rows")
        return EventTable({name: arr[rows] for name, arr in self._data.items()}, self._provenance)

    def with_columns(self, **columns) -> EventTable:
        """A new table with columns added or replaced (same number of rows)."""
        return EventTable({**self._data, **columns}, self._provenance)

    @classmethod
    def concatenate(cls, tables) -> EventTable:
        """Join tables with the same columns, in order; the first table's provenance is kept."""
        tables = list(tables)
        if not tables:
            return cls({})
        names = tables[0].columns
        for t in tables[1:]:
            if t.columns != names:
                raise ValueError(f"cannot concatenate tables with columns {names} and {t.columns}")
        return cls({n: np.concatenate([t[n] for t in tables]) for n in names}, tables[0].provenance)

    def to_dict(self) -> dict[str, np.ndarray]:
        """Column copies in a plain dict."""
        return {name: arr.copy() for name, arr in self._data.items()}

    def to_pandas(self):
        """The table as a ``pandas.DataFrame`` (provenance in ``DataFrame.attrs``)."""
        try:
            import pandas as pd
        except ImportError:
            raise ImportError('EventTable.to_pandas needs pandas: pip install "trackfit[pandas]"') from None
        frame = pd.DataFrame({name: arr.copy() for name, arr in self._data.items()})
        frame.attrs["provenance"] = self.provenance
        return frame

    # ------------------------------------------------------------------ display
    def _column_stats(self):
        """Per column: (name, dtype, min, max, mean, number of NaN); None where undefined."""
        rows = []
        for name, arr in self._data.items():
            if arr.dtype.kind == "f":
                finite = np.isfinite(arr)
                n_nan = int(len(arr) - finite.sum())
                vals = arr[finite]
            else:
                n_nan, vals = 0, arr
            if len(vals):
                rows.append((name, str(arr.dtype), _python_scalar(vals.min()), _python_scalar(vals.max()),
                             float(vals.astype(np.float64).mean()), n_nan))
            else:
                rows.append((name, str(arr.dtype), None, None, None, n_nan if len(arr) else None))
        return rows

    def _stats(self):
        def text(value):
            return "" if value is None else f"{value:.6g}"

        return [(name, dtype, text(lo), text(hi), text(mean), "" if n_nan is None else str(n_nan))
                for name, dtype, lo, hi, mean, n_nan in self._column_stats()]

    def _status_line(self):
        if "status" not in self._data or not self._n:
            return None
        ok = int(np.count_nonzero(self._data["status"] == 0))
        return f"status == 0 (fully reconstructed): {ok} of {self._n} ({100.0 * ok / self._n:.1f} %)"

    def _energy_line(self):
        if "energy_kev" not in self._data or energy_scale_source(self._provenance) is None:
            return None
        return describe_energy_scale(self._provenance)

    def summary(self) -> str:
        """A text table of every column: dtype, min, max, mean and number of NaN (with the status and energy-scale
        lines above it; uncalibrated energies are marked in the table too)."""
        head = ("column", "dtype", "min", "max", "mean", "NaN")
        stats = self._stats()
        if not energy_is_calibrated(self._provenance):
            stats = [(f"{r[0]} (uncalibrated)" if r[0] == "energy_kev" else r[0], *r[1:]) for r in stats]
        rows = [head, *stats]
        widths = [max(len(r[k]) for r in rows) for k in range(len(head))]
        lines = [f"EventTable: {self._n} rows, {len(self._data)} columns"]
        status = self._status_line()
        if status:
            lines.append(status)
        energy = self._energy_line()
        if energy:
            lines.append(energy)
        source = self._provenance.get("input_name")
        if source:
            lines.append(f"from: {source}")
        for r in rows:
            lines.append("  ".join(v.ljust(w) if k < 2 else v.rjust(w)
                                   for k, (v, w) in enumerate(zip(r, widths, strict=True))))
        return "\n".join(lines)

    def summary_dict(self) -> dict:
        """What :meth:`summary` prints, as plain data (for JSON): row count, status and energy-scale lines, and per
        column its dtype, min, max, mean and number of NaN (None where undefined)."""

        columns = {name: {"dtype": dtype, "min": lo, "max": hi, "mean": mean, "n_nan": n_nan}
                   for name, dtype, lo, hi, mean, n_nan in self._column_stats()}
        return {"n_rows": self._n, "n_columns": len(self._data), "status": self._status_line(),
                "energy_scale": self._energy_line(), "input_name": self._provenance.get("input_name"),
                "columns": columns}

    def __repr__(self):
        cols = ", ".join(self.columns[:8]) + (", ..." if len(self._data) > 8 else "")
        return f"EventTable({self._n} rows; columns: {cols})"

    def _repr_html_(self):
        status = self._status_line()
        energy = self._energy_line()
        parts = [f"<p><b>EventTable</b>: {self._n} rows, {len(self._data)} columns"
                 + (f"<br>{html.escape(status)}" if status else "")
                 + (f"<br>{html.escape(energy)}" if energy else "") + "</p>",
                 "<table><thead><tr>"
                 + "".join(f"<th>{h}</th>" for h in ("column", "dtype", "min", "max", "mean", "NaN"))
                 + "</tr></thead><tbody>"]
        for r in self._stats():
            parts.append("<tr>" + "".join(f"<td>{html.escape(v)}</td>" for v in r) + "</tr>")
        parts.append("</tbody></table>")
        return "".join(parts)


# ---------------------------------------------------------------------- writing
def _new_text_attribute(obj, name: str, text: str) -> None:
    """Add the text attribute ``name`` (absent so far) to ``obj``, stored as ``obj.attrs[name] = text`` stores it
    (a scalar of variable-length UTF-8 text).

    Through h5py's low-level API: its ``attrs`` writes every new attribute under a temporary name and renames it,
    several times the cost, and a table gets dozens of these (the unit and description of every column, the
    provenance), which counts for files of few events.
    """
    space = h5py.h5s.create(h5py.h5s.SCALAR)
    attribute = h5py.h5a.create(obj.id, name.encode(), _TEXT_TYPE, space)
    attribute.write(np.array(text, dtype=_TEXT_DTYPE))


_TEXT_DTYPE = h5py.string_dtype()
_TEXT_TYPE = h5py.h5t.py_create(_TEXT_DTYPE, logical=True)


def _write_provenance(group: h5py.Group, provenance: Mapping) -> None:
    for key, value in provenance.items():
        if key in group.attrs:
            del group.attrs[key]
        if key in group:
            del group[key]
        if value is None:
            continue
        if isinstance(value, Path):
            value = str(value)
        if isinstance(value, str) and len(value.encode()) > _LONG_TEXT:
            group.create_dataset(key, data=value, dtype=h5py.string_dtype())
        elif isinstance(value, str):
            _new_text_attribute(group, key, value)
        elif isinstance(value, str | bytes | bool | int | float | np.generic):
            group.attrs[key] = value
        elif isinstance(value, list | tuple | np.ndarray):
            arr = np.asarray(value)
            group.attrs[key] = arr.astype(object).astype(h5py.string_dtype()) if arr.dtype.kind == "U" else arr
        else:
            raise TypeError(f"provenance value {key!r} must be a str, number or list of them "
                            f"(got {type(value).__name__}); store structures as TOML or JSON text")


def chunk_rows_for(n_rows: int | None) -> int:
    """Rows per chunk for a table of ``n_rows`` rows: the whole table up to :data:`DEFAULT_CHUNK_ROWS` rows, then
    chunks of that size; :data:`UNKNOWN_SIZE_CHUNK_ROWS` when the size is not known in advance.

    HDF5 allocates whole chunks, so a fixed 65 536-row chunk made a 3 000-row table 18 times larger than its data.

    Examples
    --------
    >>> chunk_rows_for(3000), chunk_rows_for(10**6), chunk_rows_for(0), chunk_rows_for(None)
    (3000, 65536, 1, 4096)
    """
    if n_rows is None:
        return UNKNOWN_SIZE_CHUNK_ROWS
    return max(1, min(int(n_rows), DEFAULT_CHUNK_ROWS))


class TableWriter(PartialFileWriter):
    """Write an event-table file (format version 2) by appending column batches.

    Parameters
    ----------
    path : str or Path
        Final file name; data go to a partial file of this writer, renamed to ``path`` by :meth:`close`.
    provenance : dict, optional
        Entries of the ``/provenance`` group (more can be added with :meth:`set_provenance` before closing).
    compression : str
        A name from :mod:`trackfit.io.compression` (default ``"none"``: uncompressed, like raw files; ``"lzf"``
        makes reconstructed tables about a third smaller, see ``docs/table-format.md``).
    expected_rows : int, optional
        How many rows will be appended (e.g. the events of the input file): sizes the chunks
        (:func:`chunk_rows_for`), so a small table takes little more space than its data.
    chunk_rows : int, optional
        Chunk length of every column dataset (default: from ``expected_rows``).
    exact_rows : bool
        ``expected_rows`` is exactly the number of rows that will be appended (the events of an input file): an
        uncompressed table then stores its columns contiguously, written straight to the file (no chunk index,
        no chunk cache to flush at close), and appending more rows or closing with fewer raises ValueError.
        Compressed tables are always chunked.
    descriptions : dict, optional
        ``name -> (unit, description)`` for columns not in :data:`COLUMN_DOCS`.
    overwrite : bool
        Replace an existing file (default False: refuse).

    Examples
    --------
    >>> with TableWriter("events.h5", provenance={"note": "test"}) as writer:    # doctest: +SKIP
    ...     writer.append({"energy_kev": energies, "status": status})
    """

    format_name = FORMAT_NAME
    format_version = FORMAT_VERSION

    def __init__(self, path, *, provenance=None, compression: str = DEFAULT_COMPRESSION,
                 expected_rows: int | None = None, chunk_rows: int | None = None, exact_rows: bool = False,
                 descriptions=None, overwrite: bool = False):
        from .. import __version__

        if chunk_rows is None:
            chunk_rows = chunk_rows_for(expected_rows)
        if int(chunk_rows) < 1:
            raise ValueError(f"'chunk_rows' must be >= 1 (got {chunk_rows})")
        self.compression = compression
        self._filters = dataset_filter_options(compression)
        self._chunk_rows = int(chunk_rows)
        self._descriptions = dict(descriptions or {})
        self._columns: list[str] | None = None
        self._dtypes: dict[str, np.dtype] = {}
        self._datasets: dict[str, h5py.Dataset] = {}
        self._copied: list[str] = []  # columns copied whole from another file (copy_column), after the appended ones
        self._copied_rows: dict[str, int] = {}  # and their lengths
        self._n = 0
        # datasets are created with the expected length and trimmed by close(): no resize per append
        self._allocated = max(0, int(expected_rows or 0))
        if exact_rows and expected_rows is None:
            raise ValueError("'exact_rows' needs 'expected_rows', the number of rows that will be appended")
        # contiguous columns: HDF5 needs a non-empty fixed size and no filter
        self._contiguous = bool(exact_rows) and self._allocated > 0 and not self._filters
        f = self._open(path, overwrite=overwrite)
        try:
            f.create_group("events", track_order=True)
            self._provenance = f.create_group("provenance")
            _write_provenance(self._provenance, {"trackfit_version": __version__,
                                                 "created_utc": f.attrs["created_utc"], **(provenance or {})})
        except BaseException as err:
            self.fail(err)

    def __len__(self):
        return self._n

    @property
    def columns(self) -> list[str]:
        return list(self._columns or []) + self._copied

    def _create(self, columns: dict[str, np.ndarray]) -> None:
        events = self._file["events"]
        layout = {} if self._contiguous else {"maxshape": (None,), "chunks": (self._chunk_rows,), **self._filters}
        for name, arr in columns.items():
            ds = events.create_dataset(name, shape=(self._allocated,), dtype=arr.dtype, **layout)
            self._datasets[name] = ds
            unit, text = None, None
            if name in COLUMN_DOCS:
                _, unit, text = COLUMN_DOCS[name]
            if name in self._descriptions:
                unit, text = self._descriptions[name]
            if text is not None:
                _new_text_attribute(ds, "unit", unit or "")
                _new_text_attribute(ds, "description", text)
        self._columns = list(columns)
        self._dtypes = {name: arr.dtype for name, arr in columns.items()}

    def _write_column_order(self) -> None:
        self._file["events"].attrs["column_order"] = np.array(self.columns, dtype=h5py.string_dtype())

    def append(self, columns: Mapping) -> None:
        """Append rows given as a mapping of equal-length 1-D arrays (an :class:`EventTable` works).

        The first call fixes the column names and dtypes; later calls must give the same names, and values
        are cast to the first dtypes (safely: a cast that changes values raises ValueError).
        """
        if self.closed:
            raise ValueError(f"table writer for '{self.path}' is closed")
        arrays = {name: _as_column(name, values) for name, values in columns.items()}
        lengths = {len(a) for a in arrays.values()}
        if len(lengths) > 1:
            raise ValueError(f"columns of one append must have equal lengths (got "
                             f"{ {n: len(a) for n, a in arrays.items()} })")
        if self._columns is None:
            self._create(arrays)
        elif set(arrays) != set(self._columns) or set(arrays) & set(self._copied):
            raise ValueError(f"columns {sorted(arrays)} differ from those of earlier appends {sorted(self._columns)}")
        n_new = lengths.pop() if lengths else 0
        if n_new == 0:
            return
        ready = {}  # cast and check every column before writing any, so a failed append changes nothing
        for name in self._columns:
            values = arrays[name]
            dtype = self._dtypes[name]
            if values.dtype != dtype:
                cast = values.astype(dtype)
                if not np.array_equal(cast, values, equal_nan=dtype.kind == "f" and values.dtype.kind == "f"):
                    raise ValueError(f"column '{name}': values do not fit the column dtype {dtype}")
                values = cast
            ready[name] = values
        end = self._n + n_new
        if end > self._allocated and self._contiguous:
            raise ValueError(f"'{self.path}': {end} rows appended, more than the {self._allocated} announced "
                             "(expected_rows with exact_rows=True)")
        if end > self._allocated:
            self._allocated = max(end, 2 * self._allocated)
            for ds in self._datasets.values():
                ds.resize((self._allocated,))
        memory = h5py.h5s.create_simple((n_new,))
        for name, values in ready.items():  # the low-level write: a tenth of the cost of ds[a:b] = values
            ds = self._datasets[name]
            space = ds.id.get_space()
            space.select_hyperslab((self._n,), (n_new,))
            ds.id.write(memory, space, np.ascontiguousarray(values))
        self._n = end
        self.check_writes()

    def copy_column(self, name: str, source: h5py.Dataset, *, description: tuple[str, str] | None = None) -> None:
        """Copy a whole 1-D dataset of another HDF5 file in as column ``name``, placed after the appended columns.

        HDF5 copies the stored data (``H5Ocopy``: chunks, filters and attributes as they are), without a pass
        through memory; the reconstruction copies the simulation truth of a raw file this way. The dataset must end
        up as long as the appended columns: :meth:`close` checks it.
        """
        if self.closed:
            raise ValueError(f"table writer for '{self.path}' is closed")
        if not isinstance(source, h5py.Dataset) or source.ndim != 1 or source.dtype.kind not in "biuf":
            raise ValueError(f"column '{name}' must be copied from a 1-D numeric dataset (got {source!r})")
        if name in self.columns:
            raise ValueError(f"column '{name}' already exists in '{self.path}'")
        events = self._file["events"]
        # both uncompressed and no chunk longer than the data: HDF5 copies the stored bytes
        if not self._filters and not source._filters and (source.chunks or (0,))[0] <= source.shape[0]:
            events.copy(source, name)
        else:  # through memory, with this table's layout: contiguous, or its filter and chunks
            n = source.shape[0]
            layout = {} if self._contiguous else {"maxshape": (None,), "chunks": (max(1, min(self._chunk_rows, n)),),
                                                  **self._filters}
            target = events.create_dataset(name, shape=source.shape, dtype=source.dtype, **layout)
            step = 1 << 20
            buffer = np.empty(min(n, step), source.dtype)
            for a in range(0, n, step):  # the low-level reads and writes: small columns cost little
                part = buffer[:min(step, n - a)]
                selection = source.id.get_space()
                selection.select_hyperslab((a,), (len(part),))
                memory = h5py.h5s.create_simple((len(part),))
                source.id.read(memory, selection, part)
                selection = target.id.get_space()
                selection.select_hyperslab((a,), (len(part),))
                target.id.write(memory, selection, part)
        if description is not None:
            events[name].attrs["unit"], events[name].attrs["description"] = description
        self._copied.append(name)
        self._copied_rows[name] = int(source.shape[0])
        self.check_writes()

    def set_provenance(self, **values) -> None:
        """Add or replace entries of ``/provenance`` (e.g. the input fingerprint, known only at the end)."""
        if self.closed:
            raise ValueError(f"table writer for '{self.path}' is closed")
        _write_provenance(self._provenance, values)

    def _finish(self) -> None:
        if self._contiguous and self._n != self._allocated:
            raise ValueError(f"'{self.path}': {self._n} rows appended, not the {self._allocated} announced "
                             "(expected_rows with exact_rows=True)")
        if self._allocated != self._n:  # chunked columns allocated ahead of the rows
            for ds in self._datasets.values():
                ds.resize((self._n,))
        for name in self._copied:
            if self._copied_rows[name] != self._n:
                raise ValueError(f"'{self.path}': copied column '{name}' has {self._copied_rows[name]} rows, the table "
                                 f"{self._n}")
        self._write_column_order()  # once, with the copied columns (the table is complete only when closed)
        self._file["events"].attrs["n_rows"] = self._n


def write_table(path, table, *, provenance=None, compression: str = DEFAULT_COMPRESSION,
                overwrite: bool = False, chunk_rows: int | None = None) -> Path:
    """Write an :class:`EventTable` (or any mapping of equal-length 1-D arrays) to a new table file.

    Parameters
    ----------
    path : str or Path
    table : EventTable or mapping of str to array_like
    provenance : dict, optional
        Merged over ``table.provenance`` when ``table`` is an :class:`EventTable`.
    compression : str
        Default ``"none"`` (see :class:`TableWriter`).
    overwrite : bool
    chunk_rows : int, optional
        Default: from the number of rows (:func:`chunk_rows_for`).

    Returns
    -------
    Path
    """
    merged = dict(getattr(table, "provenance", {}) or {})
    merged.update(provenance or {})
    n_rows = len(next(iter(table.values()), []))
    if chunk_rows is not None:
        chunk_rows = max(1, min(int(chunk_rows), max(n_rows, 1)))
    with TableWriter(path, provenance=merged, compression=compression, overwrite=overwrite, expected_rows=n_rows,
                     chunk_rows=chunk_rows) as writer:
        writer.append(table)  # an empty mapping gives a valid table of no columns (close writes its empty order)
    return Path(path)


# ---------------------------------------------------------------------- reading
#: what to tell a user who gives another trackfit file where an event table is expected
def _read_provenance(group: h5py.Group, checked: CheckedFile | None = None) -> dict:
    """The ``/provenance`` group as a dict: its attributes and its scalar datasets (long texts)."""
    if checked is None:
        checked = CheckedFile(group.file, group.file.filename, TableFormatError)
    out = checked.attributes(group)
    with checked.guard("/provenance"):
        names = list(group.keys())
    for key in names:  # long texts are scalar datasets (see _LONG_TEXT)
        item = checked.get(f"/provenance/{key}", object)
        if isinstance(item, h5py.Dataset):
            with checked.guard(item.name):
                if item.shape == () and (item.dtype.kind in "SObiuf" and item.dtype.names is None):
                    out[key] = plain_value(item[()])
    return out


def read_table(path, columns=None, *, start: int = 0, stop: int | None = None,
               allow_external: bool = False) -> EventTable:
    """Read an event-table file (format version 2; version-1 files are read with their columns renamed).

    Parameters
    ----------
    path : str or Path
    columns : sequence of str, optional
        Columns to read (default: all, in file order), by their current names (also for version-1 files).
    start, stop : int, optional
        Row range to read (default: all rows).
    allow_external : bool
        Read columns whose data come from other files (external links, external storage, virtual datasets with
        sources elsewhere). Default False: such a file is refused, naming the column and the other file.

    Returns
    -------
    EventTable
        With the file's ``/provenance`` as :attr:`EventTable.provenance`. Columns of a version-1 file come back
        under their version-2 names (:data:`V1_COLUMN_NAMES`) and the provenance gains
        ``read_from_format_version = 1``.

    Raises
    ------
    FileNotFoundError
    TableFormatError
        Not a regular file, not HDF5, data in other files, wrong format name or version (an integer, not a float,
        boolean or text), missing ``/events``, a column that is not a 1-D numeric dataset, columns of different
        lengths, an unreadable column order, provenance or storage; the message names the file and the dataset.
    KeyError
        An unknown column name; the message lists the available columns.
    """
    path = Path(path)
    f, attrs = open_kind(path, FORMAT_NAME, what="event table", error=TableFormatError, versions=READABLE_VERSIONS,
                         allow_external=allow_external)
    with f:
        checked = CheckedFile(f, path, TableFormatError, allow_external=allow_external)
        version = attrs["format_version"]
        rename = V1_COLUMN_NAMES if version == 1 else {}
        events = checked.group("/events")
        order = checked.attributes(events).get("column_order")
        with checked.guard("/events"):
            names = list(events)
        if order is None:
            order = names
        elif not isinstance(order, list) or not all(isinstance(n, str) for n in order):
            checked.fail(f"attribute 'column_order' must be a list of column names (got {order!r:.80})", "/events")
        names_in_file = [n for n in order if n in names] + [n for n in names if n not in order]
        n_rows = None
        datasets = {}
        for name in names_in_file:
            where = f"/events/{name}"
            ds = checked.dataset(where, kinds="biuf", ndim=1)
            datasets[name] = ds
            if n_rows is None:
                n_rows, first = ds.shape[0], name
            elif ds.shape[0] != n_rows:
                raise TableFormatError(path, f"has {ds.shape[0]} rows but /events/{first} has {n_rows}",
                                       dataset=where)
        declared = checked.attributes(events).get("n_rows")
        if declared is not None and (isinstance(declared, bool) or not isinstance(declared, int)
                                     or declared != (n_rows or 0)):
            checked.fail(f"attribute 'n_rows' must be the integer number of rows of the columns, {n_rows or 0} "
                         f"(got {declared!r:.60})", "/events")
        in_file = {rename.get(name, name): name for name in names_in_file}  # current name -> dataset name
        if columns is None:
            wanted = list(in_file)
        else:
            wanted = [columns] if isinstance(columns, str) else list(columns)
            unknown = [c for c in wanted if c not in in_file]
            if unknown:
                raise KeyError(f"'{path}' has no column(s) {unknown}; available: {list(in_file)}")
        n_rows = n_rows or 0
        a, b, _ = slice(start, stop).indices(n_rows)
        b = max(a, b)
        data = {name: checked.read(datasets[in_file[name]], np.s_[a:b]) for name in wanted}
        group = checked.group("/provenance", required=False)
        provenance = _read_provenance(group, checked) if group is not None else {}
        if version != FORMAT_VERSION:
            provenance["read_from_format_version"] = version
    return EventTable(data, provenance)
