"""Public entry points of the reconstruction: :func:`reconstruct` (a batch in memory) and :func:`reconstruct_file`
(a raw event file to an event-table file, streaming).

What to use when: :func:`reconstruct` in a notebook or on a batch you built yourself (``EventBatch``);
:func:`reconstruct_file` (or ``trackfit reconstruct``) for files of any size: it reads the next batch and writes
the previous results in background threads while the kernel (numba, ``nogil``) works on the current batch, and its
memory is bounded by the batch size, not the file size.
"""

from __future__ import annotations

import collections
import os
import queue
import threading
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from ..events import EventBatch
from ..hexgrid import HexGrid
from ..io._partial import now_utc
from ..io.compression import DEFAULT_COMPRESSION
from ..io.energy_label import SCALE_KEY, SOURCE_KEY
from ..io.fingerprint import RawFingerprint as _Fingerprint
from ..io.fingerprint import content_fingerprint as _content_fingerprint
from ..io.pixelmap import read_pixel_map
from ..io.table import EventTable, TableWriter
from ._kernels import FLOAT_COLUMNS, INT_COLUMNS, reconstruct_range, subtract_pedestals
from .config import ReconConfig
from .estimators import EstimatorRunner
from .identity import SETTINGS_HASH_KEY, settings_hash

__all__ = ["reconstruct", "reconstruct_file", "content_fingerprint", "TABLE_COLUMNS", "TRUTH_PREFIX",
           "DEFAULT_BATCH_SIZE", "output_name"]

DEFAULT_BATCH_SIZE = 32_768

#: columns of the event table written by the reconstruction, in order, with their dtypes
TABLE_COLUMNS: dict[str, np.dtype] = {
    "event_index": np.dtype(np.int64),
    "trigger_id": np.dtype(np.int64),
    "time_s": np.dtype(np.float64),
    "status": np.dtype(np.uint16),
    "n_pixels": np.dtype(np.int32),
    # int32, not int16: an event has at most as many clusters as ROI pixels, at most 2**30 on the largest chip
    # (hexgrid.MAX_CHIP_SIDE), so int32 cannot wrap; int16 wrapped above 32767 isolated hits
    "n_clusters": np.dtype(np.int32),
    "pulse_height": np.dtype(np.float32),
    "energy_kev": np.dtype(np.float32),
    "centroid_x_mm": np.dtype(np.float32),
    "centroid_y_mm": np.dtype(np.float32),
    "conv_x_mm": np.dtype(np.float32),
    "conv_y_mm": np.dtype(np.float32),
    "axis_rad": np.dtype(np.float32),
    "emission_rad": np.dtype(np.float32),
    "m2_major_mm2": np.dtype(np.float32),
    "m2_minor_mm2": np.dtype(np.float32),
    "m3_major_mm3": np.dtype(np.float32),
    "peak_adc": np.dtype(np.int16),
    "n_conv_pixels": np.dtype(np.int32),
}


def _as_config(config) -> ReconConfig:
    if config is None:
        return ReconConfig()
    if isinstance(config, ReconConfig):
        return config
    if isinstance(config, str | os.PathLike):
        return ReconConfig.read_toml(config)
    if isinstance(config, dict):
        return ReconConfig.from_dict(config)
    raise TypeError(f"'config' must be a ReconConfig, a dict or the path of a TOML file (got {type(config).__name__})")


class _Prepared:
    """Kernel arguments derived once from a config, a chip, the energy scale of the run and the config's pixel map."""

    def __init__(self, config: ReconConfig, grid: HexGrid, counts_per_kev: float | None = None, *,
                 data: str = "the batch"):
        self.config = config
        self.grid = grid
        self.data = data
        self.counts_per_kev = float(config.energy_scale()[0] if counts_per_kev is None else counts_per_kev)
        self.mask = config.bad_pixel_map(grid)
        self.thresholds = np.zeros(0, np.int32)
        self.pedestal = None
        self.pixel_map = None
        if config.pixel_map:
            self.pixel_map = read_pixel_map(config.pixel_map)
            self.pixel_map.check_grid(grid, data)
            masked = self.pixel_map.masked.ravel().astype(np.uint8)
            self.mask = masked if not self.mask.size else np.maximum(self.mask, masked)
            self.pedestal = np.ascontiguousarray(self.pixel_map.pedestal_for_subtraction().ravel())
            if config.threshold_noise_rms > 0:
                thresholds = np.floor(config.threshold_noise_rms * self.pixel_map.noise_for_threshold().ravel())
                self.thresholds = np.clip(thresholds, -1, 32767).astype(np.int32)
        parity = 1 if grid.shifted_rows == "odd" else 0
        unshifted_row = 1 - parity  # a row that is not shifted: its column 0 sits at x = -x0
        x_first, _ = grid.pixel_centre_mm(0, unshifted_row)
        _, y_first = grid.pixel_centre_mm(0, 0)
        self.args = (
            self.mask, self.thresholds, grid.n_columns, grid.pitch_mm, grid.row_pitch_mm, -float(x_first),
            -float(y_first), parity, int(np.floor(config.threshold_adc)), config.min_pixels,
            config.start_search_inner_rms, config.start_search_outer_rms,
            config.second_pass_length_mm, config.second_pass_centre == "conversion_point", self.counts_per_kev,
            config.saturation_adc,
        )
        self.estimates = EstimatorRunner(config.emission_estimator, grid)

    def check_pedestals(self, pedestal_subtracted: bool) -> None:
        """Refuse signal before pedestal subtraction when there is no pixel map to subtract with."""
        if not pedestal_subtracted and self.pedestal is None:
            raise ValueError(f"{self.data} holds raw ADC values (pedestal_subtracted = false): give a pixel map "
                             "with the pedestals (ReconConfig.pixel_map, or --pixel-map on the command line), "
                             "measured with `trackfit pixel-map`")

    def provenance(self) -> dict:
        """Entries naming the pixel map, for the event table."""
        if self.pixel_map is None:
            return {}
        return {"pixel_map_name": Path(self.config.pixel_map).name,
                "pixel_map_path": str(Path(self.config.pixel_map).resolve()),
                "pixel_map_fingerprint": self.pixel_map.fingerprint}

    def _piece(self, lo, hi, roi, start, signal, bad, subtracted, main_mask, out_f, out_i):
        if subtracted is not None:  # pixels of different events are disjoint: subtract and reconstruct piece by piece
            subtract_pedestals(lo, hi, roi, start, signal, bad, self.pedestal, self.grid.n_columns, self.grid.n_rows,
                               subtracted)
            signal = subtracted
        reconstruct_range(lo, hi, roi, start, signal, bad, *self.args, main_mask, out_f, out_i)

    @staticmethod
    def _split(kernel, n, common, threads, pool):
        """Run ``kernel(lo, hi, *common)`` over events ``0 <= i < n``, in ``4 * threads`` pieces on the pool."""
        if threads <= 1 or n < 2 * threads or pool is None:
            kernel(0, n, *common)
            return []
        edges = np.linspace(0, n, 4 * threads + 1).astype(np.int64)  # small pieces balance the load
        return [pool.submit(kernel, int(a), int(b), *common) for a, b in zip(edges[:-1], edges[1:], strict=True)]

    def submit(self, batch: EventBatch, threads: int = 1, pool: ThreadPoolExecutor | None = None, *,
               estimates: dict | None = None):
        """Start the kernel on a batch; returns a callable that waits and gives the outputs (float64 (N, 11),
        int64 (N, 5)). With a pool the batch is cut into ``4 * threads`` pieces queued on it, so the threads go on
        with the next batch while the last pieces of this one finish (no idle thread at batch ends).

        ``estimates``, when given, receives the columns of the config's emission estimator
        (:mod:`trackfit.recon.estimators`; none for ``"two-stage"``) when the callable is called: the estimator
        starts from the main-cluster pixels the two-stage kernel marks, once all its pieces are done.
        """
        n = len(batch)
        self.check_pedestals(batch.pedestal_subtracted)
        subtracted = None if batch.pedestal_subtracted else batch.signal.copy()
        out_f = np.empty((n, len(FLOAT_COLUMNS)), np.float64)
        out_i = np.empty((n, len(INT_COLUMNS)), np.int64)
        with_estimates = estimates is not None and self.estimates.needs_main_mask
        main_mask = np.zeros(batch.signal.size if with_estimates else 0, np.uint8)
        common = (batch.roi, batch.start, batch.signal, batch.bad, subtracted, main_mask, out_f, out_i)
        futures = self._split(self._piece, n, common, threads, pool)

        def result():
            for future in futures:
                future.result()
            if with_estimates:
                signal = batch.signal if subtracted is None else subtracted

                def split(kernel, args):
                    for future in self._split(kernel, n, args, threads, pool):
                        future.result()

                estimates.update(self.estimates.run(batch, signal, main_mask, out_i[:, INT_COLUMNS.index("status")]
                                                    .copy(), out_f[:, FLOAT_COLUMNS.index("m2_major_mm2")], split))
            return out_f, out_i

        return result

    def run(self, batch: EventBatch, threads: int = 1, pool: ThreadPoolExecutor | None = None, *,
            estimates: dict | None = None):
        """Kernel outputs (float64 (N, 11), int64 (N, 5)) of a batch (offsets in ``start`` are absolute);
        ``estimates`` as for :meth:`submit`."""
        return self.submit(batch, threads, pool, estimates=estimates)()


#: dtypes of the columns the emission estimators add (trackfit.recon.estimators, docs/table-format.md)
ESTIMATE_DTYPES: dict[str, np.dtype] = {
    "adaptive_emission_rad": np.dtype(np.float32),
    "adaptive_conv_x_mm": np.dtype(np.float32),
    "adaptive_conv_y_mm": np.dtype(np.float32),
    "adaptive_head_score": np.dtype(np.float32),
    "adaptive_status": np.dtype(np.uint16),
    "skeleton_emission_rad": np.dtype(np.float32),
    "skeleton_conv_x_mm": np.dtype(np.float32),
    "skeleton_conv_y_mm": np.dtype(np.float32),
    "skeleton_path_mm": np.dtype(np.float32),
    "skeleton_status": np.dtype(np.uint16),
}

#: prefix of the columns copied from the simulation truth of a batch (``/truth`` of a simulated raw file)
TRUTH_PREFIX = "truth_"


def _columns(batch: EventBatch, out_f, out_i, estimates=None) -> dict[str, np.ndarray]:
    values = {"event_index": batch.index, "trigger_id": batch.trigger_id, "time_s": batch.time_s}
    values.update({name: out_f[:, k] for k, name in enumerate(FLOAT_COLUMNS)})
    values.update({name: out_i[:, k] for k, name in enumerate(INT_COLUMNS)})
    with np.errstate(over="ignore"):  # a value beyond float32 becomes inf, and its event has the NOT_FINITE bit
        columns = {name: np.ascontiguousarray(values[name], dtype=dtype) for name, dtype in TABLE_COLUMNS.items()}
    for name, values in (estimates or {}).items():  # the estimator's columns (trackfit.recon.estimators)
        columns[name] = np.ascontiguousarray(values, dtype=ESTIMATE_DTYPES[name])
    for key in sorted(batch.truth):
        values = np.asarray(batch.truth[key])
        if values.ndim == 1 and values.dtype.kind in "biuf":
            columns[TRUTH_PREFIX + key] = np.ascontiguousarray(values)
    return columns


def empty_columns(prepared: _Prepared) -> dict[str, np.ndarray]:
    """The columns of a table of no events, as :func:`reconstruct` gives them for an empty batch (the same names
    and dtypes as for any other batch: :data:`TABLE_COLUMNS` and the columns of the config's emission estimate)."""
    batch = EventBatch.empty(prepared.grid)
    estimates: dict = {}
    out_f, out_i = prepared.run(batch, estimates=estimates)
    return _columns(batch, out_f, out_i, estimates)


def _base_provenance(config: ReconConfig, grid: HexGrid, scale: tuple[float, str]) -> dict:
    from .. import __version__

    return {
        "trackfit_version": __version__,
        "created_utc": now_utc(),
        "config_toml": config.to_toml(),
        SCALE_KEY: float(scale[0]),
        SOURCE_KEY: scale[1],
        "grid_pitch_mm": grid.pitch_mm,
        "grid_n_columns": grid.n_columns,
        "grid_n_rows": grid.n_rows,
        "grid_shifted_rows": grid.shifted_rows,
    }


def reconstruct(batch: EventBatch, config=None, *, threads: int = 1, run_info=None) -> EventTable:
    """Reconstruct every event of a batch: cleaning, two-stage moment analysis, energy.

    Parameters
    ----------
    batch : EventBatch
    config : ReconConfig, dict or path of a TOML file, optional
        Default ``ReconConfig()``.
    threads : int
        Threads running the kernel on parts of the batch (default 1).
    run_info : mapping, optional
        The ``/run`` attributes of the raw file the batch comes from (``reader.run_info``): its
        ``nominal_counts_per_kev`` gives the energy scale when the config sets no ``counts_per_kev``
        (:meth:`ReconConfig.energy_scale`). Without either, the energies are marked uncalibrated.

    Returns
    -------
    EventTable
        One row per event, in batch order, columns :data:`TABLE_COLUMNS` (see ``docs/table-format.md``) followed
        by ``truth_<name>`` copies of the batch's simulation truth, if any; the provenance holds the config TOML,
        the energy scale used and its source, the library version and the chip geometry.

    References
    ----------
    Bellazzini et al. 2003, Proc. SPIE 4843, 383 (two-stage moment analysis); ``docs/methods.md`` §2.

    Examples
    --------
    >>> import numpy as np
    >>> from trackfit import EventBatch, HexGrid, reconstruct
    >>> image = np.zeros((5, 6), np.int16); image[2, 1:5] = [40, 60, 90, 200]
    >>> table = reconstruct(EventBatch.from_images([image], [(10, 10)], grid=HexGrid()))
    >>> int(table["n_pixels"][0]), float(table["pulse_height"][0]), round(float(table["axis_rad"][0]), 6)
    (4, 390.0, 0.0)
    """
    if not isinstance(batch, EventBatch):
        raise TypeError(f"'batch' must be an EventBatch (got {type(batch).__name__}); "
                        "wrap your arrays with EventBatch(...) or EventBatch.from_images(...)")
    config = _as_config(config)
    threads = max(1, int(threads))
    scale = config.energy_scale(run_info)
    prepared = _Prepared(config, batch.grid, scale[0])
    prepared.check_pedestals(batch.pedestal_subtracted)
    estimates: dict = {}
    if threads > 1:
        with ThreadPoolExecutor(threads, thread_name_prefix="trackfit-recon") as pool:
            out_f, out_i = prepared.run(batch, threads, pool, estimates=estimates)
    else:
        out_f, out_i = prepared.run(batch, estimates=estimates)
    return EventTable(_columns(batch, out_f, out_i, estimates),
                      {**_base_provenance(config, batch.grid, scale), **prepared.provenance()})


def content_fingerprint(raw_path, *, batch_size: int = DEFAULT_BATCH_SIZE, strict: bool = False) -> str:
    """The content fingerprint of a raw event file, as stored in the provenance of its event tables."""
    return _content_fingerprint(raw_path, batch_size=batch_size, strict=strict)


def output_name(raw_path, out_dir) -> Path:
    """Default table name for a raw file in ``out_dir``: ``<stem>_events.h5``."""
    raw_path = Path(raw_path)
    return Path(out_dir) / f"{raw_path.stem}_events.h5"


def _progress_bar(progress, total, label):
    """A callable taking the number of events just done, and a closer."""
    if callable(progress):
        return progress, lambda: None
    if not progress:
        return (lambda n: None), (lambda: None)
    from tqdm.auto import tqdm

    bar = tqdm(total=total, unit=" events", unit_scale=True, desc=label, dynamic_ncols=True, leave=True)
    return bar.update, bar.close


def reconstruct_file(raw_path, out_path, config=None, batch_size: int = DEFAULT_BATCH_SIZE, progress=True, *,
                     threads: int | None = None, strict: bool = False, overwrite: bool = False,
                     compression: str = DEFAULT_COMPRESSION, with_truth: bool = True) -> Path:
    """Reconstruct a raw event file into an event-table file, streaming with bounded memory.

    Reading (and decompressing) the next batch, the kernel on the current batch and writing the previous results
    run at the same time in different threads. The table is written to a partial file of its own and renamed when
    complete, so a crash never leaves a file that looks whole.

    Parameters
    ----------
    raw_path : str or Path
        Raw event file (``docs/raw-format.md``).
    out_path : str or Path
        Event-table file to create (``docs/table-format.md``).
    config : ReconConfig, dict or path of a TOML file, optional
    batch_size : int
        Events per batch; memory grows with it (about four batches of raw signal are alive at once).
    progress : bool or callable
        Show a progress bar (tqdm), or call ``progress(n_events_done_in_this_step)`` after each batch.
    threads : int, optional
        Threads running the kernel on parts of each batch (default: ``os.cpu_count()``).
    strict : bool
        False (default): malformed events become rows flagged ``MALFORMED_INPUT`` (nothing is lost). True: the
        first malformed event raises :class:`~trackfit.io.raw.RawFormatError`.
    overwrite : bool
        Replace an existing ``out_path``.
    compression : str
        Filter of the table columns (default "none"; see ``docs/table-format.md``).
    with_truth : bool
        Copy the ``/truth`` columns of a simulated raw file into the table as ``truth_<name>`` (default True).

    Returns
    -------
    Path
        ``out_path``.
    """
    from ..io.raw import open_raw

    config = _as_config(config)
    raw_path = Path(raw_path)
    out_path = Path(out_path)
    if int(batch_size) < 1:
        raise ValueError(f"'batch_size' must be >= 1 (got {batch_size})")
    threads = max(1, int(threads if threads is not None else (os.cpu_count() or 1)))
    if out_path.exists() and not overwrite:
        raise FileExistsError(f"'{out_path}' exists; pass overwrite=True (--overwrite) to replace it")
    if out_path.resolve() == raw_path.resolve():
        raise ValueError(f"output '{out_path}' would overwrite the input file")

    with open_raw(raw_path, strict=strict) as reader:
        scale = config.energy_scale(reader.run_info, path=raw_path)
        prepared = _Prepared(config, reader.grid, scale[0], data=f"raw file '{raw_path}'")
        prepared.check_pedestals(reader.pedestal_subtracted)
        provenance = file_provenance(config, reader, raw_path, scale, prepared, batch_size=batch_size,
                                     with_truth=with_truth, strict=strict)
        update, close_bar = _progress_bar(progress, len(reader), raw_path.name)
        try:
            writer = TableWriter(out_path, provenance=provenance, compression=compression, overwrite=overwrite,
                                 expected_rows=len(reader), exact_rows=True)
        except BaseException:
            close_bar()
            raise
        try:
            try:
                fingerprint = stream_range(reader, 0, len(reader), prepared, writer, batch_size=batch_size,
                                           threads=threads, update=update,
                                           truth=reader if with_truth else None)
            finally:
                close_bar()
            writer.set_provenance(
                input_fingerprint=fingerprint.hexdigest(),
                n_malformed_events=len(reader.bad_events),
                finished_utc=now_utc(),
            )
        except BaseException as err:
            writer.fail(err)
        return writer.close()


def file_provenance(config, reader, raw_path: Path, scale, prepared: _Prepared, *, batch_size: int,
                    with_truth: bool, strict: bool) -> dict:
    """Provenance entries of a table made from a raw file (all but the fingerprint and what is known at the end)."""
    provenance = _base_provenance(config, reader.grid, scale)
    provenance.update(prepared.provenance())
    provenance[SETTINGS_HASH_KEY] = settings_hash(
        config, pixel_map_fingerprint=None if prepared.pixel_map is None else prepared.pixel_map.fingerprint,
        energy_scale=scale, with_truth=with_truth, strict=strict)
    stat = raw_path.stat()
    provenance.update({
        "input_name": raw_path.name,
        "input_path": str(raw_path.resolve()),
        "input_size_bytes": int(stat.st_size),
        "input_n_events": len(reader),
        "input_pedestal_subtracted": bool(reader.pedestal_subtracted),
        "batch_size": int(batch_size),
    })
    return provenance


def truth_columns(reader) -> list[tuple[str, object]]:
    """``(column name, HDF5 dataset)`` of every ``/truth`` dataset of a raw file that a table copies: the 1-D
    numeric ones, named ``truth_<name>``, in name order (the order of :func:`reconstruct`'s truth columns)."""
    out = []
    for name in reader.truth_names:
        dataset = reader.truth_dataset(name)
        if dataset.ndim == 1 and dataset.dtype.kind in "biuf":
            out.append((TRUTH_PREFIX + name, dataset))
    return out


def batch_bounds(start: int, stop: int, batch_size: int) -> list[tuple[int, int]]:
    """Batches of events ``start <= i < stop`` for streaming: ``batch_size`` events each, except the first ones,
    which grow from an eighth of it (the kernel starts as soon as a small batch is read), and the last ones, which
    shrink to a quarter (little is left to write after the kernel's last batch). Results do not depend on it."""
    batch_size = max(1, int(batch_size))
    n = stop - start
    if n <= 0:
        return []
    sizes = []
    size = max(1, batch_size // 8)
    left = n
    while left > 0:
        step = min(size, left)
        sizes.append(step)
        left -= step
        size = min(2 * size, batch_size)
    tail = max(1, batch_size // 4)
    if len(sizes) > 3 and sizes[-1] > tail:  # split the last full batch so that the pipeline drains quickly
        last = sizes.pop()
        while last > tail:
            sizes.append(last - last // 2)
            last //= 2
        sizes.append(last)
    edges = np.concatenate([[0], np.cumsum(sizes)]) + start
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def stream_range(reader, start: int, stop: int, prepared: _Prepared, writer: TableWriter, *, batch_size: int,
                 threads: int, update=None, truth=None) -> _Fingerprint:
    """Reconstruct events ``start <= i < stop`` of an open raw file and append their rows to ``writer``.

    A reader thread reads (and decompresses) the next batches and feeds the fingerprint; the kernel runs on the
    current batch in ``threads`` threads; a writer thread appends the previous results in batch order. About four
    batches of raw signal are alive at once, whatever the range.

    Parameters
    ----------
    truth : RawEventReader, optional
        Copy its ``/truth`` datasets in whole (HDF5 copies, made by the writer thread once every batch is read); only
        for the whole file (``start == 0``, ``stop == len(reader)``).

    Returns
    -------
    RawFingerprint
        Of the events of the range (combine the fingerprints of consecutive ranges with
        :meth:`~trackfit.io.fingerprint.RawFingerprint.combine`).
    """
    from ..io.raw import _prefetched

    if truth is not None and (start, stop) != (0, len(truth)):
        raise ValueError(f"truth columns are copied whole: only for the whole file (events 0:{len(truth)}), "
                         f"not {start}:{stop}")
    update = update or (lambda n: None)
    fingerprint = _Fingerprint()
    if stop <= start and not writer.columns:  # no events: still every column, empty, with its dtype
        writer.append(empty_columns(prepared))
    copies: list = []  # (name, dataset) of the truth columns still to copy, looked up once reading has ended
    lookup = [truth] if truth is not None else []

    # signal buffers reused from batch to batch (as many as batches are in flight: read, waiting, in the kernel)
    free: queue.Queue = queue.Queue()

    def take_buffer(n_pixels, n_room):
        try:
            buffer = free.get_nowait()
        except queue.Empty:
            buffer = None
        if buffer is None or buffer.size < n_pixels:
            # room for the larger batches that follow (a new buffer costs a page fault per page of memory)
            buffer = np.empty(max(n_pixels, n_room, 1), np.int16)
        return buffer

    bounds = batch_bounds(start, stop, batch_size)
    # h5py serialises all its calls with one lock: the truth copies wait until every batch is read, so they never
    # hold up a read the kernel waits for (the batches read ahead keep the kernel busy meanwhile)
    read_done = threading.Event()
    if not bounds:
        read_done.set()

    def read(item):
        taken = []
        a, b = item

        def buffer(n_pixels):
            # a new buffer is made large enough for a full batch of such events (the first batches are smaller)
            # and a tenth more (batches differ in their numbers of pixels), so that it can serve every later batch
            n_events = min(batch_size, stop - a)
            taken.append(take_buffer(n_pixels, int(n_pixels * n_events / max(b - a, 1) * 1.1)))
            return taken[-1]

        batch = reader.read_batch(*item, with_truth=False, buffer=buffer, mapped=True)
        # the checksum here, in batch order: it touches the signal first, so the page faults of a mapped signal fall
        # on this thread, not on the kernel's (and with zlib-ng it is cheap beside the kernel)
        fingerprint.update(batch)
        if item == bounds[-1]:
            read_done.set()
        return batch, (taken[0] if taken else None)

    work: queue.Queue = queue.Queue(maxsize=2)
    failure: list[BaseException] = []

    def copy_one():
        try:
            if lookup:
                copies.extend(truth_columns(lookup.pop()))
            elif copies:
                writer.copy_column(*copies.pop(0))
        except BaseException as err:  # noqa: BLE001 - re-raised in the caller
            failure.append(err)

    def write_loop():
        while True:
            pending = bool(lookup or copies) and not failure
            try:
                if pending and read_done.is_set():
                    item = work.get_nowait()  # rows first, a truth column when none wait
                else:  # wake up now and then to see whether the reading has ended
                    item = work.get(timeout=0.005 if pending else None)
            except queue.Empty:
                if pending and read_done.is_set():
                    copy_one()
                continue
            if item is None:
                break
            if failure:
                continue
            try:
                batch, out_f, out_i, estimates = item
                writer.append(_columns(batch, out_f, out_i, estimates))
            except BaseException as err:  # noqa: BLE001 - re-raised in the caller
                failure.append(err)
        while (lookup or copies) and not failure:
            copy_one()

    thread = threading.Thread(target=write_loop, name="trackfit-table-writer", daemon=True)
    thread.start()
    pool = ThreadPoolExecutor(threads, thread_name_prefix="trackfit-recon") if threads > 1 else None
    n_written = len(writer)
    in_kernel: collections.deque = collections.deque()  # batches whose pieces are queued on the pool
    try:
        def finish_oldest():
            batch, buffer, result, estimates = in_kernel.popleft()
            out_f, out_i = result()
            if buffer is not None:  # the kernel is done with the signal (the columns need none of it): reuse it
                free.put(buffer)
            # the writer thread assembles the batch's columns and appends them while the kernel goes on with the next
            work.put((batch, out_f, out_i, estimates))
            update(len(batch))

        ahead = 1 if pool is not None else 0
        for batch, buffer in _prefetched(read, bounds):
            if failure:
                break
            estimates: dict = {}
            in_kernel.append((batch, buffer, prepared.submit(batch, threads, pool, estimates=estimates), estimates))
            del estimates
            del batch, buffer
            while len(in_kernel) > ahead:
                finish_oldest()
        while in_kernel and not failure:
            finish_oldest()
    finally:
        for _, _, result, _ in in_kernel:  # a failure: let queued pieces end before their arrays go
            try:
                result()
            except BaseException:  # noqa: BLE001, S110 - the first failure is the one reported
                pass
        work.put(None)
        thread.join()
        if pool is not None:
            pool.shutdown()
    if failure:
        raise failure[0]
    if len(writer) - n_written != stop - start:  # pragma: no cover - guards the one-row-per-event promise
        raise RuntimeError(f"wrote {len(writer) - n_written} rows for events {start}:{stop} of '{reader.path}'")
    return fingerprint
