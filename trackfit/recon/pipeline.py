"""Public entry points of the reconstruction: :func:`reconstruct` (a batch in memory) and :func:`reconstruct_file`
(a raw event file to an event-table file, streaming).

What to use when: :func:`reconstruct` in a notebook or on a batch you built yourself (``EventBatch``);
:func:`reconstruct_file` (or ``trackfit reconstruct``) for files of any size: it reads the next batch and writes
the previous results in background threads while the kernel (numba, ``nogil``) works on the current batch, and its
memory is bounded by the batch size, not the file size.
"""

from __future__ import annotations

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
    "n_clusters": np.dtype(np.int16),
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

    def _split(self, kernel, n, common, threads, pool):
        if threads <= 1 or n < 2 * threads or pool is None:
            kernel(0, n, *common)
        else:
            edges = np.linspace(0, n, 4 * threads + 1).astype(np.int64)  # small pieces balance the load
            futures = [pool.submit(kernel, int(a), int(b), *common)
                       for a, b in zip(edges[:-1], edges[1:], strict=True)]
            for future in futures:
                future.result()

    def run(self, batch: EventBatch, threads: int = 1, pool: ThreadPoolExecutor | None = None, *,
            estimates: dict | None = None):
        """Kernel outputs (float64 (N, 11), int64 (N, 5)) of a batch (offsets in ``start`` are absolute).

        ``estimates``, when given, receives the columns of the config's emission estimator
        (:mod:`trackfit.recon.estimators`; none for ``"two-stage"``).
        """
        n = len(batch)
        self.check_pedestals(batch.pedestal_subtracted)
        signal = batch.signal
        if not batch.pedestal_subtracted:
            signal = batch.signal.copy()
            self._split(subtract_pedestals, n, (batch.roi, batch.start, batch.signal, batch.bad, self.pedestal,
                                                self.grid.n_columns, self.grid.n_rows, signal), threads, pool)
        out_f = np.empty((n, len(FLOAT_COLUMNS)), np.float64)
        out_i = np.empty((n, len(INT_COLUMNS)), np.int64)
        with_estimates = estimates is not None and self.estimates.needs_main_mask
        main_mask = np.zeros(signal.size if with_estimates else 0, np.uint8)
        common = (batch.roi, batch.start, signal, batch.bad, *self.args, main_mask, out_f, out_i)
        self._split(reconstruct_range, n, common, threads, pool)
        if with_estimates:
            estimates.update(self.estimates.run(
                batch, signal, main_mask, out_i[:, INT_COLUMNS.index("status")].copy(),
                out_f[:, FLOAT_COLUMNS.index("m2_major_mm2")], lambda kernel, args: self._split(
                    kernel, n, args, threads, pool)))
        return out_f, out_i


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
    columns = {name: np.ascontiguousarray(values[name], dtype=dtype) for name, dtype in TABLE_COLUMNS.items()}
    for name, values in (estimates or {}).items():  # the estimator's columns (trackfit.recon.estimators)
        columns[name] = np.ascontiguousarray(values, dtype=ESTIMATE_DTYPES[name])
    for key in sorted(batch.truth):
        values = np.asarray(batch.truth[key])
        if values.ndim == 1 and values.dtype.kind in "biuf":
            columns[TRUTH_PREFIX + key] = np.ascontiguousarray(values)
    return columns


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
    run at the same time in different threads. The table is written to ``<out_path>.partial`` and renamed when
    complete, so a crash never leaves a file that looks whole.

    Parameters
    ----------
    raw_path : str or Path
        Raw event file (``docs/raw-format.md``).
    out_path : str or Path
        Event-table file to create (``docs/table-format.md``).
    config : ReconConfig, dict or path of a TOML file, optional
    batch_size : int
        Events per batch; memory grows with it (about 4 batches of raw signal are alive at once).
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
    from ..io.raw import _prefetched, open_raw

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
        provenance = _base_provenance(config, reader.grid, scale)
        provenance.update(prepared.provenance())
        stat = raw_path.stat()
        provenance.update({
            "input_name": raw_path.name,
            "input_path": str(raw_path.resolve()),
            "input_size_bytes": int(stat.st_size),
            "input_n_events": len(reader),
            "input_pedestal_subtracted": bool(reader.pedestal_subtracted),
            "batch_size": int(batch_size),
        })
        update, close_bar = _progress_bar(progress, len(reader), raw_path.name)
        try:
            writer = TableWriter(out_path, provenance=provenance, compression=compression, overwrite=overwrite,
                                 expected_rows=len(reader))
        except BaseException:
            close_bar()
            raise
        fingerprint = _Fingerprint()

        # reader thread (read-ahead of two batches): reads, decompresses and checksums the next batches;
        # writer thread: appends the results in batch order. Only result columns wait for the writer, so about
        # four batches of raw signal are alive at once, whatever the file size.
        def read(bounds):
            batch = reader.read_batch(*bounds, with_truth=with_truth)
            fingerprint.update(batch)
            return batch

        n_events = len(reader)
        bounds = [(a, min(a + int(batch_size), n_events)) for a in range(0, n_events, int(batch_size))]
        work: queue.Queue = queue.Queue(maxsize=2)
        failure: list[BaseException] = []

        def write_loop():
            while True:
                item = work.get()
                if item is None:
                    return
                if failure:
                    continue
                try:
                    writer.append(item)
                except BaseException as err:  # noqa: BLE001 - re-raised in the caller
                    failure.append(err)

        thread = threading.Thread(target=write_loop, name="trackfit-table-writer", daemon=True)
        thread.start()
        pool = ThreadPoolExecutor(threads, thread_name_prefix="trackfit-recon") if threads > 1 else None
        try:
            try:
                for batch in _prefetched(read, bounds):
                    if failure:
                        break
                    estimates: dict = {}
                    out_f, out_i = prepared.run(batch, threads, pool, estimates=estimates)
                    work.put(_columns(batch, out_f, out_i, estimates))
                    del out_f, out_i, estimates
                    update(len(batch))
                    del batch
            finally:
                work.put(None)
                thread.join()
                if pool is not None:
                    pool.shutdown()
                close_bar()
            if failure:
                raise failure[0]
            if len(writer) != len(reader):  # pragma: no cover - guards the one-row-per-event promise
                raise RuntimeError(f"wrote {len(writer)} rows for {len(reader)} events of '{raw_path}'")
            writer.set_provenance(
                input_fingerprint=fingerprint.hexdigest(),
                n_malformed_events=len(reader.bad_events),
                finished_utc=now_utc(),
            )
        except BaseException:
            writer.abort()
            raise
        return writer.close()
