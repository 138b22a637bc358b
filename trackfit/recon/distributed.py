"""Reconstruct raw files on a Dask distributed cluster: small files as one task each, large files as event-range
tasks whose parts the client joins into the table one process would write.

What to use when: :func:`~trackfit.reconstruct_file` (or ``trackfit reconstruct``) on one machine;
:func:`reconstruct_on_cluster` (or ``trackfit reconstruct --scheduler ADDRESS``) when a Dask cluster can read the
files (a shared file system: every worker and the client must see the input and output paths). A file of more than
``part_events`` events is split into ranges (:mod:`trackfit.recon.parts`): each task streams its range exactly as
``reconstruct_file`` does, so memory per worker is bounded by the batch size, and writes a part; when the last part
of a file is written the client joins the parts (the rename of the joined table is the commit point). A worker lost
mid-task leaves at most a partial file of a part (Dask runs the task again elsewhere); a rerun after an interrupted run
redoes only the missing parts. Needs the optional extra: ``pip install "trackfit[dask]"``.
"""

from __future__ import annotations

from collections.abc import Sequence

from .config import ReconConfig
from .parts import FileResult, file_result, finish_job, plan_jobs, run_task

__all__ = ["reconstruct_on_cluster", "FileResult"]


def _client(client, scheduler):
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:
        raise ImportError('reconstruction on a Dask cluster needs the optional extra: '
                          'pip install "trackfit[dask]"') from None
    if client is not None:
        return client, False
    if scheduler in (None, "local"):
        return Client(LocalCluster(threads_per_worker=1, processes=True, dashboard_address=None)), True
    return Client(scheduler), True


def reconstruct_on_cluster(jobs: Sequence[tuple], config=None, *, client=None, scheduler: str | None = None,
                           on_result=None, part_events: int | None = None, **options) -> list[FileResult]:
    """Reconstruct raw files as tasks of a Dask distributed cluster.

    Parameters
    ----------
    jobs : sequence of (raw_path, out_path)
        Paths as the workers and the client see them.
    config : ReconConfig or path of a TOML file, optional
    client : dask.distributed.Client, optional
        An existing client; otherwise one is made for ``scheduler``.
    scheduler : str, optional
        Scheduler address (``tcp://host:8786``), or ``"local"``/None for a local cluster of processes.
    on_result : callable, optional
        Called with each :class:`FileResult` as its file finishes (progress reporting).
    part_events : int, optional
        Events per range task. Default: files of more than
        :data:`~trackfit.recon.parts.DEFAULT_PART_EVENTS` events are split into parts of about that size, and
        when there are fewer files than workers the largest are split further so that every worker has work.
    **options
        Passed to :func:`~trackfit.reconstruct_file` (``batch_size``, ``threads``, ``strict``, ``overwrite``,
        ``compression``, ``with_truth``).

    Returns
    -------
    list of FileResult
        In the order of ``jobs``; failed files carry their error instead of raising, so one bad file does not
        stop the others (the complete parts of a failed file stay on disk and are reused by a rerun).
    """
    from dask.distributed import as_completed

    if config is None:
        config = ReconConfig()
    elif not isinstance(config, ReconConfig):
        config = ReconConfig.read_toml(config)
    client, owned = _client(client, scheduler)
    try:
        n_workers = max(1, sum(client.nthreads().values()))
        planned = plan_jobs(jobs, config, workers=n_workers, part_events=part_events, **options)
        results: dict[int, FileResult] = {}
        failed: dict[int, str] = {}
        left = {k: len(job.tasks) for k, job in enumerate(planned)}

        def finish(k):
            job = planned[k]
            try:
                result = file_result(job, failed.get(k, "")) if k in failed or job.error else finish_job(job)
            except (ValueError, OSError, KeyError, RuntimeError) as err:
                result = file_result(job, str(err))
            results[k] = result
            if on_result is not None:
                on_result(result)

        futures = {}
        for k, job in enumerate(planned):
            if job.error or not job.tasks:
                finish(k)
                continue
            for task in job.tasks:
                name = f"trackfit-reconstruct-{k}-{job.raw_path.name}-{task.start}-{task.stop}"
                futures[client.submit(run_task, task, pure=False, key=name)] = k
        for future in as_completed(list(futures)):
            k = futures[future]
            try:
                future.result()
            except (ValueError, OSError, KeyError, RuntimeError) as err:
                failed.setdefault(k, str(err))
            except Exception as err:  # noqa: BLE001 - a task the cluster gave up on (workers lost) and the like
                failed.setdefault(k, f"{type(err).__name__}: {err}")
            left[k] -= 1
            if left[k] == 0:
                finish(k)
        return [results[k] for k in range(len(planned))]
    finally:
        if owned:
            cluster = getattr(client, "cluster", None)
            client.close()
            if cluster is not None:
                cluster.close()
