"""Open a file's HDF5 structure in a child process with a time limit, before the caller opens it itself.

Some damage sends the HDF5 library into an endless loop while it reads a file's metadata (the global heap case is
caught cheaply beforehand by :mod:`trackfit.io.heapcheck`; others may exist), and nothing inside the process can
interrupt a loop in compiled code. ``trackfit info``, which users point at anything, therefore walks the file's
metadata first in a ``spawn`` child process (numba's OpenMP layer hangs forked children): the root and every
object's attributes, every object's kind, every dataset's dtype, shape and storage layout, but no data. When the
child has not finished within the time limit it is killed and the file refused; when it crashed (some damaged attribute
datatypes make the library itself fail with a segmentation fault) the file is refused too. Errors of the walk are
not judged here: the reader that opens the file next reports them in its own words.
"""

from __future__ import annotations

import multiprocessing
from pathlib import Path

__all__ = ["DEFAULT_TIMEOUT_S", "walk_structure", "probe_structure"]

#: seconds the child may take; a walk of a sound file's metadata takes milliseconds, the rest is the child's start
DEFAULT_TIMEOUT_S = 60.0


def walk_structure(path) -> None:
    """Read every piece of metadata of an HDF5 file without reading data (the child's job); errors pass."""
    import h5py

    with h5py.File(path, "r") as f:
        dict(f.attrs.items())

        seen = []

        def visit(name, link):
            if isinstance(link, h5py.HardLink):
                obj = f[name]
                seen.append(dict(obj.attrs.items()))
                if isinstance(obj, h5py.Dataset):
                    seen.append((obj.dtype, obj.shape, obj.chunks, obj.compression, obj.external, obj.is_virtual))

        f.visititems_links(visit)


def _child(path) -> None:
    try:
        walk_structure(path)
    except Exception:  # noqa: BLE001 - judged by the reader that opens the file next
        pass


def probe_structure(path, *, error, timeout_s: float = DEFAULT_TIMEOUT_S) -> None:
    """Walk the metadata of ``path`` (:func:`walk_structure`) in a spawn child; refuse the file when the child has
    not finished within ``timeout_s`` seconds or was killed by a signal (a crash of the HDF5 library).

    Raises
    ------
    error
        ``error(path, "the HDF5 library did not finish reading the file's structure within ... s ...")``.
    """
    process = multiprocessing.get_context("spawn").Process(target=_child, args=(str(Path(path)),),
                                                           name="trackfit-probe", daemon=True)
    process.start()
    process.join(timeout_s)
    if process.is_alive():
        process.kill()
        process.join()
        raise error(path, f"the HDF5 library did not finish reading the file's structure within {timeout_s:g} s "
                          "(damaged metadata can send it into an endless loop); the file was not opened")
    code = process.exitcode
    process.close()
    if code is not None and code < 0:
        raise error(path, f"the HDF5 library crashed (signal {-code}) reading the file's structure: the file's "
                          "metadata is damaged; the file was not opened")
