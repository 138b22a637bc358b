"""One raw file reconstructed as event ranges ("parts") by separate processes or cluster workers, then joined into
the very table one process writes.

What to use when: :func:`trackfit.reconstruct_file` for one file on one machine (threads; the fastest for files up
to millions of events, because a worker process takes about 1.5 s to start); :func:`reconstruct_in_parts` (or
``trackfit reconstruct --workers N``) to spread files of many millions of events over processes;
:func:`trackfit.recon.distributed.reconstruct_on_cluster` (``--scheduler``) to spread them over a Dask cluster.

How it works
------------
* :func:`plan_file` splits the events ``0 <= i < N`` of a raw file into ``ceil(N / part_events)`` ranges of equal
  size (to one event), written to ``<out>.parts/ranges.json`` so that a rerun finds the same ranges. Each range
  becomes a *part*: an event-table file of its rows in ``<out>.parts/`` (``events_<first>-<stop>.h5``), written as
  a partial file and renamed when complete, like every trackfit file. Its provenance holds the range, the settings
  hash, the input's identity (path, size, modification time, events) and the CRC-32 values of the range (with
  their byte counts).
* :func:`join_parts` copies the parts in event order into a partial file of ``<out>``, copies the raw file's
  simulation truth (HDF5 copies, as ``reconstruct_file`` does), combines the range fingerprints into the fingerprint
  of the whole file (:meth:`~trackfit.io.fingerprint.RawFingerprint.combine`: the same value one pass gives), and
  renames the file to ``<out>``: the rename is the commit point. Then it deletes the parts.
* A part that exists complete and was made from the same input identity, settings hash, trackfit version and
  range is reused; only missing parts are reconstructed again (after a killed worker, a lost cluster node or an
  interrupted campaign). A killed worker leaves at most a partial file, never a complete-looking table.

The joined table equals, column by column, the table of :func:`~trackfit.reconstruct_file` on the same file; its
provenance records the same input fingerprint and settings (plus ``n_parts``).
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from ..io._partial import now_utc, write_text_file
from ..io.compression import DEFAULT_COMPRESSION
from ..io.fingerprint import RawFingerprint
from ..io.table import TableWriter
from .config import ReconConfig
from .identity import SETTINGS_HASH_KEY, input_identity, settings_hash

__all__ = ["DEFAULT_PART_EVENTS", "FileResult", "RangeTask", "FileJob", "plan_file", "plan_jobs", "run_task",
           "join_parts", "parts_folder", "reconstruct_in_parts", "run_jobs_locally", "run_jobs_here"]

#: events per part when nothing else is said: about 2 to 4 s of kernel time on one core, so that starting a task,
#: writing its part and joining it stay small against its work
DEFAULT_PART_EVENTS = 1_000_000
#: the plan of a split file in its parts folder: the ranges, so that a rerun finds them again
PLAN_NAME = "ranges.json"
#: smallest parts made when files are split only to give every worker some work
MIN_AUTO_PART_EVENTS = 50_000
#: provenance entries that only a part has (dropped from the joined table)
_PART_KEYS = ("part_start_event", "part_stop_event", "range_fingerprint", "range_fingerprint_bytes",
              "input_mtime_ns")
#: rows copied at once by the join (memory of the join: this many rows of every column)
_JOIN_BLOCK_ROWS = 262_144


@dataclass(frozen=True)
class FileResult:
    """What happened to one raw file: its output, rows written and rows fully reconstructed, or the error; how many
    parts it was split into and how many of them were reused from an earlier run; seconds from start to join."""

    raw_path: str
    out_path: str
    n_rows: int = 0
    n_ok: int = 0
    error: str = ""
    n_parts: int = 1
    n_parts_reused: int = 0
    seconds: float = 0.0

    def __str__(self):
        if self.error:
            return f"{self.raw_path}: FAILED: {self.error}"
        share = f"{100.0 * self.n_ok / self.n_rows:.1f} %" if self.n_rows else "-"
        parts = ""
        if self.n_parts > 1:
            parts = f"; joined from {self.n_parts} parts"
            if self.n_parts_reused:
                parts += f" ({self.n_parts_reused} reused from an earlier run)"
        return f"wrote {self.out_path}: {self.n_rows} events, {self.n_ok} fully reconstructed ({share}){parts}"


@dataclass(frozen=True, eq=False)
class RangeTask:
    """One unit of work for a process or a cluster worker: events ``start <= i < stop`` of a raw file into a part
    file, or (``whole=True``) the whole file into its final table with :func:`~trackfit.reconstruct_file`."""

    raw_path: str
    out_path: str
    start: int
    stop: int
    whole: bool
    config_toml: str
    options: dict = field(default_factory=dict)
    settings_hash: str = ""
    identity: dict = field(default_factory=dict)

    @property
    def n_events(self) -> int:
        return self.stop - self.start


def parts_folder(out_path) -> Path:
    """Where the parts of ``out_path`` are written: ``<out_path>.parts/`` next to it."""
    out_path = Path(out_path)
    return out_path.with_name(out_path.name + ".parts")


def part_name(start: int, stop: int) -> str:
    return f"events_{start:012d}-{stop:012d}.h5"


#: a part, complete or partial (``<part>.<host>-<pid>-<token>.partial``, or ``<part>.partial`` of older versions)
_PART_NAME = re.compile(r"events_(\d{12})-(\d{12})\.h5(?:(?:\.[A-Za-z0-9_]+-\d+-[0-9a-f]+)?\.partial)?")


def part_ranges(n_events: int, part_events: int) -> list[tuple[int, int]]:
    """``ceil(n_events / part_events)`` consecutive ranges of equal size (to one event) covering ``0:n_events``."""
    if int(part_events) < 1:
        raise ValueError(f"'part_events' must be >= 1 (got {part_events})")
    n_parts = max(1, math.ceil(n_events / int(part_events)))
    edges = np.round(np.linspace(0, n_events, n_parts + 1)).astype(np.int64)
    return [(int(a), int(b)) for a, b in zip(edges[:-1], edges[1:], strict=True)]


def existing_ranges(folder: Path, n_events: int) -> list[tuple[int, int]] | None:
    """The ranges of an earlier plan of ``folder`` (its ``ranges.json``, or the parts, complete or ``.partial``,
    when they tile ``0:n_events`` exactly), else None: a rerun keeps the ranges of an interrupted run, whatever its
    part size, so its complete parts are reused."""
    if not folder.is_dir():
        return None
    manifest = folder / PLAN_NAME
    if manifest.exists():
        try:
            plan = json.loads(manifest.read_text())
            if plan.get("n_events") == n_events:
                return [(int(a), int(b)) for a, b in plan["ranges"]]
        except (OSError, ValueError, KeyError, TypeError):
            pass
    ranges = set()
    for path in folder.iterdir():
        match = _PART_NAME.fullmatch(path.name)
        if match:
            ranges.add((int(match.group(1)), int(match.group(2))))
    ranges = sorted(ranges)
    if not ranges or ranges[0][0] != 0 or ranges[-1][1] != n_events:
        return None
    if any(b != c or a >= b for (a, b), (c, _) in zip(ranges[:-1], ranges[1:], strict=True)):
        return None
    return ranges


def _as_config(config) -> ReconConfig:
    if config is None:
        return ReconConfig()
    if isinstance(config, ReconConfig):
        return config
    return ReconConfig.read_toml(config)


# ------------------------------------------------------------------------------------------------ one part
def run_task(task: RangeTask, progress=None) -> int:
    """Run a task (in a worker process or on a cluster worker); returns the rows written."""
    from .pipeline import reconstruct_file

    config = ReconConfig.from_toml(task.config_toml)
    options = dict(task.options)
    if task.whole:
        reconstruct_file(task.raw_path, task.out_path, config, progress=progress or False, **options)
        return task.n_events
    return _run_part(task, config, options, progress)


def _run_part(task: RangeTask, config: ReconConfig, options: dict, progress) -> int:
    from ..io.raw import open_raw
    from .pipeline import _Prepared, file_provenance, stream_range

    raw_path = Path(task.raw_path)
    out = Path(task.out_path)
    out.parent.mkdir(parents=True, exist_ok=True)
    strict = bool(options.get("strict", False))
    batch_size = int(options.get("batch_size") or _default_batch_size())
    with open_raw(raw_path, strict=strict) as reader:
        scale = config.energy_scale(reader.run_info, path=raw_path)
        prepared = _Prepared(config, reader.grid, scale[0], data=f"raw file '{raw_path}'")
        prepared.check_pedestals(reader.pedestal_subtracted)
        provenance = file_provenance(config, reader, raw_path, scale, prepared, batch_size=batch_size,
                                     with_truth=bool(options.get("with_truth", True)), strict=strict)
        provenance.update(part_start_event=task.start, part_stop_event=task.stop,
                          input_mtime_ns=int(raw_path.stat().st_mtime_ns))
        with TableWriter(out, provenance=provenance, overwrite=True, expected_rows=task.n_events,
                         exact_rows=True) as writer:
            fingerprint = stream_range(reader, task.start, task.stop, prepared, writer, batch_size=batch_size,
                                       threads=int(options.get("threads") or 1), update=progress)
            writer.set_provenance(range_fingerprint=fingerprint.hexdigest(),
                                  range_fingerprint_bytes=np.asarray(fingerprint.n_bytes, np.int64),
                                  n_malformed_events=len(reader.bad_events), finished_utc=now_utc())
    return task.n_events


def _default_batch_size() -> int:
    from .pipeline import DEFAULT_BATCH_SIZE

    return DEFAULT_BATCH_SIZE


def _attrs(path: Path) -> dict | None:
    """Provenance attributes and row count of a complete part (None if it cannot be read)."""
    try:
        with h5py.File(path, "r") as f:
            out = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f["provenance"].attrs.items()}
            out["_n_rows"] = int(f["events"].attrs["n_rows"])
            return out
    except Exception:  # noqa: BLE001 - a part that cannot be read for any reason is made again
        return None


def _part_matches(task: RangeTask) -> bool:
    """True when the part file of ``task`` exists, is complete and was made from the same input, settings,
    trackfit version and range."""
    from .. import __version__

    attrs = _attrs(Path(task.out_path))
    if attrs is None:
        return False
    expected = {**task.identity, SETTINGS_HASH_KEY: task.settings_hash, "trackfit_version": __version__,
                "part_start_event": task.start, "part_stop_event": task.stop, "_n_rows": task.n_events}
    return all(attrs.get(k) == v for k, v in expected.items())


# ------------------------------------------------------------------------------------------------ one file
@dataclass(eq=False)
class FileJob:
    """A raw file and its output, as ranges: ``tasks`` still to run (parts missing or a whole-file task) and, for a
    split file, the parts to join (:func:`join_parts`)."""

    raw_path: Path
    out_path: Path
    n_events: int
    ranges: list[tuple[int, int]]
    tasks: list[RangeTask]
    split: bool
    with_truth: bool = True
    compression: str = DEFAULT_COMPRESSION
    overwrite: bool = False
    n_reused: int = 0
    error: str = ""
    started: float = field(default_factory=time.perf_counter)

    @property
    def part_paths(self) -> list[Path]:
        folder = parts_folder(self.out_path)
        return [folder / part_name(a, b) for a, b in self.ranges]


def plan_file(raw_path, out_path, config=None, *, part_events: int | None = DEFAULT_PART_EVENTS,
              batch_size: int | None = None, threads: int = 1, strict: bool = False, overwrite: bool = False,
              compression: str = DEFAULT_COMPRESSION, with_truth: bool = True) -> FileJob:
    """Plan the reconstruction of one raw file as ranges (see the module docstring).

    Parameters
    ----------
    part_events : int or None
        Events per part; a file of at most this many events (or ``None``) is one whole-file task.
    threads : int
        Kernel threads of each task.

    Other parameters are those of :func:`~trackfit.reconstruct_file`. Parts that exist complete and match are
    counted in ``FileJob.n_reused`` and not planned again.
    """
    from ..io.pixelmap import read_pixel_map
    from ..io.raw import open_raw

    config = _as_config(config)
    raw_path, out_path = Path(raw_path), Path(out_path)
    if out_path.exists() and not overwrite:
        raise FileExistsError(f"'{out_path}' exists; pass overwrite=True (--overwrite) to replace it")
    if out_path.resolve() == raw_path.resolve():
        raise ValueError(f"output '{out_path}' would overwrite the input file")
    with open_raw(raw_path, strict=strict) as reader:
        n_events = len(reader)
        scale = config.energy_scale(reader.run_info, path=raw_path)
    options = {"threads": max(1, int(threads)), "strict": bool(strict), "with_truth": bool(with_truth)}
    if batch_size is not None:
        options["batch_size"] = int(batch_size)
    toml = config.to_toml()
    resumed = existing_ranges(parts_folder(out_path), n_events)  # parts of an interrupted run: keep their ranges
    if not resumed and (part_events is None or n_events <= int(part_events)):
        options.update(overwrite=bool(overwrite), compression=compression)
        task = RangeTask(str(raw_path), str(out_path), 0, n_events, True, toml, options)
        return FileJob(raw_path, out_path, n_events, [(0, n_events)], [task], False, with_truth, compression,
                       overwrite)
    map_fingerprint = read_pixel_map(config.pixel_map).fingerprint if config.pixel_map else None
    digest = settings_hash(config, pixel_map_fingerprint=map_fingerprint, energy_scale=scale,
                           with_truth=with_truth, strict=strict)
    identity = input_identity(raw_path, n_events)
    folder = parts_folder(out_path)
    ranges = resumed or part_ranges(n_events, int(part_events))
    folder.mkdir(parents=True, exist_ok=True)
    manifest = folder / PLAN_NAME
    write_text_file(manifest, json.dumps({"raw_path": str(raw_path.resolve()), "n_events": n_events,
                                          "ranges": [list(r) for r in ranges]}) + "\n")
    tasks, reused = [], 0
    for a, b in ranges:
        task = RangeTask(str(raw_path), str(folder / part_name(a, b)), a, b, False, toml, options, digest, identity)
        if _part_matches(task):
            reused += 1
        else:
            tasks.append(task)
    return FileJob(raw_path, out_path, n_events, ranges, tasks, True, with_truth, compression, overwrite, reused)


def plan_jobs(pairs, config=None, *, workers: int = 1, part_events: int | None = None, **options) -> list[FileJob]:
    """Plan several files for ``workers`` processes or cluster workers.

    With ``part_events`` given, files larger than it are split into parts of about that size. Without it, files
    of more than :data:`DEFAULT_PART_EVENTS` events are split, and when there are fewer files than workers the
    largest files are split further (into parts of at least 50 000 events) so that every worker has work.
    ``overwrite`` may be one value per pair. A file that cannot be planned (unreadable, output exists) becomes a
    job with its ``error`` set, so one bad file does not stop the others.
    """
    from ..io.raw import open_raw

    pairs = [(Path(raw), Path(out)) for raw, out in pairs]
    sizes = []
    for raw, _ in pairs:
        try:
            with open_raw(raw, strict=options.get("strict", False)) as reader:
                sizes.append(len(reader))
        except (ValueError, OSError, KeyError):
            sizes.append(0)  # the error is reported by plan_file below
    chosen = [part_events or DEFAULT_PART_EVENTS] * len(pairs)
    n_tasks = sum(max(1, math.ceil(n / DEFAULT_PART_EVENTS)) for n in sizes)
    if part_events is None and n_tasks < workers and pairs:
        # split the files into about `workers` tasks in all, in proportion to their events
        total = max(1, sum(sizes))
        for k, n in enumerate(sizes):
            share = max(1, round(workers * n / total))
            chosen[k] = max(MIN_AUTO_PART_EVENTS, math.ceil(n / share))
    overwrite = options.pop("overwrite", False)
    if not isinstance(overwrite, list | tuple):
        overwrite = [bool(overwrite)] * len(pairs)
    jobs = []
    for (raw, out), size, replace in zip(pairs, chosen, overwrite, strict=True):
        try:
            jobs.append(plan_file(raw, out, config, part_events=size, overwrite=replace, **options))
        except (ValueError, OSError, KeyError) as err:  # reported per file: one bad file does not stop the others
            jobs.append(FileJob(raw, out, 0, [], [], False, error=str(err)))
    return jobs


def join_parts(job: FileJob) -> Path:
    """Join the complete parts of a split file into its final table (see the module docstring) and delete them."""
    from ..io.raw import open_raw
    from .pipeline import truth_columns

    missing = [str(p) for p, (a, b) in zip(job.part_paths, job.ranges, strict=True)
               if _attrs(p) is None or _attrs(p).get("_n_rows") != b - a]
    if missing:
        raise RuntimeError(f"cannot join '{job.out_path}': {len(missing)} of {len(job.ranges)} parts are missing "
                           f"or incomplete (first: '{missing[0]}'); run the reconstruction again to redo them")
    first = _attrs(job.part_paths[0])
    provenance = {k: v for k, v in _read_provenance(job.part_paths[0]).items() if k not in _PART_KEYS}
    fingerprint = None
    n_malformed = 0
    created = []
    writer = TableWriter(job.out_path, provenance=provenance, compression=job.compression,
                         overwrite=job.overwrite, expected_rows=job.n_events, exact_rows=True)
    try:
        for path in job.part_paths:
            with h5py.File(path, "r") as f:
                attrs = f["provenance"].attrs
                if attrs[SETTINGS_HASH_KEY] != first[SETTINGS_HASH_KEY]:
                    raise RuntimeError(f"part '{path}' was made with other settings than '{job.part_paths[0]}'")
                part = RawFingerprint.from_hexdigest(_text(attrs["range_fingerprint"]),
                                                     attrs["range_fingerprint_bytes"])
                fingerprint = part if fingerprint is None else fingerprint.combine(part)
                n_malformed += int(attrs["n_malformed_events"])
                created.append(_text(attrs["created_utc"]))
                events = f["events"]
                order = [_text(v) for v in events.attrs["column_order"]]
                n_rows = int(events.attrs["n_rows"])
                for a in range(0, n_rows, _JOIN_BLOCK_ROWS):
                    b = min(a + _JOIN_BLOCK_ROWS, n_rows)
                    writer.append({name: events[name][a:b] for name in order})
        if job.with_truth:
            with open_raw(job.raw_path) as reader:
                for name, dataset in truth_columns(reader):
                    writer.copy_column(name, dataset)
        if len(writer) != job.n_events:  # pragma: no cover - guards the one-row-per-event promise
            raise RuntimeError(f"joined {len(writer)} rows for {job.n_events} events of '{job.raw_path}'")
        writer.set_provenance(input_fingerprint=fingerprint.hexdigest(), n_malformed_events=n_malformed,
                              created_utc=min(created), finished_utc=now_utc(), n_parts=len(job.ranges))
    except BaseException as err:
        writer.fail(err)
    path = writer.close()  # the commit point
    shutil.rmtree(parts_folder(job.out_path), ignore_errors=True)
    return path


def _text(value) -> str:
    return value.decode() if isinstance(value, bytes) else str(value)


def _read_provenance(path: Path) -> dict:
    from ..io.table import _read_provenance

    with h5py.File(path, "r") as f:
        return _read_provenance(f["provenance"])


def file_result(job: FileJob, error: str = "") -> FileResult:
    """The :class:`FileResult` of a finished (or failed) job."""
    seconds = time.perf_counter() - job.started
    common = dict(n_parts=max(1, len(job.ranges)), n_parts_reused=job.n_reused, seconds=seconds)
    error = error or job.error
    if error:
        return FileResult(str(job.raw_path), str(job.out_path), error=error, **common)
    with h5py.File(job.out_path, "r") as f:
        status = f["events/status"][:]
    return FileResult(str(job.raw_path), str(job.out_path), n_rows=len(status),
                      n_ok=int(np.count_nonzero(status == 0)), **common)


def finish_job(job: FileJob) -> FileResult:
    """Join a split file whose tasks are all done (nothing to do for a whole-file task) and report it."""
    if job.split:
        join_parts(job)
    return file_result(job)


# ------------------------------------------------------------------------------------------------ local processes
def _pool_task(task: RangeTask, progress_queue) -> int:
    report = (lambda n: progress_queue.put(n)) if progress_queue is not None else None
    return run_task(task, report)


def run_jobs_locally(jobs: list[FileJob], workers: int, *, on_result=None, progress=None) -> list[FileResult]:
    """Run the tasks of planned jobs in a pool of ``workers`` processes (``spawn``), joining each split file as soon
    as its last part is written.

    Parameters
    ----------
    on_result : callable, optional
        Called with each :class:`FileResult` as its file finishes (or fails).
    progress : callable, optional
        Called with numbers of events as they are reconstructed.

    Returns
    -------
    list of FileResult
        In the order of ``jobs``; a file whose task failed carries the error (its complete parts stay on disk for a
        rerun, which redoes only the missing ones).
    """
    import multiprocessing
    import queue
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    results: dict[int, FileResult] = {}
    pending_tasks = {id(job): len(job.tasks) for job in jobs}
    failed: dict[int, str] = {}

    def finish(k, job):
        try:
            result = (file_result(job, failed.get(id(job), "")) if id(job) in failed or job.error
                      else finish_job(job))
        except (ValueError, OSError, KeyError, RuntimeError) as err:
            result = file_result(job, str(err))
        results[k] = result
        if on_result is not None:
            on_result(result)

    for k, job in enumerate(jobs):
        if job.error or not job.tasks:  # a file that could not be planned, or every part reused: join only
            finish(k, job)
    todo = [(k, job, task) for k, job in enumerate(jobs) for task in job.tasks]
    if todo:
        context = multiprocessing.get_context("spawn")
        with context.Manager() as manager, ProcessPoolExecutor(max(1, workers), mp_context=context) as pool:
            progress_queue = manager.Queue() if progress is not None else None
            futures = {pool.submit(_pool_task, task, progress_queue): (k, job) for k, job, task in todo}
            waiting = set(futures)

            def drain():
                while progress_queue is not None:
                    try:
                        progress(progress_queue.get_nowait())
                    except queue.Empty:
                        return

            while waiting:
                done, waiting = wait(waiting, timeout=0.2, return_when=FIRST_COMPLETED)
                drain()
                for future in done:
                    k, job = futures[future]
                    try:
                        future.result()
                    except (ValueError, OSError, KeyError, RuntimeError) as err:
                        failed.setdefault(id(job), f"{err}")
                    except Exception as err:  # noqa: BLE001 - a worker that died (BrokenProcessPool) and the like
                        failed.setdefault(id(job), f"{type(err).__name__}: {err}")
                    pending_tasks[id(job)] -= 1
                    if pending_tasks[id(job)] == 0:
                        finish(k, job)
            drain()
    return [results[k] for k in range(len(jobs))]


def run_jobs_here(jobs: list[FileJob], *, on_result=None, progress=None) -> list[FileResult]:
    """Run the tasks of planned jobs one after the other in this process (each with the kernel threads it was
    planned with) and join the split files; as :func:`run_jobs_locally` without the process pool."""
    results = []
    for job in jobs:
        error = job.error
        if not error:
            try:
                for task in job.tasks:
                    run_task(task, progress)
                result = finish_job(job)
            except (ValueError, OSError, KeyError, RuntimeError) as err:
                error = str(err)
        if error:
            result = file_result(job, error)
        results.append(result)
        if on_result is not None:
            on_result(result)
    return results


def reconstruct_in_parts(raw_path, out_path, config=None, *, workers: int | None = None,
                         part_events: int | None = None, batch_size: int | None = None, strict: bool = False,
                         overwrite: bool = False, compression: str = DEFAULT_COMPRESSION, with_truth: bool = True,
                         progress=None) -> FileResult:
    """Reconstruct one raw file as event ranges in ``workers`` processes (default: all CPUs) and join them.

    Parameters
    ----------
    part_events : int, optional
        Events per part (default: the file split into ``workers`` parts, or parts of
        :data:`DEFAULT_PART_EVENTS` events for larger files).

    Other parameters are those of :func:`~trackfit.reconstruct_file`; ``progress`` is a callable taking numbers of
    events. Complete parts of an earlier, interrupted run with the same input and settings are reused. A file that
    cannot be read, or an output that exists without ``overwrite``, raises as in ``reconstruct_file``.

    Returns
    -------
    FileResult
        Rows, parts and parts reused; ``error`` says what failed (nothing is raised for a failed part).
    """
    workers = max(1, int(workers if workers is not None else (os.cpu_count() or 1)))
    plan_file(raw_path, out_path, config, part_events=None, strict=strict, overwrite=overwrite)  # raises for bad input
    (job,) = plan_jobs([(raw_path, out_path)], config, workers=workers, part_events=part_events,
                       batch_size=batch_size, strict=strict, overwrite=overwrite, compression=compression,
                       with_truth=with_truth)
    return run_jobs_locally([job], workers, progress=progress)[0]
