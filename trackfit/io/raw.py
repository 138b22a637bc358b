"""Raw event files, format version 1 (specification: ``docs/raw-format.md``).

:class:`RawEventWriter` appends :class:`~trackfit.events.EventBatch` objects to a new file, written under a
temporary name and renamed when closed, so an interrupted run never leaves a file that looks complete.
:func:`open_raw` returns a :class:`RawEventReader` that streams batches with memory bounded by the batch size.
"""

from __future__ import annotations

import queue
import threading
from pathlib import Path

import h5py
import numpy as np

from ..events import Event, EventBatch, find_bad_events
from ..hexgrid import HexGrid
from ._partial import PartialFileWriter, append_rows
from .compression import DEFAULT_COMPRESSION, dataset_filter_options
from .errors import FileFormatError
from .kinds import open_kind
from .mapped import MappedRanges
from .structure import CheckedFile, flag_attribute, grid_from_attributes, text_attribute

__all__ = ["RawEventWriter", "RawEventReader", "RawFormatError", "open_raw", "FORMAT_NAME", "FORMAT_VERSION",
           "TRIGGER_MODES"]

FORMAT_NAME = "raw-events"
FORMAT_VERSION = 1

#: dataset name -> (dtype, trailing shape) of the ``/events`` group
EVENT_DATASETS = {
    "roi": (np.dtype(np.int32), (4,)),
    "start": (np.dtype(np.int64), ()),
    "signal": (np.dtype(np.int16), ()),
    "time_s": (np.dtype(np.float64), ()),
    "trigger_id": (np.dtype(np.int64), ()),
}
GEOMETRY_ATTRIBUTES = ("pitch_mm", "n_columns", "n_rows", "shifted_rows")
#: values of the optional ``/events`` attribute ``trigger_mode``: ``"self"`` (default when absent) - the chip
#: triggered on its own signal (source or beam runs); ``"random"`` - random or periodic triggers without a source
#: (pedestal runs: every pixel of every event is a noise sample)
TRIGGER_MODES = ("self", "random")
DEFAULT_BATCH_SIZE = 65_536


class RawFormatError(FileFormatError):
    """A raw event file that does not follow the format; names the file, the dataset and the first bad event."""


def _attr_value(value):
    """Convert a run-info value to something HDF5 can store as an attribute."""
    if isinstance(value, str | bytes | bool | int | float | np.generic):
        return value
    if isinstance(value, list | tuple | np.ndarray):
        arr = np.asarray(value)
        if arr.ndim == 1 and arr.dtype.kind in "biuf":
            return arr
        if arr.ndim == 1 and arr.dtype.kind == "U":  # variable-length UTF-8 strings
            return arr.astype(object).astype(h5py.string_dtype())
    raise TypeError(
        f"run information values must be str, numbers or 1-D arrays of them (got {type(value).__name__}); "
        "store structured information as TOML or JSON text"
    )


class RawEventWriter(PartialFileWriter):
    """Write a raw event file (format version 1) batch by batch.

    Parameters
    ----------
    path : str or Path
        Final file name. Data go to a partial file of this writer, renamed to ``path`` by :meth:`close`.
    grid : HexGrid
        The chip geometry; every appended batch must use it.
    compression : str
        ``"none"`` (default, see ``docs/raw-format.md`` for the measurement behind it), ``"lzf"``, ``"gzip"``,
        or, when the optional ``hdf5plugin`` package is installed, ``"blosc-lz4"`` or ``"zstd"``.
    run_info : dict, optional
        Attributes of the ``/run`` group (source, gas, pressure, voltages, free text, ...).
    created_by : str, optional
        Defaults to ``"trackfit <version>"``.
    created_utc : str, optional
        Value of the ``created_utc`` attribute (ISO 8601, ``YYYY-MM-DDThh:mm:ssZ``); defaults to the current time.
        Pass a fixed value to make reruns bit-identical (the simulator does for seeded runs).
    chunk_events, chunk_pixels : int
        Chunk lengths of the per-event and the signal datasets.
    overwrite : bool
        Replace an existing file (default False: refuse).
    pedestal_subtracted : bool, optional
        Whether ``signal`` holds pedestal-subtracted pulse heights (the ``/events`` attribute of the same name).
        Default: taken from the first appended batch (``EventBatch.pedestal_subtracted``); every batch must agree.
    trigger_mode : {"self", "random"}
        ``"random"`` marks a pedestal run (random triggers, no source); see :data:`TRIGGER_MODES`.

    The two ``/events`` attributes are written only when they differ from the defaults (pedestal-subtracted,
    self-triggered), so files of ordinary runs look exactly as before the attributes existed.

    Examples
    --------
    >>> with RawEventWriter("run.h5", HexGrid()) as writer:   # doctest: +SKIP
    ...     writer.append(batch)
    """

    format_name = FORMAT_NAME
    format_version = FORMAT_VERSION

    def __init__(self, path, grid: HexGrid, *, compression: str = DEFAULT_COMPRESSION, run_info=None,
                 created_by=None, created_utc=None, chunk_events: int = 16_384, chunk_pixels: int = 262_144,
                 overwrite=False, pedestal_subtracted: bool | None = None, trigger_mode: str = "self"):
        if not isinstance(grid, HexGrid):
            raise TypeError(f"'grid' must be a HexGrid (got {type(grid).__name__})")
        if trigger_mode not in TRIGGER_MODES:
            raise ValueError(f"'trigger_mode' must be one of {TRIGGER_MODES} (got {trigger_mode!r})")
        if pedestal_subtracted is not None and not isinstance(pedestal_subtracted, bool | np.bool_):
            raise ValueError(f"'pedestal_subtracted' must be True, False or None (got {pedestal_subtracted!r})")
        self._filters = dataset_filter_options(compression)
        f = self._open(path, overwrite=overwrite, created_by=created_by, created_utc=created_utc)
        self.grid = grid
        self.compression = compression
        self._n_events = 0
        self._n_signal = 0
        self._truth_keys = None
        try:
            geometry = f.create_group("geometry")
            for key, value in grid.to_dict().items():
                geometry.attrs[key] = value
            run = f.create_group("run")
            for key, value in (run_info or {}).items():
                run.attrs[key] = _attr_value(value)
            events = f.create_group("events")
            self._chunk_events = int(chunk_events)
            for name, (dtype, tail) in EVENT_DATASETS.items():
                chunk = chunk_pixels if name == "signal" else chunk_events
                events.create_dataset(name, shape=(0, *tail), maxshape=(None, *tail), dtype=dtype,
                                      chunks=(chunk, *tail), **self._filters)
            events["start"].resize((1,))
            events["start"][0] = 0
            if trigger_mode != "self":
                events.attrs["trigger_mode"] = trigger_mode
            self.trigger_mode = trigger_mode
            self.pedestal_subtracted = None
            if pedestal_subtracted is not None:
                self._set_pedestal_subtracted(bool(pedestal_subtracted))
        except BaseException as err:
            self.fail(err)

    def __len__(self):
        return self._n_events

    def _set_pedestal_subtracted(self, value: bool) -> None:
        self.pedestal_subtracted = value
        if not value:
            self._file["events"].attrs["pedestal_subtracted"] = False

    def append(self, batch: EventBatch) -> None:
        """Append the events of a batch (its truth columns go to ``/truth``)."""
        if self.closed:
            raise ValueError(f"writer for '{self.path}' is closed")
        if batch.grid != self.grid:
            raise ValueError(f"batch geometry {batch.grid} differs from the file's {self.grid}")
        if self.pedestal_subtracted is None:
            self._set_pedestal_subtracted(batch.pedestal_subtracted)
        elif batch.pedestal_subtracted != self.pedestal_subtracted:
            state = {True: "pedestal-subtracted", False: "raw (pedestal_subtracted=False)"}
            raise ValueError(f"'{self.path}': the file holds {state[self.pedestal_subtracted]} signal but the batch "
                             f"is {state[batch.pedestal_subtracted]}; build the batch with "
                             f"pedestal_subtracted={self.pedestal_subtracted}")
        keys = sorted(batch.truth)
        if self._truth_keys is None and (len(batch) or keys):  # an empty batch with truth fixes its columns too
            self._truth_keys = keys
            if keys:
                truth = self._file.create_group("truth")
                for key in keys:
                    values = np.asarray(batch.truth[key])
                    truth.create_dataset(key, shape=(0,), maxshape=(None,), dtype=values.dtype,
                                         chunks=(self._chunk_events,), **self._filters)
        elif len(batch) and keys != self._truth_keys:
            raise ValueError(f"truth columns {keys} differ from those of earlier batches {self._truth_keys}")
        if not len(batch):
            return
        batch = batch.compact()
        events = self._file["events"]
        append_rows(events["roi"], batch.roi)
        append_rows(events["start"], batch.start[1:] + self._n_signal)
        append_rows(events["signal"], batch.signal)
        append_rows(events["time_s"], batch.time_s)
        append_rows(events["trigger_id"], batch.trigger_id)
        for key in keys:
            append_rows(self._file["truth"][key], batch.truth[key])
        self._n_events += len(batch)
        self._n_signal += len(batch.signal)
        self.check_writes()

    def add_array(self, name: str, values, **attrs) -> None:
        """Store an extra dataset outside the groups the format defines (e.g. ``simulation/pixel_gain``).

        Readers of format v1 ignore it; ``name`` must not lie in ``/events``, ``/geometry``, ``/run`` or ``/truth``.
        """
        if self.closed:
            raise ValueError(f"writer for '{self.path}' is closed")
        top = name.strip("/").split("/")[0]
        if top in ("events", "geometry", "run", "truth"):
            raise ValueError(f"extra arrays cannot go into the format's group '/{top}' (got {name!r})")
        dataset = self._file.create_dataset(name.strip("/"), data=np.asarray(values), **self._filters)
        for key, value in attrs.items():
            dataset.attrs[key] = _attr_value(value)

    def set_run_info(self, **values) -> None:
        """Add or replace attributes of ``/run`` (e.g. counters known only at the end)."""
        for key, value in values.items():
            self._file["run"].attrs[key] = _attr_value(value)


def write_raw(path, batch: EventBatch, **options) -> Path:
    """Write one batch to a new raw event file (see :class:`RawEventWriter` for the options)."""
    with RawEventWriter(path, batch.grid, **options) as writer:
        writer.append(batch)
    return Path(path)


class RawEventReader:
    """Streaming reader of a raw event file; use :func:`open_raw`.

    Attributes
    ----------
    path : Path
    grid : HexGrid
    run_info : dict
        Attributes of ``/run``.
    header : dict
        Root attributes (format, version, creator, creation time).
    truth_names : list of str
        Datasets of ``/truth`` (empty for measured data).
    pedestal_subtracted : bool
        ``/events`` attribute; True when absent (files written before it existed).
    trigger_mode : str
        ``/events`` attribute, one of :data:`TRIGGER_MODES`; ``"self"`` when absent.
    bad_events : list of (int, str)
        With ``strict=False``: malformed events met so far (index, reason), in file order; they are delivered as
        empty placeholder events with ``batch.bad`` set, so downstream tables keep one row per input event.
    """

    def __init__(self, path, *, strict: bool = True, allow_external: bool = False):
        self.path = Path(path)
        self.strict = strict
        self.bad_events: list[tuple[int, str]] = []
        self._reported: set[int] = set()
        self._file = None
        self._mapped: MappedRanges | None = None  # made at the first mapped read
        self._file, attrs = open_kind(self.path, FORMAT_NAME, what="raw event file", error=RawFormatError,
                                      versions=(FORMAT_VERSION,), allow_external=allow_external)
        self._checked = CheckedFile(self._file, self.path, RawFormatError, allow_external=allow_external)
        try:
            self._check_header(attrs)
        except Exception:
            self._file.close()
            raise

    # ------------------------------------------------------------------ header checks
    def _error(self, message, dataset=None, event=None):
        return RawFormatError(self.path, message, dataset=dataset, event=event)

    def _check_header(self, attrs: dict):
        checked = self._checked
        for key in ("created_by", "created_utc"):
            if key not in attrs:
                raise self._error(f"missing root attribute '{key}'", dataset="/")
            text_attribute(attrs, key, checked.failer("/"))
        self.header = attrs
        checked.group("/geometry")
        self.grid = grid_from_attributes(checked.attributes("/geometry"), checked.failer("/geometry"))
        checked.group("/events")
        datasets = {}
        for name, (dtype, tail) in EVENT_DATASETS.items():
            datasets[name] = checked.dataset(f"/events/{name}", dtype=dtype, shape=(None, *tail))
        events_attrs = checked.attributes("/events")
        fail = checked.failer("/events")
        self.pedestal_subtracted = flag_attribute(events_attrs, "pedestal_subtracted", fail, default=True)
        self.trigger_mode = text_attribute(events_attrs, "trigger_mode", fail, required=False, default="self")
        if self.trigger_mode not in TRIGGER_MODES:
            raise self._error(f"attribute 'trigger_mode' must be one of {TRIGGER_MODES}, found {self.trigger_mode!r}",
                              dataset="/events")
        self._roi = datasets["roi"]
        self._start = datasets["start"]
        self._signal = datasets["signal"]
        self._time = datasets["time_s"]
        self._trigger = datasets["trigger_id"]
        n = self._roi.shape[0]
        self._n = n
        self._n_signal = self._signal.shape[0]
        if self._start.shape[0] != n + 1:
            raise self._error(f"expected N + 1 = {n + 1} entries for {n} events (from /events/roi), "
                              f"found {self._start.shape[0]}", dataset="/events/start",
                              event=min(n, self._start.shape[0]) - 1 if n else None)
        first, last = (int(v) for v in checked.read(self._start, [0, n])) if n else \
            (int(checked.read(self._start, 0)),) * 2
        if first != 0:
            raise self._error(f"start[0] must be 0, found {first}", dataset="/events/start", event=0)
        self.file_problems: list[str] = []
        if last != self._n_signal:
            message = (f"start[N] = {last} differs from the length of /events/signal ({self._n_signal})")
            if self.strict:
                raise self._error(message, dataset="/events/start", event=n - 1 if n else None)
            self.file_problems.append(message)
        for name, ds in (("time_s", self._time), ("trigger_id", self._trigger)):
            if ds.shape[0] != n:
                message = f"expected {n} entries (one per event of /events/roi), found {ds.shape[0]}"
                if self.strict:
                    raise self._error(message, dataset=f"/events/{name}", event=min(n, ds.shape[0]))
                self.file_problems.append(f"/events/{name}: {message}")
        truth = checked.group("/truth", required=False)
        with checked.guard("/truth"):
            self.truth_names = sorted(truth.keys()) if truth is not None else []
        self._truth = {}
        for name in self.truth_names:
            where = f"/truth/{name}"
            ds = checked.dataset(where, kinds="biuf", ndim=1)
            if ds.shape[0] != n:
                raise self._error(f"expected a 1-D dataset of {n} entries (one per event), found shape {ds.shape}",
                                  dataset=where)
            self._truth[name] = ds
        self.run_info = checked.attributes("/run") if checked.group("/run", required=False) is not None else {}

    # ------------------------------------------------------------------ basic access
    def __len__(self):
        return self._n

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False

    def close(self):
        if getattr(self, "_mapped", None) is not None:
            self._mapped.close()
            self._mapped = None
        if getattr(self, "_file", None) is not None:
            self._file.close()
            self._file = None

    def _mapped_range(self, start: int, stop: int) -> np.ndarray | None:
        """Signal values ``start:stop`` viewed through a memory map, or None when they must be read (see
        :class:`~trackfit.io.mapped.MappedRanges`)."""
        if self._mapped is None:
            with self._checked.guard(self._signal.name):
                self._mapped = MappedRanges(self.path, self._signal, np.int16)
        return self._mapped.view(start, stop)

    @property
    def n_pixels_total(self) -> int:
        """Length of the signal array (all ROI pixels of all events)."""
        return self._n_signal

    @property
    def compression(self) -> str:
        """Filter of the signal dataset as HDF5 reports it (``None`` when uncompressed)."""
        return self._signal.compression or (next(iter(self._signal._filters), None))

    def __repr__(self):
        extra = "" if self.pedestal_subtracted else ", not pedestal-subtracted"
        extra += "" if self.trigger_mode == "self" else f", trigger_mode={self.trigger_mode!r}"
        return (f"RawEventReader('{self.path}', {self._n} events, {self._n_signal} pixels, "
                f"grid={self.grid}, truth={self.truth_names or None}{extra})")

    # ------------------------------------------------------------------ reading
    def _read_1d(self, ds, a, b, fill):
        """ds[a:b], padded with ``fill`` where the dataset is shorter than the event count (non-strict)."""
        m = ds.shape[0]
        out = np.full(b - a, fill, dtype=ds.dtype)
        if a < m:
            out[: min(b, m) - a] = self._checked.read(ds, np.s_[a:min(b, m)])
        return out

    def read_batch(self, a: int, b: int, *, with_truth: bool = True, buffer=None, mapped: bool = False) -> EventBatch:
        """Events ``a`` to ``b - 1`` as one :class:`EventBatch` (validated as described in the class docs).

        ``buffer``: a callable ``buffer(n_pixels)`` returning an int16 array of at least ``n_pixels`` values to read
        the signal into (streaming callers reuse a few buffers instead of new memory for every batch); the batch's
        signal is then a view of it, valid until the caller reuses the buffer. Batches with malformed events are
        read into new memory.

        ``mapped``: when the signal is stored uncompressed, the batch's signal views the file's bytes through a
        private memory map instead of a copy (:mod:`trackfit.io.mapped`; ``buffer`` is then not called), or, when
        its chunks do not follow each other in the file, is copied run by run into the buffer. The view is
        writable, its writes never reach the file, and it stays valid as long as the batch lives.
        """
        if not 0 <= a <= b <= self._n:
            raise IndexError(f"event range {a}:{b} outside 0:{self._n} of '{self.path}'")
        roi = self._checked.read(self._roi, np.s_[a:b])
        start = self._checked.read(self._start, np.s_[a:b + 1])
        time_s = self._read_1d(self._time, a, b, np.nan)
        trigger_id = self._read_1d(self._trigger, a, b, -1)
        indices, reasons = find_bad_events(roi, start, self._n_signal, self.grid, first_index=a)
        bad = np.zeros(b - a, dtype=bool)
        bad[indices - a] = True
        extra = []
        for name, ds in (("time_s", self._time), ("trigger_id", self._trigger)):
            if ds.shape[0] < b:
                missing = np.arange(max(a, ds.shape[0]), b)
                extra.extend((int(i), f"'{name}': no entry for this event") for i in missing)
        if extra:
            bad[np.array([i for i, _ in extra]) - a] = True
        problems = sorted(list(zip(indices.tolist(), reasons, strict=True)) + extra)
        if problems:
            if self.strict:
                i, reason = problems[0]
                dataset, _, message = reason.partition(": ")
                raise self._error(message + (f" ({len(problems) - 1} more bad events in this batch)"
                                             if len(problems) > 1 else ""),
                                  dataset=f"/events/{dataset.strip(chr(39))}", event=i)
            for i, reason in problems:
                if i not in self._reported:
                    self._reported.add(i)
                    self.bad_events.append((i, reason))
            # placeholders: empty ROI, no pixels, flagged as bad
            roi = roi.copy()
            roi[bad] = 0
        if not bad.any():
            s0 = int(start[0])
            n_pix = int(start[-1]) - s0
            signal = self._mapped_range(s0, s0 + n_pix) if mapped and n_pix > 0 else None
            memory = buffer(n_pix) if buffer is not None and n_pix > 0 and signal is None else None
            if memory is not None and (not isinstance(memory, np.ndarray) or memory.dtype != np.int16
                                       or memory.ndim != 1 or memory.size < n_pix
                                       or not memory.flags.c_contiguous or not memory.flags.writeable):
                raise ValueError(f"'buffer' gave {_describe_array(memory)}; expected a writable, contiguous int16 "
                                 f"array of at least {n_pix} values")
            if signal is None and mapped and n_pix > 0:  # not one run of bytes: copy the runs (one copy, not two)
                memory = np.empty(n_pix, np.int16) if memory is None else memory
                if self._mapped.read_into(s0, s0 + n_pix, memory[:n_pix]):
                    signal = memory[:n_pix]
            if signal is None and memory is not None:
                signal = memory[:n_pix]
                with self._checked.guard(self._signal.name):
                    space = self._signal.id.get_space()
                    space.select_hyperslab((s0,), (n_pix,))
                    self._signal.id.read(h5py.h5s.create_simple((n_pix,)), space, signal)
            elif signal is None:
                signal = self._checked.read(self._signal, np.s_[s0:int(start[-1])])
            new_start = start - s0
        else:
            # gather only the good events' pixel ranges
            lo = np.where(bad, 0, start[:-1])
            n_pix = np.where(bad, 0, start[1:] - start[:-1])
            if (~bad).any():
                s0, s1 = int(lo[~bad].min()), int((lo + n_pix)[~bad].max())
                block = self._checked.read(self._signal, np.s_[s0:s1])
            else:
                s0, block = 0, np.zeros(0, np.int16)
            new_start = np.concatenate([[0], np.cumsum(n_pix)]).astype(np.int64)
            owner = np.repeat(np.arange(len(n_pix)), n_pix)
            offsets = np.arange(new_start[-1], dtype=np.int64) - new_start[:-1][owner]
            signal = block[lo[owner] + offsets - s0]
        truth = {}
        if with_truth:
            truth = {name: self._checked.read(self._truth[name], np.s_[a:b]) for name in self.truth_names}
        return EventBatch(roi=roi, start=new_start, signal=signal, time_s=time_s, trigger_id=trigger_id,
                          grid=self.grid, index=np.arange(a, b, dtype=np.int64), bad=bad, truth=truth,
                          validate=False, pedestal_subtracted=self.pedestal_subtracted)

    def iter_batches(self, batch_size: int = DEFAULT_BATCH_SIZE, *, start: int = 0, stop: int | None = None,
                     with_truth: bool = True, prefetch: bool = False):
        """Yield consecutive :class:`EventBatch` objects of at most ``batch_size`` events.

        Parameters
        ----------
        batch_size : int
        start, stop : int
            Event range to read (default: the whole file).
        with_truth : bool
            Attach the ``/truth`` columns of simulated files.
        prefetch : bool
            Read (and decompress) the next batch in a background thread while the caller works on the current
            one. Worth it when the caller's work releases the GIL (numba ``nogil`` kernels).
        """
        if batch_size < 1:
            raise ValueError(f"'batch_size' must be >= 1 (got {batch_size})")
        stop = self._n if stop is None else min(int(stop), self._n)
        bounds = [(a, min(a + batch_size, stop)) for a in range(int(start), stop, batch_size)]
        if not prefetch:
            for a, b in bounds:
                yield self.read_batch(a, b, with_truth=with_truth)
            return
        yield from _prefetched(lambda ab: self.read_batch(*ab, with_truth=with_truth), bounds)

    def __iter__(self):
        """Iterate over single events (slow; for a first look). Use :meth:`iter_batches` for processing."""
        for batch in self.iter_batches(4096):
            yield from batch

    def __getitem__(self, i: int) -> Event:
        """One event with its pixel values, columns, rows, x_mm and y_mm."""
        i = int(i)
        if not -self._n <= i < self._n:
            raise IndexError(f"event {i} out of range: '{self.path}' holds {self._n} events")
        i %= self._n
        strict, self.strict = self.strict, True
        try:
            return self.read_batch(i, i + 1).event(0)
        finally:
            self.strict = strict

    def read_all(self, *, with_truth: bool = True) -> EventBatch:
        """The whole file as one batch (memory grows with the file: for small files and tests)."""
        return self.read_batch(0, self._n, with_truth=with_truth)

    def read_truth(self, names=None, start: int = 0, stop: int | None = None) -> dict:
        """Truth columns of a simulated file as a dict of arrays."""
        names = self.truth_names if names is None else list(names)
        missing = sorted(set(names) - set(self.truth_names))
        if missing:
            raise KeyError(f"'{self.path}' has no truth columns {missing}; it has {self.truth_names}")
        return {name: self._checked.read(self._truth[name], np.s_[start:stop]) for name in names}

    def truth_dataset(self, name: str) -> h5py.Dataset:
        """The HDF5 dataset ``/truth/<name>`` itself (for copies made by HDF5 without reading it, e.g.
        :meth:`trackfit.io.table.TableWriter.copy_column`); valid while the reader is open."""
        if name not in self.truth_names:
            raise KeyError(f"'{self.path}' has no truth column {name!r}; it has {self.truth_names}")
        return self._truth[name]

    def validate(self, batch_size: int = DEFAULT_BATCH_SIZE) -> list[tuple[int, str]]:
        """Scan the whole file; return every malformed event as (index, reason) (never raises for events)."""
        strict, self.strict = self.strict, False
        try:
            for _ in self.iter_batches(batch_size, with_truth=False):
                pass
        finally:
            self.strict = strict
        return list(self.bad_events)


def _describe_array(value) -> str:
    if isinstance(value, np.ndarray):
        layout = "" if value.flags.c_contiguous else "non-contiguous "
        return f"a {'' if value.flags.writeable else 'read-only '}{layout}array of {value.dtype} {value.shape}"
    return f"a {type(value).__name__}"


def _prefetched(read, items, depth: int = 2):
    """Yield ``read(item)`` for each item, reading ahead in one background thread."""
    results: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    sentinel = object()

    def worker():
        try:
            for item in items:
                if stop.is_set():
                    return
                results.put((read(item), None))
        except BaseException as err:  # noqa: BLE001 - re-raised in the consumer
            results.put((None, err))
            return
        results.put((sentinel, None))

    thread = threading.Thread(target=worker, name="trackfit-prefetch", daemon=True)
    thread.start()
    try:
        while True:
            value, err = results.get()
            if err is not None:
                raise err
            if value is sentinel:
                break
            yield value
    finally:
        stop.set()
        # unblock a worker waiting to put a batch (the consumer stopped early), without waiting on an empty queue
        # for a worker that has already put its last item and is ending
        while thread.is_alive():
            try:
                results.get_nowait()
            except queue.Empty:
                thread.join(0.001)
        thread.join()


def open_raw(path, *, strict: bool = True, allow_external: bool = False) -> RawEventReader:
    """Open a raw event file for streaming.

    Parameters
    ----------
    path : str or Path
    strict : bool
        True (default): the first malformed event raises :class:`RawFormatError`. False: malformed events
        are reported in ``reader.bad_events`` and delivered as flagged empty placeholders.
    allow_external : bool
        Read objects whose data come from other files (external links, external storage, virtual datasets with
        sources elsewhere). Default False: such a file is refused, naming the object and the other file.

    Raises
    ------
    FileNotFoundError
        No such file.
    RawFormatError
        Not a regular file, not HDF5, data in other files; missing group, dataset or attribute; an attribute of the
        wrong type (a number stored as text, a boolean or float ``format_version``); absurd geometry; unknown format
        version; wrong dtype or shape; inconsistent lengths; storage that cannot be read.
    """
    return RawEventReader(path, strict=strict, allow_external=allow_external)
