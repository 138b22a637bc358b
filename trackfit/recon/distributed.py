"""Reconstruct many raw files on a Dask distributed cluster: one task per file.

What to use when: :func:`reconstruct_file` (or ``trackfit reconstruct --workers N``) on one machine;
:func:`reconstruct_on_cluster` (or ``trackfit reconstruct --scheduler ADDRESS``) when a run is spread over many
files and a Dask cluster can read them (a shared file system: every worker must see the input and output paths).
Each task streams its file exactly as :func:`reconstruct_file` does, so memory per worker is bounded by the batch
size. Needs the optional extra: ``pip install "trackfit[dask]"``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

from .config import ReconConfig

__all__ = ["reconstruct_on_cluster", "FileResult"]


@dataclass(frozen=True)
class FileResult:
    """What one task did: its input and output, rows written and rows fully reconstructed, or the error."""

    raw_path: str
    out_path: str
    n_rows: int = 0
    n_ok: int = 0
    error: str = ""

    def __str__(self):
        if self.error:
            return f"{self.raw_path}: FAILED: {self.error}"
        share = f"{100.0 * self.n_ok / self.n_rows:.1f} %" if self.n_rows else "-"
        return f"wrote {self.out_path}: {self.n_rows} events, {self.n_ok} fully reconstructed ({share})"


def _task(raw_path: str, out_path: str, config_toml: str, options: dict) -> FileResult:
    """Runs on a worker: reconstruct one file and report (errors of the input are reported, not raised)."""
    import numpy as np

    from ..io.table import read_table
    from .pipeline import reconstruct_file

    try:
        reconstruct_file(raw_path, out_path, ReconConfig.from_toml(config_toml), progress=False, **options)
    except (ValueError, OSError, KeyError) as err:
        return FileResult(raw_path, out_path, error=str(err))
    status = read_table(out_path, ["status"])["status"]
    return FileResult(raw_path, out_path, n_rows=len(status), n_ok=int(np.count_nonzero(status == 0)))


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
                           on_result=None, **options) -> list[FileResult]:
    """Reconstruct raw files as tasks of a Dask distributed cluster.

    Parameters
    ----------
    jobs : sequence of (raw_path, out_path)
        Paths as the workers see them.
    config : ReconConfig or path of a TOML file, optional
    client : dask.distributed.Client, optional
        An existing client; otherwise one is made for ``scheduler``.
    scheduler : str, optional
        Scheduler address (``tcp://host:8786``), or ``"local"``/None for a local cluster of processes.
    on_result : callable, optional
        Called with each :class:`FileResult` as its task finishes (progress reporting).
    **options
        Passed to :func:`reconstruct_file` (``batch_size``, ``threads``, ``strict``, ``overwrite``, ...).

    Returns
    -------
    list of FileResult
        In the order of ``jobs``; failed files carry their error instead of raising, so one bad file does not
        stop the others.
    """
    from dask.distributed import as_completed

    if config is None:
        config = ReconConfig()
    elif not isinstance(config, ReconConfig):
        config = ReconConfig.read_toml(config)
    client, owned = _client(client, scheduler)
    try:
        futures = [client.submit(_task, str(Path(raw)), str(Path(out)), config.to_toml(), dict(options),
                                 pure=False, key=f"trackfit-reconstruct-{i}-{Path(raw).name}")
                   for i, (raw, out) in enumerate(jobs)]
        results = {}
        for future in as_completed(futures):
            result = future.result()
            results[future.key] = result
            if on_result is not None:
                on_result(result)
        return [results[f.key] for f in futures]
    finally:
        if owned:
            cluster = getattr(client, "cluster", None)
            client.close()
            if cluster is not None:
                cluster.close()
